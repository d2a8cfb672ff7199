"""Tests of the simplified TDA (clusterlab.qm.stda).

Outside checks used here:
* PySCF's full TDA (``mf.TDA()``) and its ``oscillator_strength()``
  (independent general-purpose library) at the same functional and basis.
* A slow, loop-by-loop re-implementation of the published sTDA equations
  (Grimme, J. Chem. Phys. 138, 244104 (2013)) written independently in this
  file: it checks the vectorised integrals and the configuration selection.
* Exact facts: orthonormality sum rules of Löwdin charges, the Coulomb law
  1/R at large distance, Weyl's eigenvalue inequality, dipole selection
  rules of the C2v point group (A2 states are dipole-forbidden).
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import scipy.linalg
from pyscf import dft, gto, qmmm, scf

from clusterlab.errors import ConvergenceError, InputError
from clusterlab.qm import stda
from clusterlab.qm.stda import (
    STDA_HARDNESS_EH,
    exchange_fraction,
    stda_gamma,
    stda_response,
)
from clusterlab.units import HARTREE_TO_EV

# --------------------------------------------------------------------------
# geometries (Å) built here from standard bond lengths ("common practice"
# values: C=C 1.34, C-C 1.47, C-H 1.08, C=O 1.21, C-N 1.35, N-H 1.01,
# aromatic ring bonds 1.37-1.40, 120° planar angles). Water: TIP3P geometry
# (Jorgensen et al., J. Chem. Phys. 79, 926 (1983)).
# --------------------------------------------------------------------------


def _planar(spec):
    """Planar molecule from (symbol, parent, bond_A, direction_deg) rows."""
    pos: list[tuple[str, np.ndarray]] = []
    for sym, parent, r, phi in spec:
        if parent is None:
            p = np.zeros(3)
        else:
            t = np.radians(phi)
            p = pos[parent][1] + r * np.array([np.cos(t), np.sin(t), 0.0])
        pos.append((sym, p))
    return pos


def _ring(symbols, bond_A, with_h):
    n = len(symbols)
    radius = bond_A / (2 * np.sin(np.pi / n))
    out = []
    for k, s in enumerate(symbols):
        t = np.radians(90 + 360 * k / n)
        u = np.array([np.cos(t), np.sin(t), 0.0])
        out.append((s, radius * u))
        if with_h[k]:
            out.append(("H", (radius + 1.08) * u))
    return out


def _ethylene():
    return _planar([("C", None, 0, 0), ("C", 0, 1.34, 0), ("H", 0, 1.08, 121.5),
                    ("H", 0, 1.08, 238.5), ("H", 1, 1.08, 58.5), ("H", 1, 1.08, -58.5)])


def validation_geometries() -> dict[str, list[tuple[str, np.ndarray]]]:
    """Small molecules of local pi-pi*, n-pi*, n-sigma*/Rydberg-like and
    charge-transfer character."""
    g: dict[str, list] = {}
    g["water"] = [("O", np.zeros(3)), ("H", np.array([0, 0.7572, 0.5865])),
                  ("H", np.array([0, -0.7572, 0.5865]))]
    g["ammonia"] = [("N", np.array([0, 0, 0.1173])), ("H", np.array([0, 0.9377, -0.2738])),
                    ("H", np.array([0.8121, -0.4689, -0.2738])),
                    ("H", np.array([-0.8121, -0.4689, -0.2738]))]
    g["hcn"] = [("H", np.array([0, 0, -1.065])), ("C", np.zeros(3)),
                ("N", np.array([0, 0, 1.156]))]
    g["formaldehyde"] = _planar([("C", None, 0, 0), ("O", 0, 1.21, 0),
                                 ("H", 0, 1.10, 121.8), ("H", 0, 1.10, 238.2)])
    g["ethylene"] = _ethylene()
    g["butadiene"] = _planar([("C", None, 0, 0), ("C", 0, 1.34, 0), ("C", 1, 1.47, 60),
                              ("C", 2, 1.34, 0), ("H", 0, 1.08, 120), ("H", 0, 1.08, 240),
                              ("H", 1, 1.08, 300), ("H", 2, 1.08, 120), ("H", 3, 1.08, 60),
                              ("H", 3, 1.08, 300)])
    g["acrolein"] = _planar([("C", None, 0, 0), ("C", 0, 1.34, 0), ("C", 1, 1.47, 60),
                             ("O", 2, 1.21, 0), ("H", 0, 1.08, 120), ("H", 0, 1.08, 240),
                             ("H", 1, 1.08, 300), ("H", 2, 1.10, 120)])
    g["formamide"] = _planar([("C", None, 0, 0), ("O", 0, 1.22, 60), ("N", 0, 1.35, 180),
                              ("H", 0, 1.10, 300), ("H", 2, 1.01, 120), ("H", 2, 1.01, 240)])
    g["furan"] = _ring(["O", "C", "C", "C", "C"], 1.40, [0, 1, 1, 1, 1])
    g["pyrazine"] = _ring(["N", "C", "C", "N", "C", "C"], 1.37, [0, 1, 1, 0, 1, 1])
    # charge-transfer pair: ethylene stacked 4 Å above tetrafluoroethylene
    # (the classic CT test of Dreuw, Weisman, Head-Gordon, J. Chem. Phys.
    # 119, 2943 (2003); here face-to-face, C-F 1.33 Å, F-C-F 112°)
    tfe = _planar([("C", None, 0, 0), ("C", 0, 1.33, 0), ("F", 0, 1.33, 124),
                   ("F", 0, 1.33, 236), ("F", 1, 1.33, 56), ("F", 1, 1.33, -56)])
    g["C2H4...C2F4 4A"] = _ethylene() + [(s, p + np.array([0, 0, 4.0])) for s, p in tfe]
    return g


def _mol(atoms, basis):
    return gto.M(atom=[(s, tuple(p)) for s, p in atoms], basis=basis, verbose=0)


def _rks(atoms, basis="sto-3g", xc="b3lyp", grid_level=1):
    mf = dft.RKS(_mol(atoms, basis), xc=xc)
    mf.grids.level = grid_level
    mf.conv_tol = 1e-10
    return mf.run()


def _tda(mf, kind, n):
    td = mf.TDA()
    td.singlet = kind == "singlet"
    td.nstates = n
    td.conv_tol = 1e-7
    td.kernel()
    return td


@pytest.fixture(scope="module")
def formaldehyde_mf():
    return _rks(validation_geometries()["formaldehyde"])


@pytest.fixture(scope="module")
def ethylene_mf():
    return _rks(_ethylene())


# --------------------------------------------------------------------------
# an independent, loop-by-loop implementation of the published equations
# --------------------------------------------------------------------------
def _reference_matrix(mf, kind, ax):
    """A_ia,jb of the sTDA over *all* CSFs by explicit loops.

    Uses scipy's sqrtm for S^1/2 and ``mol.ao_labels`` for the AO-to-atom map,
    so it shares no code with the module.
    """
    mol = mf.mol
    s_half = np.real(scipy.linalg.sqrtm(mol.intor("int1e_ovlp")))
    c = s_half @ mf.mo_coeff
    ao_atom = np.array([lab[0] for lab in mol.ao_labels(fmt=False)])
    occ = [p for p in range(len(mf.mo_occ)) if mf.mo_occ[p] > 0]
    vir = [p for p in range(len(mf.mo_occ)) if mf.mo_occ[p] == 0]
    natm = mol.natm

    def q(p, r):
        out = np.zeros(natm)
        for mu in range(mol.nao):
            out[ao_atom[mu]] += c[mu, p] * c[mu, r]
        return out

    xyz = mol.atom_coords()
    # the module's hardness table is input data here (checked against the
    # published values in test_hardness_table_is_twice_ghosh_islam)
    eta = [STDA_HARDNESS_EH[mol.atom_pure_symbol(a)] for a in range(natm)]
    alpha, beta = 1.42 + 0.48 * ax, 0.20 + 1.83 * ax  # Grimme 2013
    gj = np.zeros((natm, natm))
    gk = np.zeros((natm, natm))
    for a in range(natm):
        for b in range(natm):
            r = np.linalg.norm(xyz[a] - xyz[b])
            e = 0.5 * (eta[a] + eta[b])
            gk[a, b] = 1.0 / (r**alpha + e ** (-alpha)) ** (1.0 / alpha)
            gj[a, b] = 1.0 / (r**beta + (ax * e) ** (-beta)) ** (1.0 / beta)
    csfs = [(i, a) for i in occ for a in vir]
    n = len(csfs)
    amat = np.zeros((n, n))
    for u, (i, a) in enumerate(csfs):
        for v, (j, b) in enumerate(csfs):
            val = -q(i, j) @ gj @ q(a, b)
            if kind == "singlet":
                val += 2.0 * q(i, a) @ gk @ q(j, b)
            if u == v:
                val += mf.mo_energy[a] - mf.mo_energy[i]
            amat[u, v] = val
    return amat, csfs


def _reference_selected(amat, csfs, mo_energy, e_max_Eh, thr_Eh, n_states, ax=0.2):
    """The module's documented selection rule, by loops."""
    diag = np.diag(amat)
    prim = [u for u in range(len(diag)) if diag[u] < e_max_Eh]
    if len(prim) < n_states:  # clusterlab rule: at least n_states primary CSFs
        prim = sorted(np.argsort(diag, kind="stable")[:n_states].tolist())
    # orbital window of the candidates: w = 2 (1 + 0.8 a_x) E_eff
    width = 2.0 * (1.0 + 0.8 * ax) * max(e_max_Eh, max(diag[u] for u in prim))
    homo = max(mo_energy[i] for i, _ in csfs)
    lumo = min(mo_energy[a] for _, a in csfs)
    occ_ok = {i for i, _ in csfs if mo_energy[i] >= homo - width} | {csfs[u][0] for u in prim}
    vir_ok = {a for _, a in csfs if mo_energy[a] <= lumo + width} | {csfs[u][1] for u in prim}
    sec = []
    for u in range(len(diag)):
        if u in prim or csfs[u][0] not in occ_ok or csfs[u][1] not in vir_ok:
            continue
        e2 = sum(amat[u, v] ** 2 / (diag[u] - diag[v]) for v in prim)
        if e2 > thr_Eh:
            sec.append(u)
    space = sorted(prim + sec)
    return np.linalg.eigvalsh(amat[np.ix_(space, space)]), len(prim), len(sec)


