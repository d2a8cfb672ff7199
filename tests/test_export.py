"""Transport export: site and pair tables, couplings, rates, files.

Outside checks: a brute-force periodic pair search over images -1..1 written
here; the multipole expansion of the Coulomb coupling (exact); detailed
balance of the rates (physical law) with constants from scipy.constants;
the files read back by pyarrow and pandas directly; a random walk on a cubic
lattice (D = k a^2, textbook).
"""

from __future__ import annotations

import dataclasses

import json
import math

import MDAnalysis as mda
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import scipy.constants as sc
from MDAnalysis.coordinates.memory import MemoryReader
from MDAnalysis.lib.mdamath import triclinic_vectors

from clusterlab import film_from_universe
from clusterlab.electrostatics.chargeset import StateChargeSet
from clusterlab.errors import InputError
from clusterlab.geometry import unwrap_over_frames
from clusterlab.study.filmmodel import film_site_energies
from clusterlab.transport import point_dipole_coupling, run_kmc
from clusterlab.export import (
    NO_SOURCE,
    column_info,
    export_study,
    film_model_input,
    graph_from_export,
    hopping_rates,
    pair_table,
    read_export,
    site_table,
    unwrapped_centroids,
    write_export,
)

from conftest import TIP3P_Q, build_water_universe, lattice_centres

KB_EV = sc.k / sc.e  # Boltzmann constant in eV/K (CODATA via scipy)


def _universe(frames_xyz: list[np.ndarray], box, *, atoms_per_mol: int, elements: list[str],
              charges=None, resname="MOL") -> mda.Universe:
    """A Universe of identical small molecules, one residue each, given per-frame positions."""
    n_atoms = frames_xyz[0].shape[0]
    n_mol = n_atoms // atoms_per_mol
    u = mda.Universe.empty(n_atoms, n_residues=n_mol,
                           atom_resindex=np.repeat(np.arange(n_mol), atoms_per_mol), trajectory=True)
    u.add_TopologyAttr("names", [f"A{k}" for k in range(atoms_per_mol)] * n_mol)
    u.add_TopologyAttr("elements", elements * n_mol)
    u.add_TopologyAttr("resnames", [resname] * n_mol)
    u.add_TopologyAttr("resids", np.arange(1, n_mol + 1))
    if charges is not None:
        u.add_TopologyAttr("charges", np.tile(charges, n_mol))
    dims = None if box is None else np.tile(np.asarray(box, dtype=np.float32), (len(frames_xyz), 1))
    u.load_new(np.array(frames_xyz, dtype=np.float32), format=MemoryReader, dimensions=dims)
    return u


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def water_film():
    """27 TIP3P-like waters on a jittered 3x3x3 lattice, 2 frames, 9.3 Å cubic box."""
    rng = np.random.default_rng(7)
    box = np.array([9.3, 9.3, 9.3, 90, 90, 90])
    u, _ = build_water_universe(lattice_centres(3, 0.15, rng), box, seed=3, n_frames=2)
    return film_from_universe(u, name="water27")


@pytest.fixture(scope="module")
def charge_set():
    # made-up state and transition charges for the water-like test molecule; the ion
    # differences carry only 1/4 e so that ion site energies stay within ~1 eV and
    # Marcus rates do not underflow in the detailed-balance check
    q0 = TIP3P_Q
    return StateChargeSet.from_arrays(
        {"WAT": {"S0": q0, "S1": q0 + [0.10, -0.05, -0.05], "T1": q0 + [0.05, -0.025, -0.025],
                 "cation": q0 + [0.1, 0.075, 0.075], "anion": q0 + [-0.125, -0.0625, -0.0625]}},
        transition={"WAT": [0.0, 0.12, -0.12]}, method="made-up")


@pytest.fixture(scope="module")
def model_table(water_film, charge_set):
    return film_site_energies(water_film, charge_set, radius_A=6.0, progress=False)


def _qm_sample(frames=(0,), molecules=(0, 1, 2), radius=8.0, converged=True):
    rows = []
    for f in frames:
        for m in molecules:
            rows.append({"frame": f, "molecule": m, "radius_A": radius, "resname": "WAT",
                         "S1_eV": 7.0 + 0.01 * m, "S1_vacuum_eV": 7.2, "S1_shift_eV": -0.2 + 0.01 * m,
                         "T1_eV": 6.5, "T1_vacuum_eV": 6.6, "T1_shift_eV": -0.1, "S1_osc": 0.05,
                         "converged": converged, "method_key": "ab" * 32})
    return pd.DataFrame(rows)


