"""Densities carried between copies of a molecule (clusterlab.qm.guess).

Outside checks: rotational invariance of the SCF (the converged density of a
rotated molecule is the rotated density, a law of the theory), and the
Kabsch superposition against scipy's independent
``scipy.spatial.transform.Rotation.align_vectors`` (Virtanen et al., Nature
Methods 17, 261 (2020)).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from clusterlab.errors import InputError
from clusterlab.qm.calc import build_molecule, guess_cycles, make_scf, run_scf
from clusterlab.qm.guess import aligned_density, kabsch_rotation
from clusterlab.qm.method import Method

SYM = ["C", "O", "H", "H"]
XYZ = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.21], [0.0, 0.94, -0.59], [0.0, -0.94, -0.59]])


def test_kabsch_matches_scipy_and_recovers_a_rotation():
    rng = np.random.default_rng(2)
    p = rng.standard_normal((7, 3))
    r_true = Rotation.random(random_state=4).as_matrix()
    q = p @ r_true.T + np.array([1.0, -2.0, 0.5])
    r, rmsd = kabsch_rotation(p, q)
    assert np.allclose(r, r_true, atol=1e-10) and rmsd < 1e-10
    noisy = q + 0.05 * rng.standard_normal(q.shape)
    r2, rmsd2 = kabsch_rotation(p, noisy)
    ref, _ = Rotation.align_vectors(noisy - noisy.mean(0), p - p.mean(0))
    assert np.allclose(r2, ref.as_matrix(), atol=1e-8) and 0.01 < rmsd2 < 0.1
    assert np.linalg.det(r2) == pytest.approx(1.0)
    with pytest.raises(InputError, match="matched"):
        kabsch_rotation(p[:2], q[:2])


@pytest.mark.parametrize("basis", ["6-31g", "def2-svp"])  # s/p only, and with d shells
def test_rotated_density_is_the_converged_density_of_the_rotated_copy(basis):
    m = Method(xc="b3lyp", basis=basis, grid_level=2, conv_tol=1e-10, charge_smearing_A=0.0)
    mf0 = make_scf(build_molecule(SYM, XYZ, m), m)
    assert run_scf(mf0, m)[0]
    r = Rotation.random(random_state=11).as_matrix()
    xyz = XYZ @ r.T + np.array([3.0, 1.0, -2.0])
    dm, rmsd = aligned_density(mf0.mol, mf0.mo_coeff, mf0.mo_occ, SYM, SYM, xyz)
    assert rmsd < 1e-10
    mf1 = make_scf(build_molecule(SYM, xyz, m), m)
    cycles = []
    mf1.callback = lambda env: cycles.append(env["cycle"])
    assert run_scf(mf1, m, dm)[0]
    # same density up to the grid's small orientation dependence; the SCF starts converged
    assert np.max(np.abs(mf1.make_rdm1() - dm)) < 2e-4
    assert mf1.e_tot == pytest.approx(mf0.e_tot, abs=1e-5)
    assert len(cycles) <= 4
    mf2 = make_scf(build_molecule(SYM, xyz, m), m)
    cold = []
    mf2.callback = lambda env: cold.append(env["cycle"])
    run_scf(mf2, m)
    assert len(cold) > len(cycles) + 3


def test_aligned_guess_refuses_another_molecule():
    m = Method(xc="hf", basis="sto-3g")
    mf0 = make_scf(build_molecule(SYM, XYZ, m), m)
    run_scf(mf0, m)
    with pytest.raises(InputError, match="same atoms"):
        aligned_density(mf0.mol, mf0.mo_coeff, mf0.mo_occ, SYM, ["C", "O", "H", "F"], XYZ)


def test_engine_and_worker_start_a_new_copy_from_the_last_one(tmp_path):
    """excitations(copy_guess=) gives the same states (to SCF precision) with the
    superposition recorded; the runner's worker passes the last copy of the same
    molecule kind on its own (waters of a lattice film, HF/STO-3G)."""
    from clusterlab import ResultStore, film_from_universe
    from clusterlab.qm.engine import excitations
    from clusterlab.study import tasks as tasks_mod
    from clusterlab.study.tasks import cluster_task, run_cluster_tasks
    from conftest import build_water_universe, lattice_centres

    rng = np.random.default_rng(7)
    u, _ = build_water_universe(lattice_centres(3, 0.15, rng), np.array([9.3, 9.3, 9.3, 90, 90, 90]), seed=3)
    film = film_from_universe(u, name="water27-guess")
    m = Method(xc="hf", basis="sto-3g", n_singlets=1, n_triplets=1, charge_smearing_A=0.0, conv_tol=1e-10)
    a = excitations(film.carve(0, 4.0), m)
    cold = excitations(film.carve(1, 4.0), m)
    warm = excitations(film.carve(1, 4.0), m, copy_guess=a)
    assert 0 < warm.meta["timings_s"]["copy_guess_rmsd_A"] < 0.2  # rigid-ish waters, other orientation
    assert "copy_guess_rmsd_A" not in cold.meta["timings_s"]
    for k in ("S1_eV", "T1_eV", "S1_shift_eV"):
        assert warm.summary()[k] == pytest.approx(cold.summary()[k], abs=1e-6)
    tasks_mod._COPIES.clear()
    st = ResultStore(tmp_path / "s.sqlite")
    run_cluster_tasks([cluster_task(film, mol, 4.0, m) for mol in (2, 3)], st, desc="x", runner="serial",
                      progress=False)
    import json

    rows = st.to_frame().set_index("molecule")
    assert (rows.status == "done").all()
    metas = {int(mol): json.loads(st.get(k).result_json)["meta"]["timings_s"] for mol, k in zip(rows.index, rows.key)}
    assert "copy_guess_rmsd_A" not in metas[2] and metas[3]["copy_guess_rmsd_A"] < 0.2


def test_a_guess_that_fails_is_dropped_before_the_slower_fallbacks():
    """A given guess DIIS cannot converge from (a nonsense density here; in a film,
    another copy's aligned density can be one) is dropped: DIIS is rerun from
    PySCF's atomic guess (route "fresh-guess") instead of going on to the level
    shift and the second-order solver, and reaches the ground state of a cold
    start (the variational minimum is unique here: HF/STO-3G formaldehyde)."""
    m = Method(xc="hf", basis="sto-3g", max_cycle=10)
    cold = make_scf(build_molecule(SYM, XYZ, m), m)
    cold_cycles = []
    cold.callback = lambda env: cold_cycles.append(env["cycle"])
    assert run_scf(cold, m) == (True, "diis")
    n = cold.mol.nao
    a = np.random.default_rng(0).standard_normal((n, n))
    mf = make_scf(build_molecule(SYM, XYZ, m), m)
    cycles = []
    mf.callback = lambda env: cycles.append(env["cycle"])
    assert run_scf(mf, m, 5.0 * (a + a.T)) == (True, "fresh-guess")
    assert mf.e_tot == pytest.approx(cold.e_tot, abs=1e-8)
    # the retry is a true cold start (not a restart from the failed orbitals): the same cycles as one
    second = cycles[cycles.index(0, 1):]
    assert second == cold_cycles
    # the guessed attempt is capped (a quarter of max_cycle, at least 15), the fresh one is not
    assert guess_cycles(Method(xc="hf", basis="sto-3g")) == 25 and guess_cycles(m) == 10
    assert mf.max_cycle == m.max_cycle


def test_a_copy_that_does_not_superpose_gets_no_guess():
    """A copy with other internal coordinates (RMSD above the limit) gets no
    aligned guess (its vacuum SCF starts cold); a near-rigid one does; the
    RMSD is recorded either way."""
    from clusterlab.cluster import Cluster
    from clusterlab.qm.engine import COPY_GUESS_MAX_RMSD_A, _copy_guess_dm, excitations

    m = Method(xc="hf", basis="sto-3g", n_singlets=1, n_triplets=0, charge_smearing_A=0.0)
    a = excitations(Cluster.from_arrays(SYM, XYZ, np.zeros((0, 3)), np.zeros(0)), m)
    bent = XYZ.copy()
    bent[1] = [0.0, 0.0, 2.6]  # C=O pulled apart and the Hs swung round: not the same shape (RMSD 0.82 Å)
    bent[2] = [0.0, 1.6, -0.2]
    bent[3] = [0.0, -0.3, -1.6]
    far = Cluster.from_arrays(SYM, bent, np.zeros((0, 3)), np.zeros(0))
    t: dict = {}
    assert _copy_guess_dm(a, far, m, t) is None and t["copy_guess_rmsd_A"] > COPY_GUESS_MAX_RMSD_A
    near = Cluster.from_arrays(SYM, XYZ + 0.01 * np.arange(12).reshape(4, 3) / 12, np.zeros((0, 3)), np.zeros(0))
    t = {}
    assert _copy_guess_dm(a, near, m, t) is not None and t["copy_guess_rmsd_A"] < 0.05