# --------------------------------------------------------------------------
# unit tests
# --------------------------------------------------------------------------
def test_gamma_limits():
    # on-site values: gamma_K(0) = eta, gamma_J(0) = a_x eta (Grimme 2013)
    eta = np.array([0.2, 0.3])
    gj, gk = stda_gamma(np.array([[0, 0, 0.0], [0, 0, 1e8]]), eta, 0.25)
    assert gk[0, 0] == pytest.approx(0.2, rel=1e-12)
    assert gj[1, 1] == pytest.approx(0.25 * 0.3, rel=1e-12)
    # both tend to the bare Coulomb law 1/R at large R (exact)
    assert gk[0, 1] * 1e8 == pytest.approx(1.0, abs=1e-3)
    assert gj[0, 1] * 1e8 == pytest.approx(1.0, abs=1e-3)
    # symmetric, decreasing with distance, below 1/R everywhere (damping)
    r = np.linspace(0.5, 20, 40)
    coords = np.c_[np.zeros(40), np.zeros(40), r]
    gj, gk = stda_gamma(coords, np.full(40, 0.2), 0.2)
    row_k = gk[0, 1:]
    assert np.allclose(gk, gk.T) and np.allclose(gj, gj.T)
    assert np.all(np.diff(row_k) < 0)
    assert np.all(row_k < 1.0 / (r[1:] - r[0]))
    # a_x = 0 (pure functional): no Coulomb-type term at all
    gj0, _ = stda_gamma(coords, np.full(40, 0.2), 0.0)
    assert np.all(gj0 == 0.0)


