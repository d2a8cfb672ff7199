"""The MO-basis density-fitted TDA operator (clusterlab.qm.mokernel) against
PySCF's own AO-basis operator, and its orbital window against the full space.

The reference is an independent implementation of the same matrix: PySCF's
``pyscf.tdscf.rhf._gen_tda_operation`` (reached through ``TDA.gen_vind``),
which builds AO transition densities and their J/K/f_xc matrices (Sun et al.,
WIREs Comput. Mol. Sci. 8, e1340 (2018); J. Chem. Phys. 153, 024109 (2020)).
With every orbital kept the two must agree to rounding, for LDA, GGA, hybrid
and Hartree-Fock, singlets and triplets, in point charges and in a
polarizable environment.
"""

from __future__ import annotations

import numpy as np
import pytest

from clusterlab.cluster import Cluster
from clusterlab.errors import InputError
from clusterlab.qm import calc as qcalc
from clusterlab.qm import mokernel
from clusterlab.qm.calc import VACUUM, Embedding, build_molecule, calculate, make_scf, run_scf, solve_states
from clusterlab.qm.engine import excitations
from clusterlab.qm.method import Method
from clusterlab.qm.mokernel import OperatorSetup, orbital_window, supported, tda_operator
from clusterlab.units import HARTREE_TO_EV

from conftest import TIP3P_Q, TIP3P_XYZ

FORMALDEHYDE = (["C", "O", "H", "H"], np.array([[0, 0, 0], [0, 0, 1.21], [0, 0.94, -0.59], [0, -0.94, -0.59]]))
CHARGES = (np.array([[3.0, 0.0, 0.0], [0.0, 4.0, 1.0], [-2.5, -2.5, 2.0]]), np.array([0.4, -0.5, 0.1]))


def _scf(xc: str, basis: str = "6-31g", **kw):
    m = Method(xc=xc, basis=basis, grid_level=1, response_grid_level=None, charge_smearing_A=0.0, **kw)
    mol = build_molecule(*FORMALDEHYDE, m)
    mf = make_scf(mol, m, Embedding(positions_A=CHARGES[0], charges_e=CHARGES[1]))
    assert run_scf(mf, m)[0]
    return mf, m


@pytest.mark.parametrize("xc", ["b3lyp", "pbe", "svwn", "hf"])
def test_operator_equals_pyscf_ao_route_in_the_full_space(xc):
    mf, _ = _scf(xc)
    assert supported(mf) == (True, "")
    w = orbital_window(mf.mo_energy, mf.mo_occ, None)
    assert w.is_full
    x = np.random.default_rng(3).standard_normal((4, w.n_pairs))
    for singlet in (True, False):
        td = mf.TDA()
        td.singlet = singlet
        ref, hdiag_ref = td.gen_vind(mf)
        mine, hdiag = tda_operator(mf, singlet, w)
        a, b = ref(x), mine(x)
        assert np.max(np.abs(a - b)) < 1e-10 * np.max(np.abs(a))
        assert np.allclose(hdiag, hdiag_ref, atol=1e-13)


def test_operator_with_induced_dipoles_equals_pyscf_equilibrium_response():
    """Singlets in a cppe environment: the induced dipoles answer the transition
    density exactly as PySCF's ``TDA(equilibrium_solvation=True)``."""
    rng = np.random.default_rng(5)
    pos, q, pol, groups = [], [], [], []
    for k, centre in enumerate([[0, 0, 3.6], [3.4, 0, 0], [-3.2, 0.5, 0.4]]):
        pos.append(TIP3P_XYZ + np.asarray(centre) + 0.05 * rng.standard_normal(3))
        q.append(TIP3P_Q)
        pol.append([0.862, 0.514, 0.514])  # Å^3, an O/H-like Thole set (values only need to be plausible here)
        groups += [k] * 3
    emb = Embedding(positions_A=np.vstack(pos), charges_e=np.concatenate(q),
                    polarizabilities_A3=np.concatenate(pol), groups=np.asarray(groups))
    m = Method(xc="b3lyp", basis="6-31g", grid_level=1, response_grid_level=None, charge_smearing_A=0.0,
               environment="polarizable")
    mf = make_scf(build_molecule(*FORMALDEHYDE, m), m, emb)
    assert run_scf(mf, m)[0]
    w = orbital_window(mf.mo_energy, mf.mo_occ, None)
    x = rng.standard_normal((3, w.n_pairs))
    td = mf.TDA(equilibrium_solvation=True)
    ref, _ = td.gen_vind(mf)
    mine, _ = tda_operator(mf, True, w, environment_response=True)
    without, _ = tda_operator(mf, True, w)
    a, b, c = ref(x), mine(x), without(x)
    assert np.max(np.abs(a - b)) < 1e-9 * np.max(np.abs(a))
    assert np.max(np.abs(a - c)) > 1e-6  # the environment term is really there


