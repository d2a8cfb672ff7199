"""Host:guest analyses (clusterlab.study.doped) on constructed films and tables
whose answers are known by hand."""

from __future__ import annotations

import json

import MDAnalysis as mda
import numpy as np
import pandas as pd
import pytest
from MDAnalysis.coordinates.memory import MemoryReader
from MDAnalysis.lib.distances import calc_dihedrals
from scipy import stats as sps

from clusterlab import Cluster, Method, excitations, film_from_universe
from clusterlab.errors import InputError
from clusterlab.geometry import dihedral_deg
from clusterlab.qm.results import ExcitationResult, ExcitedState
from clusterlab.report import ReportWriter, doped_section
from clusterlab.stats import disorder_stats, mean_offset, periodic_fit
from clusterlab.store import ResultStore, task_key
from clusterlab.study import SiteSample
from clusterlab.study.doped import (ConfinementResult, HostGuestOverview, MissingNeighboursError, SpeciesEnergies,
                                    StateOrderResult, TorsionResult, dest_torsion, host_guest_overview,
                                    species_energies, state_order, state_table, torsion_table, triplet_confinement)
from clusterlab.study.plots import plot_torsion

from conftest import TIP3P_XYZ, build_water_universe, lattice_centres

BOX = np.array([16.0, 16.0, 16.0, 90.0, 90.0, 90.0])
#: guests of the 4x4x4 lattice (spacing 4 Å): the corner (0,0,0) and the site (1,1,1)
GUESTS = (0, 21)


def lattice_film(guests=GUESTS):
    """64 water-like molecules on a simple cubic lattice (4 Å), ``GST`` at ``guests``, the rest ``HST``.
    Molecule id = 16 i + 4 j + k for lattice site (i, j, k)."""
    u, _ = build_water_universe(lattice_centres(4, 0.0, np.random.default_rng(0)), BOX, seed=1)
    names = np.array(["HST"] * 64, dtype=object)
    names[list(guests)] = "GST"
    u.residues.resnames = names
    return film_from_universe(u)


@pytest.fixture
def film():
    return lattice_film()


def site_rows(film, **columns):
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(film.n_molecules)})
    t["species"] = film.molecules["species"].to_numpy()
    for k, v in columns.items():
        t[k] = v
    return t


# ------------------------------------------------------------------ species
def test_species_column_is_the_resname(film):
    m = film.molecules
    assert list(m["species"]) == list(m["resname"])
    assert m["species"].value_counts().to_dict() == {"HST": 62, "GST": 2}


def test_noise_free_trap_depths_are_the_constructed_offsets(film):
    guest = film.molecules["species"].to_numpy() == "GST"
    s1 = np.where(guest, 2.6, 3.4) + np.random.default_rng(1).normal(0, 0.02, film.n_molecules)
    t = site_rows(film, IP_eV=np.where(guest, 5.55, 6.0), EA_eV=np.where(guest, 2.9, 2.5), S1_eV=s1)
    se = species_energies(t, film=film)
    assert (se.host, se.guest) == ("HST", "GST")
    traps = se.traps.set_index("carrier")
    # hole trap = IP_host - IP_guest, electron trap = EA_guest - EA_host, exactly, interval of zero width
    assert traps.loc["hole", "depth_eV"] == pytest.approx(0.45, abs=1e-12)
    assert traps.loc["electron", "depth_eV"] == pytest.approx(0.40, abs=1e-12)
    for c in ("hole", "electron"):
        assert traps.loc[c, "depth_lo_eV"] == pytest.approx(traps.loc[c, "depth_eV"], abs=1e-12)
        assert traps.loc[c, "depth_hi_eV"] == pytest.approx(traps.loc[c, "depth_eV"], abs=1e-12)
        assert traps.loc[c, "spread_eV"] == pytest.approx(0.0, abs=1e-12)
    assert (traps.loc["hole", "n_host"], traps.loc["hole", "n_guest"]) == (62, 2)
    assert se.trap_depth_eV("hole") == pytest.approx(0.45, abs=1e-12)
    st = se.stats.set_index(["species", "quantity"])
    assert st.loc[("GST", "S1_eV"), "n"] == 2 and np.isnan(st.loc[("GST", "S1_eV"), "mean_eV"])
    assert st.loc[("HST", "S1_eV"), "mean_eV"] == pytest.approx(s1[~guest].mean(), rel=1e-12)


