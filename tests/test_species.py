"""Molecular species (doped host:guest films): the species column, selection
by species, per-species statistics, per-species charge sets, the transport
export's species and pair classes, and the film-wide model of a constructed
two-species dipole lattice against the analytic dipolar-disorder results."""

from __future__ import annotations

import warnings

import MDAnalysis as mda
import numpy as np
import pytest

from clusterlab.errors import ChargeError, FilmError, InputError
from clusterlab.film import MixedSpeciesWarning, film_from_universe
from clusterlab.ranges import parse_species

from lattice_films import DipoleSpecies, cation_charge_set, dipole_lattice_universe

HOST = DipoleSpecies("HST", 3.0, 20)
GUEST = DipoleSpecies("GST", 6.0, 7, ("S", "C", "Cl"))
#: the species list of error messages (order of first appearance, either way round)
PRESENT = r"(HST \(20\), GST \(7\)|GST \(7\), HST \(20\))"


@pytest.fixture(scope="module")
def doped():
    u, names = dipole_lattice_universe(3, 10.0, [HOST, GUEST], n_frames=2, seed=3)
    return film_from_universe(u), names


# ---------------------------------------------------------------- the film
def test_species_column_counts_and_describe(doped):
    film, names = doped
    m = film.molecules
    assert list(m.columns[:6]) == ["molecule", "resname", "resid", "n_atoms", "charge", "formula"]
    assert m["species"].tolist() == names.tolist() and m["species"].map(type).eq(str).all()
    assert (m["species"] == m["resname"]).all()                 # species = resname is the interface
    first = "HST" if names.tolist().index("HST") < names.tolist().index("GST") else "GST"
    assert film.species.index[0] == first                        # order of first appearance
    assert film.species.to_dict() == {"HST": 20, "GST": 7}
    assert film.species_formula("GST") == "CClS" and film.species_formula("HST") == "CNO"
    assert "7 x GST (CClS)" in film.describe()


def test_select_by_species(doped):
    film, names = doped
    gst = np.flatnonzero(names == "GST")
    assert film.select("species:GST").tolist() == gst.tolist()
    assert film.select(species="GST").tolist() == gst.tolist()
    assert film.select("species:HST, GST").tolist() == list(range(27))
    host = int(np.flatnonzero(names == "HST")[0])
    assert film.select([int(gst[1]), host], species=["GST"]).tolist() == [int(gst[1])]
    assert film.select("resname GST", species="GST").tolist() == gst.tolist()
    assert parse_species("Species:GST") == ["GST"] and parse_species("resname GST") is None


@pytest.mark.parametrize("call", [lambda f: f.select("species:XYZ"), lambda f: f.select(species="XYZ"),
                                  lambda f: f.check_species(["GST", "XYZ"])])
def test_unknown_species_lists_the_species_present(doped, call):
    with pytest.raises(InputError, match=r"no molecules named 'XYZ' \(no molecule of that species\); its species are " + PRESENT):
        call(doped[0])


def test_selection_without_molecules_of_the_species(doped):
    film, names = doped
    host = int(np.flatnonzero(names == "HST")[0])
    with pytest.raises(InputError, match=r"holds no molecule of species 'GST'.*" + PRESENT):
        film.select([host], species="GST")
    with pytest.raises(InputError, match="species selection 'species:' is not valid"):
        film.select("species:")
    with pytest.raises(InputError, match=r"'resname XYZ'.*species " + PRESENT):
        film.select("resname XYZ")


def _mixed_residue_universe():
    """Residue 1 (SYS) holds a water and a CO molecule (two bonded fragments
    of different compositions); residue 2 (SYS) another water."""
    u = mda.Universe.empty(8, n_residues=2, atom_resindex=[0, 0, 0, 0, 0, 1, 1, 1], trajectory=True)
    u.add_TopologyAttr("names", ["O", "H1", "H2", "C", "O", "O", "H1", "H2"])
    u.add_TopologyAttr("elements", ["O", "H", "H", "C", "O", "O", "H", "H"])
    u.add_TopologyAttr("resnames", ["SYS", "SYS"])
    u.add_TopologyAttr("resids", [1, 2])
    u.add_TopologyAttr("charges", [-0.8, 0.4, 0.4, 0.1, -0.1, -0.8, 0.4, 0.4])
    u.add_TopologyAttr("bonds", [(0, 1), (0, 2), (3, 4), (5, 6), (5, 7)])
    pos = np.array([[0, 0, 0], [0.96, 0, 0], [-0.24, 0.93, 0], [5, 0, 0], [6.13, 0, 0],
                    [0, 5, 0], [0.96, 5, 0], [-0.24, 5.93, 0]], float) + 2.0
    u.atoms.positions = pos
    u.dimensions = [20, 20, 20, 90, 90, 90]
    return u


