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