def test_noisy_trap_depth_lies_in_its_interval():
    rng = np.random.default_rng(5)
    n_h, n_g = 300, 40
    sp = ["H"] * n_h + ["G"] * n_g
    ip = np.concatenate([rng.normal(6.0, 0.10, n_h), rng.normal(5.7, 0.12, n_g)])
    ea = np.concatenate([rng.normal(2.4, 0.08, n_h), rng.normal(2.6, 0.08, n_g)])
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(n_h + n_g), "species": sp, "IP_eV": ip, "EA_eV": ea,
                      "T1_eV": rng.normal(2.7, 0.05, n_h + n_g)})
    se = species_energies(t, n_boot=2000, seed=3)
    tr = se.traps.set_index("carrier")
    for carrier, true in (("hole", 0.3), ("electron", 0.2)):
        lo, hi = tr.loc[carrier, "depth_lo_eV"], tr.loc[carrier, "depth_hi_eV"]
        assert lo < true < hi and lo < tr.loc[carrier, "depth_eV"] < hi
    # offset and spread against numpy
    assert tr.loc["hole", "depth_eV"] == pytest.approx(ip[:n_h].mean() - ip[n_h:].mean(), rel=1e-12)
    assert tr.loc["electron", "spread_eV"] == pytest.approx(
        np.sqrt(np.var(ea[:n_h], ddof=1) + np.var(ea[n_h:], ddof=1)), rel=1e-12)
    st = se.stats.set_index(["species", "quantity"])
    assert st.loc[("G", "IP_eV"), "sigma_eV"] == pytest.approx(np.std(ip[n_h:], ddof=1), rel=1e-12)
    assert (se.host, se.guest) == ("H", "G")  # most abundant = host
    back = SpeciesEnergies.from_json(se.to_json())
    pd.testing.assert_frame_equal(back.stats, se.stats)
    pd.testing.assert_frame_equal(back.traps, se.traps)
    assert back.summary() == se.summary() and se.summary()["hole_trap_eV"] == tr.loc["hole", "depth_eV"]


def test_species_energies_bad_input(film):
    t = site_rows(film, IP_eV=6.0)
    with pytest.raises(InputError, match="'XYZ' is not a species"):
        species_energies(t, host="XYZ")
    three = t.assign(species=["A", "B", "C", "A"] * 16)
    with pytest.raises(InputError, match="cannot tell the guest"):
        species_energies(three)
    with pytest.raises(InputError, match="no 'species' column"):
        species_energies(t.drop(columns="species"))
    with pytest.raises(InputError, match="more than once"):
        species_energies(pd.concat([t, t]))
    with pytest.raises(InputError, match="needs a SiteSample or a site table"):
        species_energies([1, 2])
    with pytest.raises(InputError, match="at least 2 finite values"):
        mean_offset([1.0], [1.0, 2.0])


def test_sample_rows_use_the_largest_converged_radius(film):
    t = pd.concat([site_rows(film, IP_eV=6.0, radius_A=r, converged=True) for r in (6.0, 9.0)], ignore_index=True)
    t.loc[(t.radius_A == 9.0) & t.molecule.isin(GUESTS), "IP_eV"] = 5.8
    t.loc[(t.radius_A == 9.0) & (t.molecule == 5), "converged"] = False
    se = species_energies(SiteSample(table=t), film=film)
    assert se.radius_A == 9.0 and se.trap_depth_eV("hole") == pytest.approx(0.2, abs=1e-12)
    assert int(se.traps["n_host"].iloc[0]) == 61


# ------------------------------------------------------------- confinement
def _confinement_t1(film):
    """Hosts 3.0 eV, except 48 = (3,0,0) (a neighbour of guest 0 only through the periodic boundary) at
    2.70 and 37 = (2,1,1) (a neighbour of guest 21) at 2.90; guest 0 at 2.75, guest 21 at 2.80."""
    t1 = np.full(film.n_molecules, 3.0)
    t1[48], t1[37], t1[0], t1[21] = 2.70, 2.90, 2.75, 2.80
    return t1