def test_mixed_species_in_one_residue_warns_and_refuses_species_fits():
    with pytest.warns(MixedSpeciesWarning, match=r"mixed species in one residue.*residue SYS 1 \(H2O x1, CO x1\)"):
        film = film_from_universe(_mixed_residue_universe())
    # still usable: carving and the molecule table work per molecule
    assert film.n_molecules == 3 and film.molecules["formula"].tolist() == ["H2O", "CO", "H2O"]
    assert film.carve(0, 8.0).n_env_molecules == 2
    with pytest.raises(FilmError, match=r"species 'SYS'.*2 compositions: H2O x2.*CO x1"):
        film.species_formula("SYS")


def test_species_without_charges_is_named(doped):
    film, _ = doped
    with pytest.raises(ChargeError, match=r"No charges at all for species 'GST' \(7 molecule\(s\)\)"):
        film_from_universe(film.universe, charges={("HST", "QN"): -0.1, ("HST", "QC"): 0.0,
                                                   ("HST", "QP"): 0.1}).charges
    u = film.universe.copy()
    q = u.atoms.charges.copy()
    q[np.isin(u.atoms.resnames, ["GST"])] = np.nan
    u.atoms.charges = q
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        bad = film_from_universe(u)
    with pytest.raises(ChargeError, match=r"No charges at all for species 'GST'.*not finite"):
        bad.charges


# ------------------------------------------------- film model: dipolar disorder
# Three films (independent species layouts), each a 12^3 simple cubic lattice
# (a = 10 Å) of +-q pairs (d = 1 Å): 1296 host molecules of 2 D and 432 guest
# molecules (25 %) of 5 D, eight frames of random orientations each. The film
# model's cation shift is the potential of the environment's dipoles at the
# site (lattice_films.cation_charge_set), summed over the molecules whose
# centroid lies within RC = 5.5 a (inside the half box of 6 a: no site counted twice).
LATTICE_N, SPACING_A, RC, N_FRAMES = 12, 10.0, 5.5, 8
MIX = [DipoleSpecies("HST", 2.0, LATTICE_N ** 3 - 432), DipoleSpecies("GST", 5.0, 432, ("S", "C", "Cl"))]
S4 = 16.5323  # sum of |n|^-4 over Z^3 without 0 (Dieckmann, Bässler & Borsenberger 1993)


def _lattice_vectors(half: int) -> np.ndarray:
    g = np.arange(-half, half + 1, dtype=float)
    return np.stack(np.meshgrid(g, g, g, indexing="ij"), -1).reshape(-1, 3)


def _sphere_sums(rc: float, r: int) -> tuple[float, float]:
    """Over the lattice points inside the sphere of radius rc (lattice units):
    ``S = sum |n|^-4`` without 0, and ``X(r) = sum n.(n - r)/(|n|^3 |n - r|^3)``
    over the points inside the spheres around both 0 and r = (r, 0, 0), neither
    of the two sites (Coulomb's law for the covariance of the two sites' potentials)."""
    n = _lattice_vectors(int(np.ceil(rc)) + r)
    m = n - np.array([r, 0.0, 0.0])
    a2, b2 = (n ** 2).sum(1), (m ** 2).sum(1)
    own = (a2 > 0) & (a2 <= rc ** 2)
    both = own & (b2 > 0) & (b2 <= rc ** 2)
    s = float(np.sum(1.0 / a2[own] ** 2))
    x = float(np.sum((n[both] * m[both]).sum(1) / (a2[both] ** 1.5 * b2[both] ** 1.5)))
    return s, x