#: Global hardness (I - A)/2 in eV of Ghosh & Islam, Int. J. Quantum Chem.
#: 110, 1206 (2010), as an independent PySCF sTDA implementation lists them
#: (ecignoni/stda_pyscf, parameters.py; read while writing this test).
GHOSH_ISLAM_EV = {"H": 6.429954, "He": 12.544912, "Li": 2.374587, "Be": 3.496763, "B": 4.619009,
                  "C": 5.740979, "N": 6.862467, "O": 7.985436, "F": 9.106475, "Ne": 10.230341,
                  "Na": 2.444141, "Mg": 3.014651, "Al": 3.584907, "Si": 4.155131, "P": 4.725804,
                  "S": 5.295979, "Cl": 5.866186, "Ar": 6.436619}


def test_hardness_table_is_twice_ghosh_islam():
    # Grimme 2013 uses eta = I - A, twice the Ghosh-Islam (I - A)/2 values
    assert set(STDA_HARDNESS_EH) == set(GHOSH_ISLAM_EV)
    for sym, eta_half_eV in GHOSH_ISLAM_EV.items():
        assert STDA_HARDNESS_EH[sym] * HARTREE_TO_EV == pytest.approx(2 * eta_half_eV, rel=2e-6), sym


def test_transition_charge_sum_rules(formaldehyde_mf):
    # sum over atoms of Löwdin charges = orbital overlap (exact orthonormality)
    mf = formaldehyde_mf
    c = stda._lowdin_coefficients(mf.mol, mf.mo_coeff)
    q = stda.transition_charges(mf.mol, c, c)
    assert np.allclose(q.sum(axis=0), np.eye(mf.mo_coeff.shape[1]), atol=1e-10)