def test_triplet_confinement_known_by_hand(film):
    t = site_rows(film, T1_eV=_confinement_t1(film))
    res = triplet_confinement(film, t, cutoff_A=4.5)
    s = res.sites.set_index("molecule")
    # 6 nearest neighbours at 4 Å on the simple cubic lattice, across the box faces for the corner site
    assert s.loc[0, "n_host_neighbours"] == 6 and s.loc[21, "n_host_neighbours"] == 6
    assert s.loc[0, "confined"] == 0.0 and s.loc[21, "confined"] == 1.0
    assert s.loc[0, "margin_eV"] == pytest.approx(2.70 - 2.75, abs=1e-12)
    assert s.loc[21, "margin_eV"] == pytest.approx(2.90 - 2.80, abs=1e-12)
    assert res.fraction == 0.5 and res.n_isolated == 0
    summ = res.summary()
    assert summ["confined_fraction"] == 0.5 and summ["margin_min_eV"] == pytest.approx(-0.05, abs=1e-12)
    # a larger cutoff takes the 12 second neighbours (5.66 Å) too
    big = triplet_confinement(film, t, cutoff_A=6.0).sites.set_index("molecule")
    assert big.loc[21, "n_host_neighbours"] == 18
    back = ConfinementResult.from_json(res.to_json())
    pd.testing.assert_frame_equal(back.sites, res.sites)
    assert back.summary() == summ


def test_triplet_confinement_missing_neighbours(film):
    t = site_rows(film, T1_eV=_confinement_t1(film))
    t = t[t.molecule != 37]
    with pytest.raises(MissingNeighboursError, match="1 host neighbour.*fallback='host-distribution'"):
        triplet_confinement(film, t, cutoff_A=4.5)
    res = triplet_confinement(film, t, cutoff_A=4.5, fallback="host-distribution")
    s = res.sites.set_index("molecule")
    # 61 host values in the table: 60 at 3.0 above 2.80, one (48) at 2.70 below it
    assert s.loc[21, "n_missing"] == 1 and s.loc[21, "confined"] == pytest.approx(60 / 61, abs=1e-12)
    assert s.loc[21, "margin_eV"] == pytest.approx(0.2, abs=1e-12)
    assert s.loc[0, "confined"] == 0.0
    assert res.fraction == pytest.approx(30 / 61, abs=1e-12)


def test_triplet_confinement_bad_input(film):
    t = site_rows(film, T1_eV=3.0)
    with pytest.raises(InputError, match="fallback='guess' is invalid"):
        triplet_confinement(film, t, cutoff_A=4.5, fallback="guess")
    with pytest.raises(InputError, match="exceeds half the smallest width"):
        triplet_confinement(film, t, cutoff_A=9.0)
    with pytest.raises(InputError, match="positive distance"):
        triplet_confinement(film, t, cutoff_A=-1)
    with pytest.raises(InputError, match="no 'S1_eV' column"):
        triplet_confinement(film, t, cutoff_A=4.5, value="S1_eV")


# ------------------------------------------------------------------ torsion
def test_dihedral_against_mdanalysis_and_a_constructed_angle():
    rng = np.random.default_rng(9)
    p = [rng.normal(size=(200, 3)) * 2.0 for _ in range(4)]
    # independent implementation; MDAnalysis computes in single precision (float32 arithmetic)
    ref = np.degrees(calc_dihedrals(*p))
    np.testing.assert_allclose(dihedral_deg(*p), ref, atol=1e-3)
    # a-b along x, b-c along z, c-d turned by phi about z: the dihedral is phi (IUPAC sign)
    for phi in (-150.0, -60.0, 0.0, 45.0, 120.0, 180.0):
        d = [np.cos(np.radians(phi)), np.sin(np.radians(phi)), 1.5]
        assert dihedral_deg([1, 0, 0], [0, 0, 0], [0, 0, 1.5], d)[0] == pytest.approx(phi, abs=1e-9)
    with pytest.raises(InputError, match="collinear"):
        dihedral_deg([0, 0, -1], [0, 0, 0], [0, 0, 1], [1, 0, 1])