@pytest.fixture(scope="module")
def mixed_lattice():
    """Film-model site energies (cation shift, eV) of the three films, and the
    spatial correlation of each frame (bins of 0.35 Å, so that the shells at
    a, 2a, 3a fall inside bins)."""
    from clusterlab.stats import spatial_correlation
    from clusterlab.study.filmmodel import FilmModel

    tables, corr = [], []
    for seed in (11, 12, 13):
        u, _ = dipole_lattice_universe(LATTICE_N, SPACING_A, MIX, n_frames=N_FRAMES, seed=seed)
        film = film_from_universe(u)
        t = FilmModel(film, cation_charge_set(MIX), radius_A=RC * SPACING_A, states=("cation",),
                      rule="centroid").run(progress=False).table
        assert (t["species"].to_numpy() == np.tile(film.molecule_species, N_FRAMES)).all()
        tables.append(t.assign(film=seed))
        for f, g in t.groupby("frame"):
            c = spatial_correlation(g[["x_A", "y_A", "z_A"]].to_numpy(), g["cation_shift_eV"].to_numpy(),
                                    film.box(int(f)), r_max_A=45.5, n_bins=130)
            corr.append([float(c["C"].iloc[np.argmin(np.abs(c["r_A"] - k * SPACING_A))]) for k in (1, 2, 3)])
    import pandas as pd

    return pd.concat(tables, ignore_index=True), np.array(corr)


def _unit_eV(p_rms_D: float) -> float:
    """e p / (eps a^2) in eV (eps = 1)."""
    from clusterlab.units import COULOMB_EV_A, DEBYE_E_A

    return COULOMB_EV_A * p_rms_D * DEBYE_E_A / SPACING_A ** 2


def test_mixed_dipole_lattice_sigma_per_species(mixed_lattice):
    """Per-species σ of a doped dipolar film against the analytic dipolar disorder
    σ = 2.35 e p/(ε a²) (Dieckmann, Bässler & Borsenberger, J. Chem. Phys. 99, 8136
    (1993)).

    Derivation for the mixture: the site energy is U_i = Σ_j e p_j·r_ij/r_ij³ over
    the environment j ≠ i (ε = 1). Orientations are independent and isotropic, so
    <(p_j·r̂)²> = p_j²/3 and the cross terms vanish: σ² = (e²/3) Σ_j p_j² r_ij⁻⁴.
    The species of the sites are independent of the site i, so on average over
    layouts p_j² is the environment mean <p²> = c_H p_H² + c_G p_G², and
    σ² = (S/3) e² <p²>/a⁴ with S = Σ|n|⁻⁴ over the environment: both species get
    the same σ, that of one dipole p_rms = sqrt(<p²>) (here 3.04 D: not the host's
    2 D nor the guest's 5 D), because a site's own dipole is not in its environment.
    For the infinite lattice S = S4 = 16.5323 and sqrt(S4/3) = 2.35.

    Finite size: the model sums within RC = 5.5 a, so S is the sphere sum (computed
    exactly); the part beyond RC is the continuum tail 4π a/RC (the lattice sum with
    that tail is 16.579, 0.3 % above S4: 0.14 % in σ), so σ·sqrt((S + 4π/RC)/S) is
    compared with 2.35 e p_rms/a². Tolerance 5 %: measured while writing the test,
    the pooled 3 x 8 frames per species scatter by ±1.7 % over six sets of seeds;
    the ±q pairs (d = 1 Å) differ from point dipoles by (d/2a)² ~ 0.3 %."""
    from clusterlab.stats import grouped_disorder_stats

    table, _ = mixed_lattice
    p2 = sum(s.count * s.dipole_D ** 2 for s in MIX) / LATTICE_N ** 3
    s_sphere, _ = _sphere_sums(RC, 0)
    stats = grouped_disorder_stats(table["cation_shift_eV"], table["species"], name="species", n_boot=200, seed=0)
    assert sorted(stats["species"]) == ["GST", "HST"]
    assert stats.set_index("species").loc["GST", "n"] == 3 * N_FRAMES * 432
    tail = np.sqrt((s_sphere + 4 * np.pi / RC) / s_sphere)
    for row in stats.itertuples():
        assert row.sigma * tail == pytest.approx(2.35 * _unit_eV(np.sqrt(p2)), rel=0.05), row.species
        assert row.sigma == pytest.approx(np.sqrt(s_sphere / 3) * _unit_eV(np.sqrt(p2)), rel=0.05)
    # the width follows the environment, not the site's own dipole
    sig = stats.set_index("species")["sigma"].astype(float)
    assert sig["GST"] / sig["HST"] == pytest.approx(1.0, abs=0.05)