def test_exchange_fraction_of_functionals():
    mol = gto.M(atom="He 0 0 0", basis="sto-3g", verbose=0)
    # B3LYP 20 % HF (Stephens et al., J. Phys. Chem. 98, 11623 (1994));
    # PBE0 25 % (Adamo & Barone, J. Chem. Phys. 110, 6158 (1999))
    assert exchange_fraction(dft.RKS(mol, xc="b3lyp"))[0] == pytest.approx(0.20)
    assert exchange_fraction(dft.RKS(mol, xc="pbe0"))[0] == pytest.approx(0.25)
    assert exchange_fraction(scf.RHF(mol))[0] == 1.0
    # CAM-B3LYP: 19 % short range, 65 % long range (Yanai, Tew, Handy,
    # Chem. Phys. Lett. 393, 51 (2004)); clusterlab uses their mean
    ax, note = exchange_fraction(dft.RKS(mol, xc="camb3lyp"))
    assert ax == pytest.approx(0.42, abs=1e-6)
    assert "range-separated" in note

    class _M:
        xc = "pbe0"

    assert exchange_fraction(dft.RKS(mol, xc="b3lyp"), _M())[0] == pytest.approx(0.25)


@pytest.mark.parametrize("kind", ["singlet", "triplet"])
def test_vectorised_matrix_matches_loop_reference(formaldehyde_mf, kind):
    mf = formaldehyde_mf
    amat, csfs = _reference_matrix(mf, kind, 0.2)
    ref_all = np.linalg.eigvalsh(amat)
    # every CSF primary: the module must give the exact eigenvalues
    st = stda_response(mf, kind, 6, e_max_eV=1e5)
    assert st.extra["n_space"] == len(csfs)
    np.testing.assert_allclose(st.energies_Eh, ref_all[:6], atol=1e-10)
    # the published selection (primary below E_max, perturbative secondary)
    for e_max_eV in (7.0, 14.0, 20.0):
        ref_sel, n_p, n_s = _reference_selected(
            amat, csfs, mf.mo_energy, e_max_eV / HARTREE_TO_EV, 1e-4, 4
        )
        st = stda_response(mf, kind, 4, e_max_eV=e_max_eV)
        assert (st.extra["n_primary"], st.extra["n_secondary"]) == (n_p, n_s)
        np.testing.assert_allclose(st.energies_Eh, ref_sel[:4], atol=1e-9)


def test_chunked_blocks_equal_unchunked(formaldehyde_mf, monkeypatch):
    ref = stda_response(formaldehyde_mf, "singlet", 4, e_max_eV=12.0)
    monkeypatch.setattr(stda, "_BLOCK_ELEMENTS", 7)
    st = stda_response(formaldehyde_mf, "singlet", 4, e_max_eV=12.0)
    np.testing.assert_allclose(st.energies_Eh, ref.energies_Eh, atol=1e-12)
    assert st.extra["n_secondary"] == ref.extra["n_secondary"]


def test_amplitudes_full_grid_and_follow_tda(formaldehyde_mf):
    mf = formaldehyde_mf
    st = stda_response(mf, "singlet", 3)
    nocc = int(np.sum(mf.mo_occ > 0))
    nvir = mf.mo_coeff.shape[1] - nocc
    assert st.amplitudes.shape == (3, nocc, nvir)
    np.testing.assert_allclose(np.einsum("nia,nia->n", st.amplitudes, st.amplitudes), 1.0)
    # zeros outside the selected space
    assert np.count_nonzero(np.abs(st.amplitudes[0]) > 0) <= st.extra["n_space"]
    assert st.model == "stda" and st.kind == "singlet" and st.converged.all()
    # the n->pi* S1 is the same state as PySCF's full TDA S1 (PySCF
    # normalises X to 1/2 for closed shells)
    td = _tda(mf, "singlet", 3)
    ovl = abs(np.sum(st.amplitudes[0] * td.xy[0][0])) * np.sqrt(2)
    assert ovl > 0.95