def chain_film(angles_deg, species="DAX"):
    """One frame of 4-atom chains a-b-c-d (1.4 Å bonds, 110° angles) with the given dihedrals, randomly
    rotated, on a 2x2x2 grid of a 20 Å box; every other molecule is water (species ``HST``)."""
    from conftest import random_rotation

    rng = np.random.default_rng(4)
    n = len(angles_deg)
    pos, names, resnames, resindex, bonds = [], [], [], [], []
    centres = (np.stack(np.meshgrid(*[np.arange(3)] * 3, indexing="ij"), -1).reshape(-1, 3) + 0.5) * (20.0 / 3)
    for m, phi in enumerate(angles_deg):
        t = np.radians(70.0)
        a = np.array([1.4 * np.sin(t), 0.0, -1.4 * np.cos(t)])
        b, c = np.zeros(3), np.array([0.0, 0.0, 1.4])
        d = c + np.array([1.4 * np.sin(t) * np.cos(np.radians(phi)), 1.4 * np.sin(t) * np.sin(np.radians(phi)),
                          1.4 * np.cos(t)])
        xyz = np.array([a, b, c, d]) - np.array([a, b, c, d]).mean(0)
        start = len(pos)
        pos.extend(xyz @ random_rotation(rng).T + centres[m])
        names += ["C1", "C2", "C3", "C4"]
        resnames.append(species)
        resindex += [m] * 4
        bonds += [(start, start + 1), (start + 1, start + 2), (start + 2, start + 3)]
    for w in range(n, n + 3):  # three host water molecules
        start = len(pos)
        pos.extend(TIP3P_XYZ + centres[w])
        names += ["OW", "HW1", "HW2"]
        resnames.append("HST")
        resindex += [w] * 3
        bonds += [(start, start + 1), (start, start + 2)]
    n_res = n + 3
    u = mda.Universe.empty(len(pos), n_residues=n_res, atom_resindex=resindex, trajectory=True)
    u.add_TopologyAttr("names", names)
    u.add_TopologyAttr("elements", [x[0] for x in names])
    u.add_TopologyAttr("resnames", resnames)
    u.add_TopologyAttr("resids", np.arange(1, n_res + 1))
    u.add_TopologyAttr("masses", [12.0 if x[0] == "C" else (16.0 if x[0] == "O" else 1.008) for x in names])
    u.add_TopologyAttr("charges", np.zeros(len(pos)))
    u.add_TopologyAttr("bonds", bonds)
    u.load_new(np.array([pos], dtype=np.float32), format=MemoryReader,
               dimensions=np.array([[20.0, 20.0, 20.0, 90, 90, 90]], dtype=np.float32))
    return film_from_universe(u)


def test_torsion_table_reads_the_constructed_dihedrals():
    angles = [-170.0, -120.0, -75.0, -20.0, 10.0, 55.0, 100.0, 140.0, 175.0]
    film = chain_film(angles)
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(film.n_molecules)})
    got = torsion_table(film, t, {"DAX": (0, 1, 2, 3)})
    assert list(got.molecule) == list(range(9)) and set(got.species) == {"DAX"}
    # float32 coordinates of the Universe: agreement to 1e-3 degrees
    np.testing.assert_allclose(got.torsion_deg, angles, atol=1e-3)
    # reversing the chain gives the same dihedral
    np.testing.assert_allclose(torsion_table(film, t, {"DAX": (3, 2, 1, 0)}).torsion_deg, angles, atol=1e-3)
    with pytest.raises(InputError, match=r"indices must lie in 0\.\.3"):
        torsion_table(film, t, {"DAX": (0, 1, 2, 4)})
    with pytest.raises(InputError, match="four different integer"):
        torsion_table(film, t, {"DAX": (0, 1, 1, 2)})
    with pytest.raises(InputError, match="not a species"):
        torsion_table(film, t, {"XYZ": (0, 1, 2, 3)})