def test_mixed_dipole_lattice_correlation(mixed_lattice):
    """Spatial correlation of the same site energies (stats.spatial_correlation)
    against C(r) ≈ 0.74 σ² a/r (Novikov, Dunlap, Kenkre, Parris & Vannikov, Phys.
    Rev. Lett. 81, 4472 (1998)).

    The covariance of two sites' potentials is (e²<p²>/3) X(r), X the sum over the
    dipoles in both environments of n·(n - r)/(|n|³|n - r|³) (Coulomb's law, computed
    by brute force below), so the model's C(r) = X(r)/S. Truncation at RC removes the
    far dipoles, which both sites see almost alike: adding the tail 4π/RC to X and S
    estimates the infinite lattice, C_inf(r) = (X + 4π/RC)/(S + 4π/RC). That estimate,
    done exactly on the lattice, lies 4.5 % below 0.74 a/r at 2a and 3a (0.353 and
    0.236 against 0.370 and 0.247), the truncation's own error.

    Tolerances: against the exact sphere sums 5 % at r = a and 15 % at 2a and 3a,
    against 0.74 a/r 15 % at 2a and 3a: measured while writing the test, the mean over
    the 24 frames of three films scatters over six sets of seeds by ±2 % at a and ±7 %
    at 2a and 3a (the layout of the 5 D guests is fixed within a film, so frames of one
    film share part of their error); the rest is the 4.5 % truncation error above."""
    _, corr = mixed_lattice
    c = corr.mean(axis=0)
    for k, r in enumerate((1, 2, 3)):
        s_sphere, x = _sphere_sums(RC, r)
        assert c[k] == pytest.approx(x / s_sphere, rel=0.05 if r == 1 else 0.15), r
        if r > 1:
            tail = 4 * np.pi / RC
            c_inf = (c[k] * s_sphere + tail) / (s_sphere + tail)
            assert c_inf == pytest.approx(0.74 / r, rel=0.15), r


# ------------------------------------------------------------ studies and front ends
def test_choose_molecules_and_scan_molecule_by_species(doped):
    from clusterlab.study import choose_molecules, pick_species_molecule
    from clusterlab.study.scan import scan_molecule

    film, names = doped
    gst = np.flatnonzero(names == "GST")
    assert choose_molecules(film, "species:GST").tolist() == gst.tolist()
    assert choose_molecules(film, "all", species="GST").tolist() == gst.tolist()
    some = choose_molecules(film, "all", species="GST", n=3, seed=1)
    assert len(some) == 3 and set(some) <= set(gst)
    with pytest.raises(InputError, match="no molecules named 'XYZ'"):
        choose_molecules(film, "all", species="XYZ")
    # the scan: the species' molecule nearest the box centre, or a seeded draw
    geo = film.frame_geometry(0)
    d = np.linalg.norm(geo.centroids_A[gst] - 15.0, axis=1)
    assert pick_species_molecule(film, "GST") == gst[np.argmin(d)]
    assert names[pick_species_molecule(film, "HST")] == "HST"
    assert pick_species_molecule(film, "GST", seed=5) == pick_species_molecule(film, "GST", seed=5)
    assert pick_species_molecule(film, "GST", seed=5) in gst
    assert scan_molecule(film, "species:GST") == gst[np.argmin(d)] and scan_molecule(film, 3) == 3
    with pytest.raises(InputError, match="one molecule"):
        scan_molecule(film, "species:HST,GST")
    with pytest.raises(InputError, match="species:NAME"):
        scan_molecule(film, "resname GST")