def test_oscillator_strength_spin_factor_matches_pyscf(ethylene_mf):
    # PySCF's own oscillator_strength() evaluated on the sTDA amplitudes
    # (X/sqrt(2) in PySCF's normalisation) must agree to rounding.
    mf = ethylene_mf
    st = stda_response(mf, "singlet", 4)
    td = mf.TDA()
    td.e = st.energies_Eh
    td.xy = [(x / np.sqrt(2), 0) for x in st.amplitudes]
    np.testing.assert_allclose(st.osc_strength, td.oscillator_strength(), rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(
        np.abs(st.transition_dipoles_au), np.abs(td.transition_dipole()), atol=1e-10
    )


def test_bright_pi_pi_star_strength_close_to_full_tda(ethylene_mf):
    mf = ethylene_mf
    st = stda_response(mf, "singlet", 3)
    td = _tda(mf, "singlet", 3)
    f_tda = td.oscillator_strength()
    # the brightest state of each model is the same pi->pi* state
    n_s, n_t = int(np.argmax(st.osc_strength)), int(np.argmax(f_tda))
    ovl = abs(np.sum(st.amplitudes[n_s] * td.xy[n_t][0])) * np.sqrt(2)
    assert ovl > 0.9
    assert f_tda[n_t] > 0.2  # it is a strongly allowed state in full TDA
    assert 0.5 < st.osc_strength[n_s] / f_tda[n_t] < 2.0


def test_forbidden_n_pi_star_is_dark(formaldehyde_mf):
    # formaldehyde S1 is 1A2 (n->pi*), dipole-forbidden in C2v (group theory)
    st = stda_response(formaldehyde_mf, "singlet", 2)
    assert st.osc_strength[0] < 1e-8
    # full TDA agrees that it is dark (same symmetry, PySCF)
    assert _tda(formaldehyde_mf, "singlet", 1).oscillator_strength()[0] < 1e-8
    assert np.all(stda_response(formaldehyde_mf, "triplet", 2).osc_strength == 0.0)


def test_n_pi_star_triplet_equals_singlet(formaldehyde_mf):
    """In the sTDA the singlet and triplet matrices differ only by
    2 (ia|jb)' = 2 sum_AB q_A^ia q_B^jb gamma^K_AB (monopole approximation of the
    exchange-type integral). For a planar molecule every atom's basis splits
    into functions even and odd under the molecular plane, so the Löwdin
    transition charges of a sigma->pi* or n->pi* excitation vanish atom by atom
    (exact, by symmetry): formaldehyde's n->pi* S1 and T1 are then the same
    number, and not only because the method has no triplet kernel."""
    mf = formaldehyde_mf
    nocc = int((mf.mo_occ > 0).sum())
    c = stda._lowdin_coefficients(mf.mol, mf.mo_coeff)
    q = stda.transition_charges(mf.mol, c[:, [nocc - 1]], c[:, [nocc]]).ravel()  # n (HOMO) -> pi* (LUMO)
    assert np.abs(q).max() < 1e-12
    s = stda_response(mf, "singlet", 3)
    t = stda_response(mf, "triplet", 3)
    assert s.osc_strength[0] < 1e-8  # the dark n->pi*
    assert abs(s.energies_Eh[0] - t.energies_Eh[0]) < 1e-12
    # the bright second singlet (9.13 eV in STO-3G) is another such transition and has its
    # triplet twin; the triplet between them (8.49 eV, nonzero charges) has no singlet twin
    assert s.osc_strength[1] > 1e-3 and abs(s.energies_Eh[1] - t.energies_Eh[2]) < 1e-12
    assert np.abs(s.energies_Eh - t.energies_Eh[1]).min() > 0.1 / HARTREE_TO_EV


def test_triplet_below_singlet(ethylene_mf):
    mf = ethylene_mf
    s = stda_response(mf, "singlet", 4, e_max_eV=1e5)
    t = stda_response(mf, "triplet", 4, e_max_eV=1e5)
    # same CSF space: A_singlet - A_triplet = 2 (ia|jb)' is positive
    # semidefinite, so every singlet root lies above its triplet partner
    # (Weyl's inequality, exact)
    assert np.all(s.energies_Eh >= t.energies_Eh - 1e-12)
    # the pi->pi* pair: a large exchange splitting, as in full TDA
    n_s = int(np.argmax(s.osc_strength))
    ovl_t = np.abs(np.einsum("ia,nia->n", s.amplitudes[n_s], t.amplitudes))
    gap_eV = (s.energies_Eh[n_s] - t.energies_Eh[int(np.argmax(ovl_t))]) * HARTREE_TO_EV
    assert gap_eV > 0.5


def test_embedding_enters_through_orbitals():
    atoms = validation_geometries()["formaldehyde"]
    vac = _rks(atoms)
    # far away charge: a uniform potential shift, excitations unchanged
    far = qmmm.mm_charge(dft.RKS(_mol(atoms, "sto-3g"), xc="b3lyp"),
                         np.array([[0.0, 0.0, 5.0e3]]), np.array([0.5]), unit="Angstrom")
    far.grids.level = 1
    far.conv_tol = 1e-10
    far.run()
    # TIP3P water donating an H-bond to the carbonyl O (charges and geometry:
    # Jorgensen et al., J. Chem. Phys. 79, 926 (1983)); H at 1.9 Å from O
    # (the C=O axis is x; the water lies in the molecular plane)
    h = np.array([1.21 + 1.9, 0.0, 0.0])
    o = h + np.array([0.9572, 0.0, 0.0])
    h2 = o + 0.9572 * np.array([-np.cos(np.radians(104.52)), np.sin(np.radians(104.52)), 0.0])
    near = qmmm.mm_charge(dft.RKS(_mol(atoms, "sto-3g"), xc="b3lyp"), np.array([h, o, h2]),
                          np.array([0.417, -0.834, 0.417]), unit="Angstrom")
    near.grids.level = 1
    near.conv_tol = 1e-10
    near.run()
    e_vac = stda_response(vac, "singlet", 1).energies_Eh[0]
    e_far = stda_response(far, "singlet", 1).energies_Eh[0]
    e_near = stda_response(near, "singlet", 1).energies_Eh[0]
    assert abs(e_far - e_vac) * HARTREE_TO_EV < 1e-5
    shift_stda_eV = (e_near - e_vac) * HARTREE_TO_EV
    shift_tda_eV = (_tda(near, "singlet", 1).e[0] - _tda(vac, "singlet", 1).e[0]) * HARTREE_TO_EV
    # n->pi* blue shift by an H-bond donor (Renge, J. Phys. Chem. A 113,
    # 10678 (2009): acetone n->pi* +0.22 eV vapour -> water); same sign and
    # similar size as the full TDA shift of the same embedded SCF
    assert shift_tda_eV > 0.02
    assert shift_stda_eV > 0.02
    assert 0.5 < shift_stda_eV / shift_tda_eV < 2.0


def test_input_errors(formaldehyde_mf):
    mf = formaldehyde_mf
    with pytest.raises(InputError, match="'quintet' is an invalid kind"):
        stda_response(mf, "quintet", 2)
    for bad in (0, -1, 2.5, True):
        with pytest.raises(InputError, match="n_states="):
            stda_response(mf, "singlet", bad)
    with pytest.raises(InputError, match="ax=1.5"):
        stda_response(mf, "singlet", 2, ax=1.5)
    with pytest.raises(InputError, match="e_max_eV="):
        stda_response(mf, "singlet", 2, e_max_eV=-1.0)
    with pytest.raises(InputError, match="exceeds"):
        stda_response(mf, "singlet", 10_000)


def test_unconverged_and_open_shell_rejected():
    mol = gto.M(atom="O 0 0 0; H 0 0.7572 0.5865; H 0 -0.7572 0.5865", basis="sto-3g", verbose=0)
    mf = scf.RHF(mol)
    mf.max_cycle = 1
    mf.kernel()
    assert not mf.converged
    with pytest.raises(ConvergenceError, match="not converged"):
        stda_response(mf, "singlet", 1)
    uhf = scf.UHF(gto.M(atom="O 0 0 0; H 0 0 0.97", basis="sto-3g", spin=1, verbose=0)).run()
    with pytest.raises(InputError, match="closed-shell"):
        stda_response(uhf, "singlet", 1)
    hbr = scf.RHF(gto.M(atom="H 0 0 0; Br 0 0 1.41", basis="sto-3g", verbose=0)).run()
    with pytest.raises(InputError, match="'Br'"):
        stda_response(hbr, "singlet", 1)


# --------------------------------------------------------------------------
# validation against full TDA on a set of small molecules
# --------------------------------------------------------------------------
#: Plausibility bound on the mean absolute S1 deviation from full TDA (eV).
#: The sTDA paper (Grimme 2013) reports deviations of roughly 0.2-0.3 eV
#: from full TD-DFT on its test molecules ("from memory"). Measured here:
#: S1 MAD 0.19 eV, max 0.55 eV (B3LYP/6-31G, 10 molecules and one dimer). The bound is the
#: upper end of the published range plus a margin for our small molecules,
#: whose n-pi* and Rydberg-like lowest states suit the monopole
#: approximation less well.
S1_MAD_BOUND_EV = 0.35
S1_MAX_BOUND_EV = 0.6


@pytest.mark.slow
def test_validation_against_full_tda():
    t0 = time.perf_counter()
    rows = []
    for name, atoms in validation_geometries().items():
        mf = _rks(atoms, basis="6-31g", grid_level=0)
        mf.conv_tol = 1e-8
        for kind in ("singlet", "triplet"):
            # 3 roots each: Davidson with a single root can miss the lowest
            td = _tda(mf, kind, 3)
            st = stda_response(mf, kind, 3)
            rows.append((name, kind, td.e[0] * HARTREE_TO_EV, st.energies_Eh[0] * HARTREE_TO_EV))
    elapsed = time.perf_counter() - t0
    d_s = np.array([r[3] - r[2] for r in rows if r[1] == "singlet"])
    d_t = np.array([r[3] - r[2] for r in rows if r[1] == "triplet"])
    print("\nmolecule state TDA_eV sTDA_eV")
    for r in rows:
        print(f"{r[0]} {r[1]} {r[2]:.3f} {r[3]:.3f}")
    print(f"S1 MAD {np.abs(d_s).mean():.3f} max {np.abs(d_s).max():.3f}; "
          f"T1 MAD {np.abs(d_t).mean():.3f} max {np.abs(d_t).max():.3f}; {elapsed:.0f} s")
    assert len(d_s) >= 10
    assert np.abs(d_s).mean() < S1_MAD_BOUND_EV
    assert np.abs(d_s).max() < S1_MAX_BOUND_EV
    # triplets: the sTDA has no exchange-correlation kernel, whose triplet
    # part lowers full-TDA triplets strongly; sTDA T1 must therefore lie
    # above full-TDA T1 on average (a systematic, documented limitation),
    # (measured: T1 MAD 0.95 eV, max 2.1 eV, always above full TDA). sTDA
    # triplets, and so sTDA ΔEST, are not to be trusted; the README says so.
    # What README states is asserted: every sTDA T1 lies above full TDA, MAD
    # 0.95 eV, max 2.1 eV; S1 MAD 0.19 eV, max 0.55 eV. Margin: half a unit of
    # the last digit README prints, plus 5 meV for the SCF (conv_tol 1e-8:
    # orbitals good to ~1e-4, excitation energies to a few meV at worst) and
    # BLAS/thread round-off (far smaller). Measured: T1 0.950/2.111, S1
    # 0.191/0.545 eV. The earlier window (0.75-1.15, max < 2.3) let a run 20 %
    # off the README pass.
    assert np.all(d_t > 0.0)
    assert 0.75 < np.abs(d_t).mean() < 1.15
    assert np.abs(d_t).max() < 2.3
    assert abs(np.abs(d_t).mean() - 0.95) < 0.005 + 0.005
    assert abs(np.abs(d_t).max() - 2.1) < 0.05 + 0.005
    assert abs(np.abs(d_s).mean() - 0.19) < 0.005 + 0.005
    assert abs(np.abs(d_s).max() - 0.55) < 0.005 + 0.005


# --------------------------------------------------------------------------
# the "stda-refined" model: sTDA vectors + two subspace iterations of full TDA
# --------------------------------------------------------------------------
def test_subspace_refine_interlacing_and_exactness():
    from clusterlab.qm.response import subspace_refine

    rng = np.random.default_rng(7)
    a = rng.normal(size=(80, 80))
    a = a + a.T + np.diag(np.linspace(0, 40, 80))
    exact = np.linalg.eigvalsh(a)
    w, v, res = subspace_refine(lambda x: x @ a, np.diag(a).copy(), np.eye(80)[:6], 4)
    # Rayleigh-Ritz values of a symmetric matrix never lie below the exact
    # eigenvalue of the same index (Cauchy interlacing theorem)
    assert len(w) == 10 and np.all(w >= exact[: len(w)] - 1e-10)
    np.testing.assert_allclose(v @ v.T, np.eye(len(w)), atol=1e-10)
    # the correction step lowers the first-step values (a larger space)
    w1 = np.linalg.eigvalsh(a[:6, :6])
    assert np.all(w[:4] <= w1[:4] + 1e-12) and np.all(res > 0)
    # a space that holds the eigenvectors gives them exactly
    _, vecs = np.linalg.eigh(a)
    w, _, res = subspace_refine(lambda x: x @ a, np.diag(a).copy(), vecs[:, :3].T, 3)
    np.testing.assert_allclose(w[:3], exact[:3], atol=1e-10)
    assert np.all(res < 1e-10)


@pytest.mark.slow
def test_refined_model_against_full_tda():
    """The refined model against PySCF's full TDA at the same SCF and grid
    (independent solver, asked for 5 roots): every Ritz value lies on or
    above the exact root of the same index (interlacing, exact), and S1 and
    T1 deviate far less than the published sTDA's (measured here: MAD 2.2 meV
    (S1) and 0.5 meV (T1), max 12.5 and 1.4 meV, B3LYP/6-31G)."""
    from clusterlab import Cluster
    from clusterlab.qm import Method, excitations

    rows = []
    for name, atoms in validation_geometries().items():
        sym = [a[0] for a in atoms]
        pos = np.array([a[1] for a in atoms])
        m = Method(xc="b3lyp", basis="6-31g", density_fit=False, grid_level=0, response_grid_level=None,
                   n_singlets=2, n_triplets=2, excited="stda-refined")
        r = excitations(Cluster.from_arrays(sym, pos), m, vacuum=False)
        mf = r.warm_start.ground.mf
        for kind, states in (("singlet", r.singlets), ("triplet", r.triplets)):
            ref = _tda(mf, kind, 5).e * HARTREE_TO_EV
            got = np.array([s.energy_eV for s in states])
            assert np.all(got >= ref[: len(got)] - 1e-4), (name, kind, got, ref)
            published = stda_response(mf, kind, 3).energies_Eh[0] * HARTREE_TO_EV  # as in the test above
            rows.append((name, kind, ref[0], got[0], published))
    print("\nmolecule state TDA_eV refined_eV sTDA_eV")
    for r_ in rows:
        print(f"{r_[0]} {r_[1]} {r_[2]:.3f} {r_[3]:.3f} {r_[4]:.3f}")
    for kind in ("singlet", "triplet"):
        d = np.array([r_[3] - r_[2] for r_ in rows if r_[1] == kind])
        d_pub = np.array([r_[4] - r_[2] for r_ in rows if r_[1] == kind])
        print(f"{kind}: refined MAD {np.abs(d).mean():.4f} max {np.abs(d).max():.4f}; "
              f"published sTDA MAD {np.abs(d_pub).mean():.3f} max {np.abs(d_pub).max():.3f} eV")
        # README states S1 within 13 meV (mean 2 meV) and T1 within 1.4 meV
        # (mean 0.5 meV) on these molecules; measured 12.5/2.2 and 1.4/0.5 meV.
        # Bounds: README's numbers plus half a unit of their last digit (what
        # the rounding allows) plus 0.1 meV. Both sides of d use one SCF, so
        # its convergence error cancels to first order; what differs between
        # machines is round-off in a Rayleigh-Ritz value (~1e-6 eV). The earlier
        # bounds (4/15 and 1/2 meV) let a model 80 % worse than README pass.
        mad_bound, max_bound = (0.0026, 0.0136) if kind == "singlet" else (0.00056, 0.00146)
        assert np.abs(d).mean() < mad_bound and np.abs(d).max() < max_bound
        assert np.abs(d).mean() < 0.2 * np.abs(d_pub).mean()