def test_dest_torsion_noise_free_is_all_torsion_and_plots():
    angles = np.array([-170.0, -120.0, -75.0, -20.0, 10.0, 55.0, 100.0, 140.0, 175.0])
    film = chain_film(angles)
    dest = 0.30 + 0.10 * np.cos(np.radians(2 * angles))
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(9), "S1_eV": 3.0 + dest, "T1_eV": 3.0,
                      "S1_ct_distance_A": 2.0 + np.abs(np.sin(np.radians(angles))), "T1_ct_distance_A": 1.0})
    res = dest_torsion(film, t, {"DAX": (0, 1, 2, 3)})
    fit = res.fits.set_index("species").loc["DAX"]
    assert fit["torsion_r2"] == pytest.approx(1.0, abs=1e-9)
    assert fit["torsion_fraction"] == pytest.approx(1.0, abs=1e-9)
    assert fit["var_dEST_eV2"] == pytest.approx(np.var(dest, ddof=1), rel=1e-9)
    th, y = res.curve("DAX")
    np.testing.assert_allclose(y, 0.30 + 0.10 * np.cos(np.radians(2 * th)), atol=1e-5)
    assert {"S1_ct_distance_A", "T1_ct_distance_A"} <= set(res.table.columns)
    fig = plot_torsion(res)
    assert len(fig.axes) == 2
    # each legend right of its axes, covering no point (inside, it sat on them)
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    for ax in fig.axes:
        box = ax.get_legend().get_window_extent(renderer)
        assert box.x0 >= ax.get_window_extent(renderer).x1
        assert box.x1 <= fig.bbox.x1 + 1  # and inside the figure
    back = TorsionResult.from_json(res.to_json())
    pd.testing.assert_frame_equal(back.table, res.table)
    pd.testing.assert_frame_equal(back.fits, res.fits)
    assert back.summary() == res.summary()


def test_torsion_fraction_on_synthetic_data_with_a_known_answer():
    # y = A cos 2θ + noise, θ uniform: var(signal) = A²/2, so the explained fraction is
    # (A²/2) / (A²/2 + s²) = 0.00125 / 0.00165
    rng = np.random.default_rng(21)
    th = rng.uniform(-180, 180, 4000)
    y = 0.05 * np.cos(np.radians(2 * th)) + rng.normal(0, 0.02, th.size)
    fit = periodic_fit(th, y, n_harmonics=2)
    assert fit["r2_adjusted"] == pytest.approx(0.00125 / 0.00165, abs=0.02)
    assert fit["residual_sigma"] == pytest.approx(0.02, rel=0.05)
    # pure noise: the adjusted fraction is about zero
    assert abs(periodic_fit(th, rng.normal(0, 1, th.size))["r2_adjusted"]) < 0.01
    with pytest.raises(InputError, match="at least 7 complete rows"):
        periodic_fit(th[:6], y[:6])


# -------------------------------------------------------------- state order
def _state_rows():
    rows = []

    def add(mol, kind, dists):
        for i, (emb, vac) in enumerate(dists):
            rows.append({"frame": 0, "molecule": mol, "radius_A": 10.0, "state": f"{kind[0].upper()}{i + 1}",
                         "kind": kind, "ct_distance_A": emb, "vacuum_ct_distance_A": vac})

    add(0, "singlet", [(0.4, 0.5), (4.0, 3.8)]); add(0, "triplet", [(0.3, 0.3)])          # unchanged
    add(1, "singlet", [(4.2, 0.4), (0.5, 4.0)]); add(1, "triplet", [(0.3, 0.2)])          # S1 becomes CT
    add(2, "singlet", [(0.4, 0.4), (3.0, 3.1)]); add(2, "triplet", [(3.5, 0.6), (0.2, 3.3)])  # T1 becomes CT
    add(3, "singlet", [(4.0, np.nan)]); add(3, "triplet", [(0.2, np.nan)])                # old record
    return pd.DataFrame(rows)