def test_site_tables_and_stats_carry_species(doped, tmp_path):
    from clusterlab import Method, ResultStore
    from clusterlab.store import task_key
    from clusterlab.study import SiteSample, cluster_task, site_table

    film, names = doped
    task = cluster_task(film, 4, 6.0, Method.preset("draft", basis="sto-3g"))
    assert task.payload["species"] == names[4]
    path = tmp_path / "sites.sqlite"
    rng = np.random.default_rng(0)
    s1 = np.where(names == "GST", 2.0, 3.0) + rng.normal(0, np.where(names == "GST", 0.1, 0.02))
    with ResultStore(path) as st:
        for m in range(film.n_molecules):
            k = task_key(film_id=film.film_id, frame=0, molecule=m, radius_A=5.0, kind="excitations")
            summary = {"frame": 0, "molecule": m, "radius_A": 5.0, "S1_eV": float(s1[m]), "converged": True}
            if m % 2:  # older records without species get it from the film
                summary["species"] = str(names[m])
            st.put(k, {"kind": "excitations", "payload": {"film": {"film_id": film.film_id}}}, "{}", summary)
    t = site_table(path, film=film).sort_values("molecule")
    assert t["species"].tolist() == names.tolist()
    sample = SiteSample.from_store(path, film=film)
    per = sample.stats("S1_eV", by="species", n_boot=200, seed=0).set_index("species")
    for sp in ("HST", "GST"):
        vals = s1[names == sp]
        assert per.loc[sp, "n"] == vals.size
        assert per.loc[sp, "sigma"] == pytest.approx(np.std(vals, ddof=1), rel=1e-12)
        assert per.loc[sp, "mean"] == pytest.approx(vals.mean(), rel=1e-12)
        assert per.loc[sp, "sigma_lo"] < per.loc[sp, "sigma"] < per.loc[sp, "sigma_hi"]
    with pytest.raises(InputError, match="by='colour'"):
        sample.stats("S1_eV", by="colour")


def test_grouped_stats_keep_small_groups():
    from clusterlab.stats import disorder_stats, grouped_disorder_stats

    rng = np.random.default_rng(3)
    v = rng.normal(0, 1, 30)
    g = ["A"] * 28 + ["B"] * 2
    t = grouped_disorder_stats(v, g, name="species", n_boot=200, seed=1)
    assert t["species"].tolist() == ["A", "B"]
    assert t.loc[0, "sigma"] == disorder_stats(v[:28], n_boot=200, seed=1)["sigma"]
    assert t.loc[1, "n"] == 2 and np.isnan(t.loc[1, "sigma"])
    with pytest.raises(InputError, match="one label per value"):
        grouped_disorder_stats(v, g[:5])


def test_study_file_species_keys(tmp_path):
    from clusterlab.errors import StudyFileError
    from clusterlab.studyfile import load_study, parse_override

    p = tmp_path / "study.toml"
    p.write_text("[film]\ntopology='x.pqr'\n[scan]\nspecies='GST'\n"
                 "[sample]\nmolecules='species:GST'\nspecies=['GST', 'HST']\n[model]\nspecies='GST'\n")
    st = load_study(p)
    assert st["model"]["species"] == "GST"
    assert st["scan"]["species"] == "GST" and st["scan"]["molecule"] is None
    assert st["sample"]["molecules"] == "species:GST" and st["sample"]["species"] == ["GST", "HST"]
    st = load_study(p, {("sample", "species"): parse_override("sample", "species", "GST")})
    assert st["sample"]["species"] == "GST"
    p.write_text("[film]\ntopology='x.pqr'\n[sample]\nmolecules='species:'\n")
    with pytest.raises(StudyFileError, match=r"\[sample\] molecules.*species selection 'species:'"):
        load_study(p)
    p.write_text("[film]\ntopology='x.pqr'\n[sample]\nspecies='HST GST'\n")
    with pytest.raises(StudyFileError, match=r"\[sample\] species.*'HST GST'"):
        load_study(p)


def test_cli_has_species_flags():
    from clusterlab.cli import _parser

    args = _parser().parse_args(["run", "study.toml", "--sample-species", "GST", "--scan-species", "GST"])
    assert args.set__sample__species == "GST" and args.set__scan__species == "GST"


def test_widgets_choose_by_species(doped):
    from clusterlab.widgets import DisorderPanel, FilmExplorer, ShiftScanPanel
    from clusterlab.study import pick_species_molecule

    film, names = doped
    gst = np.flatnonzero(names == "GST").tolist()
    ex = FilmExplorer(film, molecule=int(np.flatnonzero(names == "HST")[0]), radius_A=6.0, show_view=False)
    assert [v for v, _ in ex.species_picker.options][0] == "all species"
    ex.species_picker.value = "GST"
    assert [v for _, v in ex.molecule_picker.options] == gst
    assert ex.molecule in gst and names[ex.cluster.center] == "GST"
    assert ex.find_molecules("species:GST").tolist() == gst
    dp = DisorderPanel(film, show_view=False)
    dp.species.value = "GST"
    assert dp.selected_molecules().tolist() == gst
    dp.n_molecules.value = 2
    assert set(dp.selected_molecules()) <= set(gst)
    panel = ShiftScanPanel(film)
    panel.species.value = "GST"
    assert panel.molecule_id == pick_species_molecule(film, "GST") and panel.molecule.value == panel.molecule_id