VACUUM = {"WAT": {"S1": 7.25, "T1": 6.65, "IP": 12.0, "EA": -1.0}}


# ---------------------------------------------------------------- site table
def test_site_table_keeps_qm_and_model_and_names_sources(water_film, model_table):
    qm = pd.concat([_qm_sample(radius=6.0), _qm_sample(radius=8.0)], ignore_index=True)
    t = site_table(water_film, qm=qm, model=model_table, vacuum_eV=VACUUM)
    assert len(t) == 2 * 27 and list(t[["frame", "molecule"]].iloc[0]) == [0, 0]
    assert (t.species == "WAT").all()
    q = t[(t.frame == 0) & (t.molecule.isin([0, 1, 2]))]
    m = t[~t.index.isin(q.index)]
    # QM chosen where present, at the largest radius, with both values kept
    assert (q.qm_radius_A == 8.0).all()
    assert np.allclose(q.S1_eV, q.S1_qm_eV) and q.S1_shift_model_eV.notna().all()
    assert (q.source_S1 == "qm:R=8A:" + "ab" * 5).all()
    assert not q.extrapolated_S1.any() and not q.unconverged.any()
    assert q.extrapolated.all()  # ...but their IP/EA come from the model
    # model elsewhere: vacuum + shift (the model's definition of an absolute energy)
    assert np.allclose(m.S1_eV, 7.25 + m.S1_shift_model_eV)
    assert np.allclose(m.IP_eV, 12.0 + m.IP_shift_model_eV)
    assert m.extrapolated_S1.all() and (m.source_S1 == "electrostatic-model:R=6A:charges").all()
    # QM has no ions, so IP comes from the model everywhere
    assert (t.source_IP == "electrostatic-model:R=6A:charges").all() and t.extrapolated_IP.all()
    # model shifts equal the model table row by row
    merged = t.merge(model_table.table, on=["frame", "molecule"])
    assert np.allclose(merged.S1_shift_model_eV, merged.S1_shift_eV_y)
    assert np.allclose(t.dEST_eV, t.S1_eV - t.T1_eV)


def test_site_table_flags_unconverged_and_unconverged_radius(water_film):
    qm = _qm_sample(radius=8.0, converged=False)
    t = site_table(water_film, qm=qm, verdict={"converged": True, "radius_A": 10.0})
    q = t[(t.frame == 0) & t.molecule.isin([0, 1, 2])]
    assert q.unconverged.all() and q.extrapolated.all()  # 8 Å < converged radius 10 Å
    assert q.unconverged_T1.all() and q.extrapolated_S1.all()
    rest = t.drop(q.index)
    assert (rest.source_S1 == NO_SOURCE).all() and rest.S1_eV.isna().all()
    assert not rest.unconverged.any() and not rest.extrapolated.any()
    ok = site_table(water_film, qm=_qm_sample(radius=12.0), verdict={"converged": True, "radius_A": 10.0})
    assert not ok.extrapolated.any()
    with pytest.raises(InputError, match="no rows at radius"):
        site_table(water_film, qm=qm, qm_radius_A=5.0)


def _drift_film(box):
    """3 frames; molecule 0 drifts by +3 Å along a per frame and crosses the a face."""
    h = triclinic_vectors(np.asarray(box, dtype=np.float64)).astype(float)
    shape = np.array([[0.0, 0, 0], [0.9572, 0, 0], [-0.24, 0.927, 0]])
    starts = np.array([[0.75, 0.5, 0.5], [0.25, 0.5, 0.5]]) @ h
    step = 3.0 * h[0] / np.linalg.norm(h[0])
    frames, truth = [], []
    for f in range(3):
        c = starts.copy()
        c[0] += f * step
        pos = np.vstack([ci + shape - shape.mean(0) for ci in c])
        truth.append(c)
        frac = pos @ np.linalg.inv(h)
        frames.append((frac - np.floor(frac)) @ h)  # atoms wrapped as an MD code writes them
    u = _universe(frames, box, atoms_per_mol=3, elements=["O", "H", "H"], charges=TIP3P_Q)
    u.add_TopologyAttr("bonds", [(0, 1), (0, 2), (3, 4), (3, 5)])
    return film_from_universe(u, name="drift"), np.array(truth), h