def test_state_order_on_a_constructed_table():
    res = state_order(_state_rows())
    s = res.sites.set_index("molecule")
    assert s.loc[1, "S1_vacuum_character"] == "local" and s.loc[1, "S1_character"] == "CT"
    assert s.loc[1, "singlet_order"] == "CT,local" and s.loc[1, "singlet_vacuum_order"] == "local,CT"
    assert s.loc[2, "T1_reordered"] and not s.loc[2, "S1_reordered"]
    assert s.loc[3, "S1_vacuum_character"] == "unknown" and not s.loc[3, "flagged"]
    assert list(res.flagged().molecule) == [1, 2]
    summ = res.summary()
    assert (summ["n_sites"], summ["n_S1_reordered"], summ["n_T1_reordered"], summ["n_flagged"]) == (4, 1, 1, 2)
    assert summ["n_S1_CT"] == 2 and summ["n_S1_vacuum_CT"] == 0
    # a threshold above every distance: nothing is CT, nothing reordered
    assert state_order(_state_rows(), threshold_A=5.0).summary()["n_flagged"] == 0
    back = StateOrderResult.from_json(res.to_json())
    pd.testing.assert_frame_equal(back.sites, res.sites)
    with pytest.raises(InputError, match="vacuum_ct_distance_A"):
        state_order(_state_rows().drop(columns="vacuum_ct_distance_A"))


def test_old_result_json_without_vacuum_ct_distance_loads():
    st = ExcitedState(label="S1", kind="singlet", energy_eV=3.0, ct_distance_A=0.2)
    r = ExcitationResult(states=[st], scf_energy_Eh=-1.0, scf_converged=True)
    d = json.loads(r.to_json())
    assert d["states"][0]["vacuum_ct_distance_A"] != d["states"][0]["vacuum_ct_distance_A"]  # NaN
    del d["states"][0]["vacuum_ct_distance_A"]
    back = ExcitationResult.from_json(json.dumps(d))
    assert np.isnan(back.states[0].vacuum_ct_distance_A)
    assert "vacuum_ct_distance_A" in back.to_frame().columns


def test_real_calculation_keeps_the_vacuum_ct_distance(tmp_path):
    water = TIP3P_XYZ - TIP3P_XYZ.mean(0)
    method = Method(xc="hf", basis="sto-3g", n_singlets=2, n_triplets=2, density_fit=False)
    vac_only = excitations(Cluster.from_arrays(["O", "H", "H"], water), method)
    for s in vac_only.states:  # no charges: the vacuum calculation is the embedded one
        assert s.vacuum_ct_distance_A == pytest.approx(s.ct_distance_A, abs=1e-12)
    emb = excitations(Cluster.from_arrays(["O", "H", "H"], water, [[0.0, 0.0, -3.0], [0.0, 3.0, 0.0]],
                                          [0.4, -0.4], frame=0, center=0), method)
    assert all(np.isfinite(s.vacuum_ct_distance_A) for s in emb.states)
    for s, v in zip(emb.states, vac_only.states):  # the vacuum values are those of the bare molecule
        assert s.vacuum_ct_distance_A == pytest.approx(v.ct_distance_A, abs=1e-6)
    summ = emb.summary()
    assert summ["S1_ct_distance_A"] == emb.s1.ct_distance_A
    assert summ["T1_vacuum_ct_distance_A"] == emb.t1.vacuum_ct_distance_A
    back = ExcitationResult.from_json(emb.to_json())
    assert back.to_json() == emb.to_json()
    res = state_order(state_table([emb]))
    assert res.summary()["n_sites"] == 1 and res.sites["S1_character"].iloc[0] in ("CT", "local")
    # the same rows come back from a result store
    path = tmp_path / "s.sqlite"
    with ResultStore(path) as st:
        k = task_key(frame=0, molecule=0, radius_A=emb.radius_A, kind="excitations")
        st.put(k, {"kind": "excitations"}, emb.to_json(),
               {"frame": 0, "molecule": 0, "radius_A": emb.radius_A, **emb.summary()})
    rows = state_table(path)
    expect = emb.to_frame()
    expect = expect[expect["kind"].isin(["singlet", "triplet"])].reset_index(drop=True)
    pd.testing.assert_frame_equal(rows, expect)
    with pytest.raises(InputError, match="needs ExcitationResult"):
        state_table([1])