@pytest.mark.parametrize("excited", ["tda", "stda-refined"])
def test_states_through_the_door_match_the_ao_route(excited):
    """Same S/T energies, oscillator strengths and amplitudes from both kernels
    through solve_states (full window)."""
    mf, m = _scf("b3lyp", n_singlets=3, n_triplets=2, excited=excited, response_conv_tol=1e-7)
    mo = m.replace(response_kernel="mo")
    for kind in ("singlet", "triplet"):
        ref = solve_states(mf, m, kind, 3)
        new = solve_states(mf, mo, kind, 3)
        assert ref.extra["kernel"] == "ao" and new.extra["kernel"] == "mo"
        assert np.allclose(new.energies_Eh, ref.energies_Eh, atol=2e-8 if excited == "stda-refined" else 2e-6)
        assert np.allclose(new.osc_strength, ref.osc_strength, atol=1e-5)
        overlap = np.abs(np.einsum("nia,nia->n", new.amplitudes, ref.amplitudes))
        assert np.all(overlap > 0.9999)


def test_orbital_window_error_on_shifts_is_small():
    """The window (occupied within 1 Eh of the HOMO, virtuals within 1 Eh of the
    LUMO) drops the core and high virtual orbitals; on the embedded minus vacuum
    shift of formaldehyde's n->pi* and pi->pi* states (6-31G, B3LYP, full TDA) it
    changes S1/T1 shifts by well under the 5 meV the fast route promises (measured
    0.14 and 0.59 meV)."""
    m = Method(xc="b3lyp", basis="6-31g", grid_level=1, response_grid_level=1, n_singlets=3, n_triplets=3,
               charge_smearing_A=0.0, response_kernel="mo", response_conv_tol=1e-7)
    c = Cluster(FORMALDEHYDE[0], FORMALDEHYDE[1], CHARGES[0], CHARGES[1], radius_A=6.0)
    full = excitations(c, m).summary()
    win = excitations(c, m.replace(orbital_window_Eh=1.0)).summary()
    for key in ("S1_shift_eV", "T1_shift_eV"):
        assert abs(full[key]) > 0.005  # the charges do shift the states
        assert win[key] == pytest.approx(full[key], abs=1e-3)
    # absolute energies move more (measured: S1 +11 meV, T1 +30 meV: in 6-31G a 4-atom
    # molecule has few virtuals below 1 Eh), and a wider window recovers them
    assert 0.003 < win["T1_eV"] - full["T1_eV"] < 0.05
    wide = excitations(c, m.replace(orbital_window_Eh=1.5)).summary()
    for key in ("S1_eV", "T1_eV", "S1_shift_eV", "T1_shift_eV"):
        assert wide[key] == pytest.approx(full[key], abs=1e-5)


def test_window_selects_frontier_orbitals():
    e = np.array([-20.0, -1.2, -0.6, -0.3, 0.05, 0.4, 1.2, 3.0])
    occ = np.array([2, 2, 2, 2, 0, 0, 0, 0])
    w = orbital_window(e, occ, 1.0)
    assert list(w.occ) == [1, 2, 3] and list(w.vir) == [0, 1] and w.n_pairs == 6 and not w.is_full
    x = np.arange(6.0).reshape(1, 6)
    assert np.array_equal(w.restrict(w.embed(x)), x)
    full = w.embed(x).reshape(4, 4)
    assert full[0].sum() == 0 and full[:, 2:].sum() == 0