@pytest.mark.parametrize("box", [[10.0, 10.0, 10.0, 90, 90, 90], [10.0, 11.0, 12.0, 70, 80, 100]])
def test_unwrapped_centroids_are_continuous_across_the_boundary(box):
    film, truth, h = _drift_film(box)
    u = unwrapped_centroids(film, 2)
    # the true path minus the unwrapped path is one constant lattice vector per molecule
    off = truth - u
    assert np.allclose(off, off[0], atol=1e-4)
    n = off[0] @ np.linalg.inv(h)
    assert np.allclose(n, np.round(n), atol=1e-5)
    assert np.allclose(np.diff(u[:, 0], axis=0), truth[1:, 0] - truth[:-1, 0], atol=1e-4)
    t = site_table(film)
    wrapped = t[["x_A", "y_A", "z_A"]].to_numpy().reshape(3, 2, 3)
    frac = wrapped @ np.linalg.inv(h)
    assert np.all((frac >= -1e-9) & (frac < 1 + 1e-9))  # wrapped into the primary cell
    assert np.ptp(frac[:, 0, 0]) > 0.5  # ...so the wrapped x jumps, the unwrapped does not
    unw = t[["x_unwrapped_A", "y_unwrapped_A", "z_unwrapped_A"]].to_numpy().reshape(3, 2, 3)
    assert np.allclose(unw, u)


def test_unwrap_over_frames_follows_a_random_walk_through_the_faces():
    # truth: a random walk with steps well below half the box; the input is the
    # walk wrapped into the cell; the kernel gives back the walk exactly
    rng = np.random.default_rng(2)
    box = [8.0, 9.0, 10.0, 90, 90, 90]
    walk = np.cumsum(rng.normal(scale=1.0, size=(40, 5, 3)), axis=0) + 4.0
    wrapped = walk % np.array(box[:3])
    u = unwrap_over_frames(wrapped, [box] * 40)
    assert np.allclose(u, walk - (walk[0] - wrapped[0]), atol=1e-9)
    assert np.ptp(walk[:, :, 0]) > 8.0  # the walk really crosses the faces
    # a frame without a box starts again from its own points
    again = unwrap_over_frames(wrapped, [box] * 20 + [None] + [box] * 19)
    assert np.allclose(again[20], wrapped[20]) and np.allclose(again[:20], u[:20])
    assert np.allclose(unwrap_over_frames(wrapped, [None] * 40), wrapped)
    with pytest.raises(InputError, match="one box"):
        unwrap_over_frames(wrapped, [box])
    with pytest.raises(InputError, match="shape"):
        unwrap_over_frames(wrapped[0], [box])


# ---------------------------------------------------------------- pair table
def _brute_pairs(c: np.ndarray, h: np.ndarray, cutoff: float) -> dict[tuple[int, int], np.ndarray]:
    """Every i<j whose nearest image (searched over -1..1 translations) is within the cutoff."""
    shifts = np.array([[a, b, d] for a in (-1, 0, 1) for b in (-1, 0, 1) for d in (-1, 0, 1)]) @ h
    out = {}
    for i in range(len(c)):
        for j in range(i + 1, len(c)):
            v = c[j] - c[i] + shifts
            k = np.argmin(np.linalg.norm(v, axis=1))
            if np.linalg.norm(v[k]) <= cutoff:
                out[(i, j)] = v[k]
    return out