# ----------------------------------------------------------- overview/report
def _doped_sites(film):
    rng = np.random.default_rng(3)
    guest = film.molecules["species"].to_numpy() == "GST"
    n = film.n_molecules
    return site_rows(film, radius_A=8.0, converged=True, T1_eV=_confinement_t1(film),
                     S1_eV=np.where(guest, 2.9, 3.3) + rng.normal(0, 0.02, n),
                     dEST_eV=np.where(guest, 0.1, 0.5) + rng.normal(0, 0.01, n),
                     IP_eV=np.where(guest, 5.6, 6.0), EA_eV=np.where(guest, 2.7, 2.5))


def test_overview_and_report_section_for_two_species(film, tmp_path):
    sites = _doped_sites(film)
    ov = host_guest_overview(film, sites, cutoff_A=4.5, states=_state_rows(), n_boot=500)
    assert ov.species.trap_depth_eV("hole") == pytest.approx(0.4, abs=1e-12)
    assert ov.confinement.fraction == 0.5 and ov.state_order.summary()["n_flagged"] == 2
    assert ov.torsion is None and ov.notes == []
    back = HostGuestOverview.from_json(ov.to_json())
    assert back.to_json() == ov.to_json() and ov.summary()["species.hole_trap_eV"] == pytest.approx(0.4)
    # the default neighbour distance is capped below half the 16 Å box
    capped = host_guest_overview(film, sites, n_boot=500)
    assert capped.confinement.cutoff_A < 8.0 and "capped" in capped.notes[0]
    rep = ReportWriter(str(tmp_path / "rep"), "t")
    out = doped_section(rep, film, SiteSample(table=sites), cutoff_A=4.5, states=_state_rows(), n_boot=500)
    assert isinstance(out, HostGuestOverview)
    text = open(rep.write(), encoding="utf-8").read()
    assert "## Host:guest film (host HST, 62 molecules; guest GST, 2 molecules)" in text
    assert "| hole | IP_host - IP_guest | 0.400 |" in text
    assert "Triplet confinement: 50.0 % of 2 guest sites" in text
    assert "S1 changes character between vacuum and embedding at 1 of 4 sites" in text


def test_report_section_with_torsion_plot(tmp_path):
    angles = np.array([-170.0, -120.0, -75.0, -20.0, 10.0, 55.0, 100.0, 140.0, 175.0])
    film = chain_film(angles)
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(12), "dEST_eV": 0.2 + 0.05 * np.cos(np.radians(2 * np.r_[
        angles, 0, 0, 0])), "IP_eV": [5.5] * 9 + [6.0] * 3})
    rep = ReportWriter(str(tmp_path / "rep"), "t")
    ov = doped_section(rep, film, t, torsion_atoms={"DAX": (0, 1, 2, 3)}, n_boot=500)
    assert ov.torsion is not None and ov.confinement is None
    assert (tmp_path / "rep" / "dest_torsion.png").exists()
    text = open(rep.write(), encoding="utf-8").read()
    assert "host DAX, 9 molecules; guest HST, 3 molecules" in text and "no T1_eV" in text


def test_nothing_new_for_a_one_species_film(tmp_path):
    u, _ = build_water_universe(lattice_centres(2, 0.0, np.random.default_rng(0)), BOX, seed=1)
    film = film_from_universe(u)
    t = site_rows(film, T1_eV=3.0, IP_eV=6.0)
    assert host_guest_overview(film, t) is None
    rep = ReportWriter(str(tmp_path / "rep"), "t")
    n_lines = len(rep.lines)
    assert doped_section(rep, film, t) is None and len(rep.lines) == n_lines