def test_film_model_one_charge_set_per_species(doped):
    from clusterlab.electrostatics.chargeset import StateChargeSet
    from clusterlab.study.chargefits import fit_state_charges
    from clusterlab.study.filmmodel import FilmModel

    film, names = doped
    both = cation_charge_set([HOST, GUEST])
    assert both.species == ["GST", "HST"]
    t = FilmModel(film, both, radius_A=12.0, states=("cation",)).run(progress=False).table
    assert t["species"].tolist() == np.tile(names, 2).tolist() and t["cation_shift_eV"].notna().all()
    # each species takes its own set: the guest's differs from the host's, so swapping them changes its rows
    swapped = StateChargeSet.from_arrays({"HST": both.charges_e["GST"], "GST": both.charges_e["HST"]})
    t2 = FilmModel(film, swapped, radius_A=12.0, states=("cation",), environment="fitted").run(progress=False).table
    t3 = FilmModel(film, both, radius_A=12.0, states=("cation",), environment="fitted").run(progress=False).table
    assert not np.allclose(t2["cation_shift_eV"], t3["cation_shift_eV"])
    np.testing.assert_allclose(t3["cation_shift_eV"], t["cation_shift_eV"], rtol=1e-6)  # fitted S0 = film charges
    # a species missing from the set: its rows are NaN, the others unchanged
    host_only = StateChargeSet.from_arrays({"HST": both.charges_e["HST"]})
    t4 = FilmModel(film, host_only, radius_A=12.0, states=("cation",)).run(progress=False).table
    guest = t4["species"] == "GST"
    assert t4.loc[guest, "cation_shift_eV"].isna().all()
    np.testing.assert_allclose(t4.loc[~guest, "cation_shift_eV"], t.loc[~guest, "cation_shift_eV"])
    # the fits name the species asked for before any QM runs
    from clusterlab import Method

    with pytest.raises(InputError, match="no molecules named 'XYZ'"):
        fit_state_charges(film, Method.preset("draft", basis="sto-3g"), species=["XYZ"])
    with pytest.raises(InputError, match="not both"):
        fit_state_charges(film, Method.preset("draft", basis="sto-3g"), species=["GST"], resnames=["GST"])


def test_mixed_species_film_is_refused_by_the_species_model():
    from clusterlab.electrostatics.chargeset import StateChargeSet
    from clusterlab.study.filmmodel import FilmModel

    with pytest.warns(MixedSpeciesWarning):
        film = film_from_universe(_mixed_residue_universe())
    cset = StateChargeSet.from_arrays({"SYS": {"S0": [-0.8, 0.4, 0.4], "cation": [0.2, 0.4, 0.4]}})
    with pytest.raises(FilmError, match="species 'SYS'.*2 compositions"):
        FilmModel(film, cset, radius_A=8.0, states=("cation",))


def test_export_species_and_pair_classes(doped):
    from clusterlab.export import column_info, pair_classes, pair_table, site_table

    film, names = doped
    sites = site_table(film, frames=[0])
    assert sites["species"].tolist() == names.tolist()
    pairs = pair_table(film, 0, 10.5)
    assert len(pairs) == 27 * 3  # each site's +x, +y, +z neighbour once (periodic 3^3 lattice)
    i, j = pairs["i"].to_numpy(), pairs["j"].to_numpy()
    assert (pairs["species_i"] == names[i]).all() and (pairs["species_j"] == names[j]).all()
    expect = ["-".join(sorted(p)) for p in zip(names[i], names[j])]
    assert pairs["pair_class"].tolist() == expect
    assert set(pairs["pair_class"]) == {"HST-HST", "GST-HST", "GST-GST"}
    assert pair_classes(["HST"], ["GST"]).tolist() == ["GST-HST"]
    for col in ("species", "species_i", "species_j", "pair_class"):
        assert column_info(col)[1] != "(not documented)"