def test_unsupported_and_bad_input_are_clear():
    mf, _ = _scf("camb3lyp")
    ok, why = supported(mf)
    assert not ok and "range separated" in why
    # through the door it falls back to PySCF's route and says so
    m = Method(xc="camb3lyp", basis="6-31g", grid_level=1, n_singlets=1, n_triplets=0, response_kernel="mo")
    assert solve_states(mf, m, "singlet", 1).extra["kernel"] == "ao"
    with pytest.raises(InputError, match="density_fit"):
        Method(response_kernel="mo", density_fit=False)
    with pytest.raises(InputError, match="response_kernel"):
        Method(response_kernel="fast")
    with pytest.raises(InputError, match="orbital_window_Eh"):
        Method(orbital_window_Eh=1.0)
    with pytest.raises(InputError, match="orbital_window_Eh"):
        Method(response_kernel="mo", orbital_window_Eh=-1)
    # methods without the new fields keep their stored keys
    assert "response_kernel" not in Method.preset("draft").canonical_json()
    assert "response_kernel" in Method.preset("draft", response_kernel="mo").canonical_json()


# ------------------------------------------------ one set-up for both spins
#: B3LYP/6-31G, density fitting, SCF and response grid 1, full TDA 3+3 on the MO-basis operator, every orbital
#: kept (so PySCF's own TDA is the same matrix); response grid 2 -> 1 in the copy case
SHARED = Method(xc="b3lyp", basis="6-31g", grid_level=1, response_grid_level=1, n_singlets=3, n_triplets=3,
                excited="tda", response_kernel="mo", charge_smearing_A=0.0, response_conv_tol=1e-7)
EMBEDDINGS = {"vacuum": VACUUM, "charges": Embedding(positions_A=CHARGES[0], charges_e=CHARGES[1])}


def _fresh_share(monkeypatch):
    """Make every solve build its operator from scratch (the behaviour before sharing)."""
    monkeypatch.setattr(qcalc, "_share", lambda mf: qcalc._ResponseShare())


def _count(monkeypatch, owner, name):
    calls = []
    orig = getattr(owner, name)

    def wrapped(*a, **kw):
        calls.append(name)
        return orig(*a, **kw)

    monkeypatch.setattr(owner, name, wrapped)
    return calls


@pytest.mark.parametrize("where", ["vacuum", "charges"])
def test_shared_setup_gives_the_fresh_operators_states_and_pyscf_tda(where, monkeypatch):
    """S1-S3/T1-T3 with one set-up for both spins equal those of a fresh
    operator per spin (same numbers, so to rounding: 1e-9 eV asked) and PySCF's
    own TDA on the same density-fitted SCF (AO route, its own Davidson:
    ``pyscf.tdscf.rhf.TDA``, Sun et al., WIREs Comput. Mol. Sci. 8, e1340
    (2018)) to the 2e-6 Eh of the door test above (measured: shared minus
    fresh 0.0 eV, minus PySCF at most 1.6e-13 eV)."""
    from pyscf.dft import numint

    mf = make_scf(build_molecule(*FORMALDEHYDE, SHARED), SHARED, EMBEDDINGS[where])
    assert run_scf(mf, SHARED)[0]
    kernels = _count(monkeypatch, numint.NumInt, "cache_xc_kernel")
    blocks = _count(monkeypatch, mokernel, "_fitted_blocks")
    shared = {k: solve_states(mf, SHARED, k, 3) for k in ("singlet", "triplet")}
    assert len(kernels) == 1 and len(blocks) == 1  # triplets reuse the singlets' set-up
    assert all(r.extra["kernel"] == "mo" for r in shared.values())
    with monkeypatch.context() as m:
        _fresh_share(m)
        fresh = {k: solve_states(mf, SHARED, k, 3) for k in ("singlet", "triplet")}
    assert len(kernels) == 3 and len(blocks) == 3  # one per spin without sharing
    for kind, singlet in (("singlet", True), ("triplet", False)):
        a, b = shared[kind].energies_Eh * HARTREE_TO_EV, fresh[kind].energies_Eh * HARTREE_TO_EV
        assert len(a) == 3 and np.max(np.abs(a - b)) < 1e-9
        td = mf.TDA()
        td.singlet, td.nstates, td.conv_tol, td.max_cycle, td.verbose = singlet, 5, 1e-7, 200, 0
        td.kernel()
        assert np.all(td.converged[:3])
        assert np.allclose(shared[kind].energies_Eh, np.sort(td.e)[:3], atol=2e-6)
    assert np.allclose(shared["singlet"].osc_strength, fresh["singlet"].osc_strength, atol=1e-10)
    # the XC kernel really differs by spin (a shared kernel would give the triplets the singlets' f_xc)
    assert shared["singlet"].energies_Eh[0] - shared["triplet"].energies_Eh[0] > 0.01