@pytest.mark.parametrize("box", [[9.3, 9.3, 9.3, 90, 90, 90], [10.0, 10.5, 11.0, 75, 85, 100]])
def test_pair_table_matches_brute_force_periodic_search(box):
    rng = np.random.default_rng(11)
    u, _ = build_water_universe(lattice_centres(3, 0.2, rng), np.array(box), seed=5)
    film = film_from_universe(u)
    geo = film.frame_geometry(0)
    h = triclinic_vectors(np.asarray(box, dtype=np.float64)).astype(float)
    cutoff = 4.4
    t = pair_table(film, 0, cutoff)
    ref = _brute_pairs(geo.centroids_A, h, cutoff)
    assert set(zip(t.i, t.j)) == set(ref) and len(t) == len(ref) and (t.i < t.j).all()
    for row in t.itertuples():
        assert np.allclose([row.dx_A, row.dy_A, row.dz_A], ref[(row.i, row.j)], atol=1e-6)
        assert row.distance_A == pytest.approx(np.linalg.norm(ref[(row.i, row.j)]), abs=1e-6)
    # closest-atom criterion against the same brute force on atoms
    ta = pair_table(film, 0, 2.5, criterion="atom")
    shifts = np.array([[a, b, d] for a in (-1, 0, 1) for b in (-1, 0, 1) for d in (-1, 0, 1)]) @ h
    pos = geo.positions_A
    want = {}
    for i in range(27):
        for j in range(i + 1, 27):
            pi, pj = pos[3 * i:3 * i + 3], pos[3 * j:3 * j + 3]
            dmin = np.min(np.linalg.norm(pj[None, :, None] - pi[:, None, None] + shifts[None, None], axis=-1))
            if dmin <= 2.5:
                want[(i, j)] = dmin
    assert set(zip(ta.i, ta.j)) == set(want)
    assert np.allclose(ta.min_atom_distance_A, [want[(a, b)] for a, b in zip(ta.i, ta.j)], atol=1e-5)


def test_point_dipole_column_uses_sum_q_r_of_each_copy(water_film, charge_set):
    t = pair_table(water_film, 1, 4.6, transition_charges=charge_set, refractive_index=1.4)
    geo = water_film.frame_geometry(1)
    q = np.asarray(charge_set.transition_e["WAT"])
    mu = np.array([(q[:, None] * (geo.positions_A[3 * m:3 * m + 3] - geo.centroids_A[m])).sum(0)
                   for m in range(27)]) * (sc.e * 1e-10 / (1e-21 / sc.c))  # e Å -> Debye (1 D = 1e-21/c C m)
    ref = point_dipole_coupling(mu[t.i], mu[t.j], t[["dx_A", "dy_A", "dz_A"]].to_numpy(), n=1.4)
    assert np.allclose(t.V_dipole_eV, ref, rtol=1e-9, atol=1e-15)
    assert np.allclose(t[["mu_i_x_D", "mu_i_y_D", "mu_i_z_D"]].to_numpy(), mu[t.i])
    # transition-charge coupling of one pair by a direct Coulomb sum over j's copy
    # (Coulomb constant from scipy.constants)
    k_e = sc.e / (4 * np.pi * sc.epsilon_0) * 1e10
    r = t.iloc[0]
    pa = geo.positions_A[3 * r.i:3 * r.i + 3]
    pb = geo.positions_A[3 * r.j:3 * r.j + 3] + (geo.centroids_A[r.i] + [r.dx_A, r.dy_A, r.dz_A]
                                                 - geo.centroids_A[r.j])
    v = k_e * sum(q[a] * q[b] / np.linalg.norm(pa[a] - pb[b]) for a in range(3) for b in range(3)) / 1.4**2
    assert r.V_charges_eV == pytest.approx(v, rel=1e-10)


def test_transition_charge_coupling_tends_to_point_dipole_as_R_minus_2():
    # Exact multipole result: for a centrosymmetric +-q pair (zero quadrupole
    # about the centroid) the Coulomb coupling is V_dd [1 + O((a/R)^2)], so the
    # relative error falls by 4 when R doubles.
    a = 0.7
    e1 = np.array([1.0, 0.3, -0.2]) / np.linalg.norm([1.0, 0.3, -0.2])
    e2 = np.array([0.2, 1.0, 0.5]) / np.linalg.norm([0.2, 1.0, 0.5])
    dirn = np.array([0.3, 0.4, 1.0]) / np.linalg.norm([0.3, 0.4, 1.0])
    radii = [8.0, 16.0, 32.0]
    frames = []
    for R in radii:
        c2 = 100.0 + R * dirn
        frames.append(np.array([[100, 100, 100] + a * e1, [100, 100, 100] - a * e1, c2 + a * e2, c2 - a * e2]))
    u = _universe(frames, [250.0, 250.0, 250.0, 90, 90, 90], atoms_per_mol=2, elements=["H", "H"])
    film = film_from_universe(u, name="dipolar pair")
    err = []
    for f, R in enumerate(radii):
        t = pair_table(film, f, 40.0, transition_charges={"MOL": [0.3, -0.3]})
        assert len(t) == 1 and t.distance_A.iloc[0] == pytest.approx(R, abs=1e-4)
        err.append(abs(t.V_charges_eV.iloc[0] / t.V_dipole_eV.iloc[0] - 1))
    assert err[2] < 1e-2
    assert err[0] / err[1] == pytest.approx(4.0, rel=0.1)
    assert err[1] / err[2] == pytest.approx(4.0, rel=0.05)