def test_export_files_carry_species_and_model_json_keeps_it(doped, tmp_path):
    from clusterlab.export import export_study, read_export
    from clusterlab.study.filmmodel import FilmModel, FilmModelResult

    film, names = doped
    model = FilmModel(film, cation_charge_set([HOST, GUEST]), radius_A=12.0, states=("cation",)).run(progress=False)
    back = FilmModelResult.from_json(model.to_json())
    assert back.table["species"].tolist() == model.table["species"].tolist() == np.tile(names, 2).tolist()
    export_study(film, tmp_path / "exp", model=model, cutoff_A=10.5, frames=[0])
    for prefer in ("parquet", "csv"):
        sites, pairs, meta = read_export(tmp_path / "exp", prefer=prefer)
        assert sites["species"].tolist() == names.tolist()
        assert set(pairs["pair_class"]) == {"HST-HST", "GST-HST", "GST-GST"}
    assert "pair_class" in meta["columns"]["pairs"] and "species" in meta["columns"]["sites"]


def test_scan_by_species_and_stored_rows_carry_species(tmp_path):
    """One real (HF/STO-3G-sized) calculation: the scan picks the species'
    molecule, and the worker's stored summary carries the species."""
    from clusterlab import Method, ResultStore, radius_scan
    from clusterlab.study import site_table

    from conftest import build_water_universe, lattice_centres

    u, _ = build_water_universe(lattice_centres(2, 0.1, np.random.default_rng(0)), np.array([6.2] * 3 + [90.0] * 3))
    film = film_from_universe(u)
    method = Method.preset("draft", basis="sto-3g", n_singlets=1, n_triplets=1)
    res = radius_scan(film, "species:WAT", [2.5, 3.0], method, store=tmp_path / "s.sqlite", progress=False)
    from clusterlab.study import pick_species_molecule

    assert res.molecule == pick_species_molecule(film, "WAT") and res.species == "WAT"
    assert set(res.table["species"]) == {"WAT"} and "(WAT)" in repr(res)
    with ResultStore(tmp_path / "s.sqlite", readonly=True) as st:
        assert st.to_frame(kind="excitations")["species"].tolist() == ["WAT", "WAT"]
    assert site_table(tmp_path / "s.sqlite")["species"].tolist() == ["WAT", "WAT"]


def test_run_film_model_fits_every_species(monkeypatch):
    """The study driver fits one reference per species (HF/STO-3G water under two
    species names): the reference molecule for its own species, the first
    molecule of the other; every row of both species gets a shift."""
    from clusterlab.qm.method import Method
    from clusterlab.study import chargefits
    from clusterlab.study.filmmodel import run_film_model

    from conftest import build_water_universe, lattice_centres

    u, _ = build_water_universe(lattice_centres(2, 0.1, np.random.default_rng(0)), np.array([6.2] * 3 + [90.0] * 3))
    u.residues.resnames = ["WAT", "SOL"] * 4
    film = film_from_universe(u)
    fitted_on = []
    real = chargefits.state_charges

    def counted(symbols, positions_A, *a, **k):
        fitted_on.append(len(symbols))
        return real(symbols, positions_A, *a, **k)

    monkeypatch.setattr(chargefits, "state_charges", counted)
    m = Method(xc="hf", basis="sto-3g", density_fit=False, grid_level=1, n_singlets=1, n_triplets=1, excited="tda")
    res = run_film_model(film, m, radius_A=5.0, frames=[0], reference_molecule=3, progress=False)
    assert len(fitted_on) == 2 and res.charges.species == ["SOL", "WAT"]
    assert res.charges.reference["SOL"]["molecule"] == 3 and res.charges.reference["WAT"]["molecule"] == 0
    assert res.options["fitted_species"] == ["SOL", "WAT"]
    assert res.table.groupby("species")["cation_shift_eV"].count().to_dict() == {"SOL": 4, "WAT": 4}
    only = run_film_model(film, m, radius_A=5.0, frames=[0], species=["WAT"], progress=False)
    assert only.charges.species == ["WAT"] and only.table.loc[only.table.species == "SOL", "T1_shift_eV"].isna().all()