def test_per_species_sigma_and_trap_spread_follow_the_one_interval_rule(film, tmp_path):
    # the host:guest tables used bootstrap σ intervals at any n while the rest of the report used the
    # one rule (chi-square below 30 values, BCa from there: stats.disorder_stats)
    rng = np.random.default_rng(11)
    guest = film.molecules["species"].to_numpy() == "GST"
    sp = np.where(guest, "GST", "HST")
    t = site_rows(film, IP_eV=np.where(guest, 5.6, 6.0) + rng.normal(0, 0.1, film.n_molecules),
                  EA_eV=np.where(guest, 2.9, 2.5) + rng.normal(0, 0.05, film.n_molecules))
    se = species_energies(t, film=film, n_boot=500, seed=2)
    st = se.stats.set_index(["species", "quantity"])
    host_ip = t.loc[sp == "HST", "IP_eV"].to_numpy()
    ref = disorder_stats(host_ip, n_boot=500, seed=2)
    row = st.loc[("HST", "IP_eV")]
    assert row.n == 62 and row.sigma_ci_method == "bootstrap BCa"
    assert (row.sigma_lo_eV, row.sigma_hi_eV) == (ref["sigma_ci_lo"], ref["sigma_ci_hi"])
    # the spread's interval: n_guest = 2 < 30, so chi-square with Satterthwaite's degrees of freedom;
    # with equal σ that is exact: (n1 + n2 - 2) S_p² / σ² ~ chi2(n1 + n2 - 2) (checked below on equal
    # samples against scipy's chi-square quantiles)
    tr = se.traps.set_index("carrier")
    assert tr.loc["hole", "spread_ci_method"] == "chi-square"
    assert tr.loc["hole", "spread_lo_eV"] < tr.loc["hole", "spread_eV"] < tr.loc["hole", "spread_hi_eV"]
    a = rng.normal(0, 0.1, 12)
    b = a[::-1] * 1.0 + 0.3  # same variance exactly
    o = mean_offset(a, b, n_boot=500, seed=0)
    assert o["spread_dof"] == pytest.approx(22.0)
    s2 = np.var(a, ddof=1) + np.var(b, ddof=1)
    lo = np.sqrt(22 * s2 / sps.chi2.ppf(0.975, 22))
    hi = np.sqrt(22 * s2 / sps.chi2.ppf(0.025, 22))
    assert (o["spread_ci_lo"], o["spread_ci_hi"]) == (pytest.approx(lo, rel=1e-12), pytest.approx(hi, rel=1e-12))
    # from 30 values in the smaller sample on: the stratified bootstrap of the spread
    big = mean_offset(rng.normal(0, 0.1, 40), rng.normal(0, 0.2, 35), n_boot=500, seed=0)
    assert big["spread_ci_method"] == "bootstrap percentile"
    assert big["spread_ci_lo"] < big["spread"] < big["spread_ci_hi"]


def test_report_shows_the_per_species_table_once(film, tmp_path):
    from clusterlab.report import sample_section

    sites = _doped_sites(film)
    rep = ReportWriter(str(tmp_path / "rep"), "t")
    sample = SiteSample(table=sites)
    sample_section(rep, sample, ["S1_eV"], n_boot=200, correlation=False)
    doped_section(rep, film, sample, cutoff_A=4.5, n_boot=200)
    text = "\n".join(rep.lines)
    header = "| species | quantity | n | mean (eV) | σ (meV) | σ 95 % low (meV) | σ 95 % high (meV) | σ interval |"
    assert text.count(header) == 1 and text.count("| HST | S1 |") == 1  # the quantity by name, not column
    assert "the table of the site-energy sample section above (shown once)" in text
    assert "σ by the one rule of the report (chi-square below 30 sites" in text
    # the numbers of that one table are the host:guest function's (same sites, seed and rule)
    se = species_energies(sites, film=film, n_boot=200, seed=0)
    hst = se.stats.set_index(["species", "quantity"]).loc[("HST", "S1_eV")]
    assert (f"| HST | S1 | 62 | {hst.mean_eV:.3f} | {1e3 * hst.sigma_eV:.1f} | {1e3 * hst.sigma_lo_eV:.1f} | "
            f"{1e3 * hst.sigma_hi_eV:.1f} | bootstrap BCa |") in text
    # the host:guest section alone (no sample section before it) shows the table itself
    alone = ReportWriter(str(tmp_path / "alone"), "t")
    doped_section(alone, film, sample, cutoff_A=4.5, n_boot=200)
    assert "\n".join(alone.lines).count(header) == 1