def test_pair_table_joins_transfer_integrals_in_either_order(water_film):
    t = pair_table(water_film, 0, 4.5)
    a, b = int(t.i.iloc[0]), int(t.j.iloc[0])
    tr = pd.DataFrame({"i": [b], "j": [a], "J_hole_eV": [0.05], "J_electron_eV": [-0.02], "converged": [True]})
    tj = pair_table(water_film, 0, 4.5, transfer=tr)
    assert tj.J_hole_eV.iloc[0] == 0.05 and tj.transfer_converged.iloc[0]
    assert tj.J_hole_eV.iloc[1:].isna().all() and not tj.transfer_converged.iloc[1:].any()


# ---------------------------------------------------------------- rates
def test_rates_obey_detailed_balance_on_exported_table(water_film, model_table, charge_set, tmp_path):
    sites = site_table(water_film, model=model_table, vacuum_eV=VACUUM)
    pairs = pd.concat([pair_table(water_film, f, 4.5, transition_charges=charge_set) for f in (0, 1)],
                      ignore_index=True)
    T = 250.0
    r = hopping_rates(sites, pairs, law="marcus", carrier="exciton", T_K=T, lambda_eV=0.3, label="S1")
    r = hopping_rates(sites, r, law="miller-abrahams", carrier="hole", T_K=T, nu0_per_s=1e12,
                      gamma_per_A=0.5, label="hole")
    r = hopping_rates(sites, r, law="marcus", carrier="electron", T_K=T, lambda_eV=0.2,
                      J_column="V_dipole_eV", label="e")
    paths = write_export(tmp_path, sites, r)
    back = pq.read_table(paths["pairs_parquet"]).to_pandas()
    s = pq.read_table(paths["sites_parquet"]).to_pandas().set_index(["frame", "molecule"])
    for lab, col, sign in (("S1", "S1_eV", 1), ("hole", "IP_eV", 1), ("e", "EA_eV", -1)):
        Ei = sign * s.loc[list(zip(back.frame, back.i)), col].to_numpy()
        Ej = sign * s.loc[list(zip(back.frame, back.j)), col].to_numpy()
        dE = Ej - Ei
        assert np.allclose(back[f"{lab}_dE_eV"], dE, atol=1e-12)
        ratio = back[f"{lab}_rate_ij_per_s"] / back[f"{lab}_rate_ji_per_s"]
        # physical law: k_ij / k_ji = exp(-dE / kB T)
        assert np.allclose(ratio, np.exp(-dE / (KB_EV * T)), rtol=1e-9)
        assert np.ptp(dE) > 1e-3  # the model gives real disorder, so the check bites
    # one Marcus rate written out with scipy constants (Marcus, Rev. Mod. Phys. 65, 599 (1993))
    row = back.iloc[0]
    J, lam, kT = row.V_charges_eV, 0.3, KB_EV * T
    k = 2 * np.pi / (sc.hbar / sc.e) * J**2 / np.sqrt(4 * np.pi * lam * kT) * np.exp(
        -(row.S1_dE_eV + lam) ** 2 / (4 * lam * kT))
    assert row.S1_rate_ij_per_s == pytest.approx(k, rel=1e-9)
    meta = json.loads(open(paths["sidecar"]).read())
    assert set(meta["rates"]) == {"S1", "hole", "e"}
    assert "Marcus" in meta["rates"]["S1"]["formula"] and meta["rates"]["hole"]["nu0_per_s"] == 1e12
    with pytest.raises(InputError, match="needs lambda_eV"):
        hopping_rates(sites, pairs, law="marcus", carrier="exciton")