def test_one_calculation_builds_the_setup_once_and_frees_it(monkeypatch):
    """Through calculate (response grid 1 on an SCF grid 2: the response SCF is
    a copy, built once): one XC kernel and one pass of fitted blocks for
    singlets and triplets; after the calculation the SCF keeps nothing."""
    from pyscf.dft import gen_grid, numint

    m = SHARED.replace(grid_level=2, orbital_window_Eh=1.0)
    kernels = _count(monkeypatch, numint.NumInt, "cache_xc_kernel")
    blocks = _count(monkeypatch, mokernel, "_fitted_blocks")
    setups = _count(monkeypatch, mokernel, "OperatorSetup")
    grids = _count(monkeypatch, gen_grid.Grids, "build")
    res = calculate(*FORMALDEHYDE, m, EMBEDDINGS["charges"])
    assert res.converged and set(res.states) == {"singlet", "triplet"}
    assert (len(kernels), len(blocks), len(setups)) == (1, 1, 1)
    assert len(grids) == 2  # the SCF's grid and the response grid, not one more per spin
    assert qcalc._SHARE_ATTR not in vars(res.mf)
    assert res.mf.with_df._cderi is None
    # the same numbers as a fresh operator per spin on a fresh SCF of the same molecule
    _fresh_share(monkeypatch)
    ref = calculate(*FORMALDEHYDE, m, EMBEDDINGS["charges"])
    assert len(kernels) == 3
    for kind in ("singlet", "triplet"):
        assert np.max(np.abs(res.states[kind].energies_Eh - ref.states[kind].energies_Eh)) * HARTREE_TO_EV < 1e-9


def test_a_changed_scf_never_reuses_the_setup(monkeypatch):
    """Other orbitals (the same SCF object re-run at another geometry), another
    window or another SCF: a new set-up, and the states of the new geometry are
    those of a fresh SCF there."""
    from pyscf.dft import numint

    mf = make_scf(build_molecule(*FORMALDEHYDE, SHARED), SHARED, VACUUM)
    assert run_scf(mf, SHARED)[0]
    solve_states(mf, SHARED, "singlet", 3)
    before = solve_states(mf, SHARED, "triplet", 3)
    first = vars(mf)[qcalc._SHARE_ATTR].setup
    stretched = FORMALDEHYDE[1] + np.array([[0, 0, 0], [0, 0, 0.05], [0, 0, 0], [0, 0, 0]])  # C=O 1.21 -> 1.26 Å
    mf.mol.set_geom_(stretched, unit="Angstrom")
    mf.reset(mf.mol)
    assert run_scf(mf, SHARED)[0]
    kernels = _count(monkeypatch, numint.NumInt, "cache_xc_kernel")
    moved = solve_states(mf, SHARED, "triplet", 3)
    assert len(kernels) == 1 and vars(mf)[qcalc._SHARE_ATTR].setup is not first
    with monkeypatch.context() as m:
        _fresh_share(m)
        fresh = solve_states(mf, SHARED, "triplet", 3)
    assert np.max(np.abs(moved.energies_Eh - fresh.energies_Eh)) * HARTREE_TO_EV < 1e-9
    # a fresh SCF at the new geometry (its own SCF path: equal to the SCF's convergence, 1e-5 Eh)
    other = make_scf(build_molecule(FORMALDEHYDE[0], stretched, SHARED), SHARED, VACUUM)
    assert run_scf(other, SHARED)[0]
    ref = solve_states(other, SHARED, "triplet", 3)
    assert np.allclose(moved.energies_Eh, ref.energies_Eh, atol=1e-5)
    assert np.max(np.abs(before.energies_Eh - ref.energies_Eh)) > 1e-3  # the stretch does move the states
    # a set-up is refused by another SCF and by another window of its own SCF
    w = orbital_window(other.mo_energy, other.mo_occ, None)
    setup = OperatorSetup(mf, orbital_window(mf.mo_energy, mf.mo_occ, None))
    with pytest.raises(InputError, match="another SCF"):
        tda_operator(other, True, w, setup=setup)
    with pytest.raises(InputError, match="another SCF"):
        tda_operator(mf, True, orbital_window(mf.mo_energy, mf.mo_occ, 1.0), setup=setup)
    assert mokernel.setup_key(mf, w) == setup.key  # same orbitals, same window: reusable