# ---------------------------------------------------------------- files
def test_files_round_trip_through_pyarrow_and_pandas(water_film, model_table, charge_set, tmp_path):
    sites = site_table(water_film, qm=_qm_sample(), model=model_table, vacuum_eV=charge_set)
    pairs = pair_table(water_film, 0, 4.5, transition_charges=charge_set)
    paths = write_export(tmp_path / "out", sites, pairs, metadata={"user": {"project": "made-up film"}})
    assert sorted(paths) == ["pairs_csv", "pairs_parquet", "sidecar", "sites_csv", "sites_parquet"]
    for name, df in (("sites", sites), ("pairs", pairs)):
        pa_back = pq.read_table(paths[f"{name}_parquet"]).to_pandas()
        pd.testing.assert_frame_equal(pa_back, df.reset_index(drop=True), check_dtype=False)
        csv_back = pd.read_csv(paths[f"{name}_csv"])
        pd.testing.assert_frame_equal(csv_back, df.reset_index(drop=True), check_dtype=False,
                                      check_exact=False, rtol=1e-12)
    meta = json.loads(open(paths["sidecar"], encoding="utf-8").read())
    for key in ("format", "format_version", "columns", "software", "sign_conventions", "limitations"):
        assert key in meta
    assert set(meta["columns"]["sites"]) == set(sites.columns)
    assert set(meta["columns"]["pairs"]) == set(pairs.columns)
    assert meta["columns"]["pairs"]["V_charges_eV"]["unit"] == "eV"
    assert meta["columns"]["sites"]["x_unwrapped_A"]["unit"] == "Å"
    assert all(v["meaning"] != "(not documented)" for v in meta["columns"]["sites"].values())
    assert all(v["meaning"] != "(not documented)" for v in meta["columns"]["pairs"].values())
    assert {"clusterlab", "pyscf", "numpy", "MDAnalysis", "pandas", "pyarrow"} <= set(meta["software"])
    back = read_export(tmp_path / "out")
    pd.testing.assert_frame_equal(back.sites, sites, check_dtype=False)
    back_csv = read_export(tmp_path / "out", prefer="csv")
    pd.testing.assert_frame_equal(back_csv.pairs, pairs, check_dtype=False, check_exact=False, rtol=1e-12)
    assert back.metadata["user"] == {"project": "made-up film"}
    assert column_info("S1_eV")[0] == "eV" and column_info("rate_ij_per_s")[0] == "s^-1"
    with pytest.raises(InputError, match="not a clusterlab export"):
        read_export(tmp_path)


def test_export_study_writes_provenance(water_film, model_table, charge_set, tmp_path):
    paths = export_study(water_film, tmp_path, sample=_qm_sample(), model=model_table, cutoff_A=4.5,
                         transition_charges=charge_set, vacuum_eV=VACUUM,
                         rates={"law": "marcus", "carrier": "exciton", "lambda_eV": 0.3})
    meta = read_export(tmp_path).metadata
    assert meta["film"]["frames"] == [0, 1] and meta["film"]["film_id"] == water_film.film_id
    assert meta["film"]["box_per_frame"]["1"] == pytest.approx([9.3, 9.3, 9.3, 90, 90, 90], abs=1e-4)
    assert meta["radius_A"] == {"qm": [8.0], "model": 6.0}
    assert meta["method"]["key"] == "ab" * 32
    assert meta["pairs"]["cutoff_A"] == 4.5 and "default" in meta["rates"]
    pairs = pd.read_parquet(paths["pairs_parquet"])
    assert sorted(pairs.frame.unique()) == [0, 1] and pairs.rate_ij_per_s.notna().all()


# ---------------------------------------------------------------- end to end
def test_kmc_on_exported_lattice_gives_k_a2(tmp_path):
    # Textbook random walk: on a simple cubic lattice with rate k to each of the
    # 6 neighbours, D = <r^2>/(6t) = k a^2 exactly.
    n, a = 5, 6.0
    box = np.array([n * a] * 3 + [90.0] * 3)
    u, _ = build_water_universe(lattice_centres(n, 0.0, np.random.default_rng(0)), box, seed=1)
    film = film_from_universe(u)
    sites = site_table(film)
    sites["S1_eV"] = 2.5  # equal site energies
    pairs = pair_table(film, 0, 1.2 * a)
    assert len(pairs) == 3 * n**3 and np.allclose(pairs.distance_A, a, atol=1e-4)
    k = 1e12
    pairs = hopping_rates(sites, pairs, law="miller-abrahams", carrier="exciton", T_K=300.0,
                          nu0_per_s=k, gamma_per_A=0.0)
    write_export(tmp_path, sites, pairs)
    back = pd.read_parquet(tmp_path / "pairs.parquet")
    g = graph_from_export(back, film.n_molecules)
    res = run_kmc(g, n_walkers=3000, t_max_s=60e-12, seed=4)
    D, err = res.diffusion_coefficient(skip_fraction=0.0)
    D_ref = k * (a * 1e-8) ** 2  # cm^2/s
    assert err < 0.05 * D_ref
    assert abs(D - D_ref) < 4 * err
    assert math.isfinite(D)


def test_export_study_takes_transition_charges_from_the_model(water_film, model_table, charge_set, tmp_path):
    assert model_table.charges is charge_set
    paths = export_study(water_film, tmp_path, model=model_table, cutoff_A=4.5)
    pairs = pd.read_parquet(paths["pairs_parquet"])
    ref = pair_table(water_film, 0, 4.5, transition_charges=charge_set)
    assert np.allclose(pairs[pairs.frame == 0].V_charges_eV, ref.V_charges_eV)


# ---------------------------------------------------------------- film model input
def test_film_model_input_reads_the_film_model_result(water_film, model_table, charge_set):
    got = film_model_input(model_table)
    assert got.table is model_table.table and got.radius_A == 6.0 and got.label == "charges"
    assert got.charges is charge_set and got.details["charges_method"] == charge_set.method
    assert got.details["rule"] == model_table.options["rule"] == "atom"
    assert got.details["environment"] == model_table.options["environment"]
    a = site_table(water_film, model=model_table, vacuum_eV=VACUUM)
    assert a.attrs["sources"][0]["label"] == "electrostatic-model:R=6A:charges"


def test_film_model_input_rejects_bare_tables_and_other_types(water_film, model_table):
    with pytest.raises(InputError, match="bare table carries neither.*got DataFrame"):
        film_model_input(model_table.to_frame())
    with pytest.raises(InputError, match="got dict"):
        film_model_input({"radius_A": 6.0})
    with pytest.raises(InputError, match="got list"):
        site_table(water_film, model=[1, 2])
    with pytest.raises(InputError, match="lacks the column"):
        film_model_input(dataclasses.replace(model_table, table=pd.DataFrame({"frame": [0]})))


# ---------------------------------------------------------------- export_study round trip
def test_export_study_reads_back_as_written(water_film, model_table, charge_set, tmp_path):
    # what export_study writes, read back with read_export, equals the tables built
    # piece by piece with the same settings (Parquet exactly, CSV to round-trip precision)
    rates = [{"law": "marcus", "carrier": "exciton", "lambda_eV": 0.3, "label": "S1"},
             {"law": "miller-abrahams", "carrier": "hole", "nu0_per_s": 1e12, "gamma_per_A": 0.5, "label": "h"}]
    export_study(water_film, tmp_path, sample=_qm_sample(), model=model_table, cutoff_A=4.5,
                 transition_charges=charge_set, vacuum_eV=VACUUM, rates=rates, metadata={"note": "made-up"})
    sites = site_table(water_film, qm=_qm_sample(), model=model_table, vacuum_eV=VACUUM)
    pairs = pd.concat([pair_table(water_film, f, 4.5, transition_charges=charge_set) for f in (0, 1)],
                      ignore_index=True)
    for kw in rates:
        pairs = hopping_rates(sites, pairs, **kw)
    back = read_export(tmp_path)
    pd.testing.assert_frame_equal(back.sites, sites)
    pd.testing.assert_frame_equal(back.pairs, pairs)
    csv = read_export(tmp_path, prefer="csv")
    pd.testing.assert_frame_equal(csv.sites, sites, check_dtype=False, check_exact=False, rtol=1e-12)
    pd.testing.assert_frame_equal(csv.pairs, pairs, check_dtype=False, check_exact=False, rtol=1e-12)
    assert set(back.metadata["rates"]) == {"S1", "h"} and back.metadata["user"] == {"note": "made-up"}
    assert [m["kind"] for m in back.metadata["models"]] == ["qm", "electrostatic-model"]
    model_entry = back.metadata["models"][1]
    assert model_entry["radius_A"] == 6.0 and model_entry["rule"] == model_table.options["rule"]


# ---------------------------------------------------------------- polarizable QM
def test_polarizable_store_exports_polarization_columns_and_both_radii(water_film, tmp_path):
    """A store of polarizable results (HF/STO-3G waters, the smallest set the polarizable tests use)
    exports, per site, the polarization contributions the store holds, and names the embedding
    kind with both radii in the source tags and the sidecar; a fixed-charge export has none of it."""
    from clusterlab import Method, ResultStore
    from clusterlab.study.sample import SiteSample
    from clusterlab.study.tasks import cluster_task, run_cluster_tasks

    m = Method(xc="hf", basis="sto-3g", n_singlets=1, n_triplets=1, charged_states=True,
               charge_smearing_A=0.0, environment="polarizable")
    st = ResultStore(tmp_path / "pol.sqlite")
    tasks = [cluster_task(water_film, mol, 4.5, m, polarizable_radius_A=3.0) for mol in (0, 1)]
    run_cluster_tasks(tasks, st, desc="pol", runner="serial", progress=False)
    stored = st.to_frame().set_index("molecule").sort_index()
    assert (stored.status == "done").all() and list(stored.index) == [0, 1]
    sample = SiteSample.from_store(st, film=water_film)
    export_study(water_film, tmp_path / "out", sample=sample, cutoff_A=4.5)
    back = read_export(tmp_path / "out")
    s = back.sites[back.sites.frame == 0].set_index("molecule")
    for q in ("S1", "T1", "IP", "EA"):
        got = s.loc[[0, 1], f"{q}_polarization_qm_eV"].to_numpy()
        assert np.array_equal(got, stored[f"{q}_polarization_eV"].to_numpy())  # the stored numbers, unchanged
        assert np.isfinite(got).all() and s.drop([0, 1])[f"{q}_polarization_qm_eV"].isna().all()
        assert back.metadata["columns"]["sites"][f"{q}_polarization_qm_eV"]["unit"] == "eV"
    assert (stored.IP_polarization_eV < 0).all() and (stored.EA_polarization_eV > 0).all()
    assert list(s.loc[[0, 1], "qm_polarizable_radius_A"]) == [3.0, 3.0]
    tag = "qm:R=4.5A:polarizable=3A:" + m.key()[:10]
    assert (s.loc[[0, 1], "source_S1"] == tag).all() and (s.loc[[0, 1], "source_EA"] == tag).all()
    assert back.metadata["radius_A"] == {"qm": [4.5], "qm_polarizable": [3.0]}
    assert back.metadata["models"] == [{"label": tag, "kind": "qm", "environment": "polarizable",
                                        "radius_A": 4.5, "polarizable_radius_A": 3.0}]
    assert back.metadata["method"]["dict"]["environment"] == "polarizable"
    assert column_info("IP_polarization_qm_eV")[1].startswith("polarization contribution to IP_qm_eV")
    assert back.metadata["columns"]["sites"]["qm_polarizable_radius_A"]["unit"] == "Å"
    # the verdict of a polarizable scan judges the inner radius too: 3 Å is below an inner verdict of 4 Å
    outer_ok = {"converged": True, "radius_A": 4.5}
    assert not site_table(water_film, qm=sample, verdict=outer_ok).extrapolated_S1.any()
    both = site_table(water_film, qm=sample,
                      verdict={**outer_ok, "polarizable_converged": True, "polarizable_radius_A": 4.0})
    on_qm = both.source_S1 == tag
    assert both[on_qm].extrapolated_S1.all() and not both[~on_qm].extrapolated_S1.any()
    assert both.attrs["verdict"] == {**outer_ok, "polarizable_converged": True, "polarizable_radius_A": 4.0}
    inner_ok = site_table(water_film, qm=sample,
                          verdict={**outer_ok, "polarizable_converged": True, "polarizable_radius_A": 3.0})
    assert not inner_ok.extrapolated_S1.any()
    # fixed-charge QM exports as before: no polarization columns, no inner radius, plain tags
    fixed = site_table(water_film, qm=_qm_sample())
    assert not [c for c in fixed.columns if "polariz" in c]
    assert fixed.attrs["sources"] == [{"label": "qm:R=8A:" + "ab" * 5, "kind": "qm"}]
