"""Excitonic couplings: unit conversion, orientation signs, and the
transition-charge -> point-dipole limit, with PySCF as an independent
reference for the Coulomb coupling of two transition densities."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc

from clusterlab.errors import InputError
from clusterlab.transport.couplings import (
    orientation_factor,
    pair_transition_charge_couplings,
    point_dipole_coupling,
    transition_charge_coupling,
)

EV_TO_CM1_SI = sc.e / (sc.h * sc.c * 100)


def test_unit_conversion_5034_cm1():
    # Kasha, Rawls & El-Bayoumi, Pure Appl. Chem. 11, 371 (1965):
    # two 1 D dipoles side by side at 1 nm (kappa = 1) couple by 5.034 cm^-1.
    v = point_dipole_coupling([0, 0, 1.0], [0, 0, 1.0], [10.0, 0, 0])
    assert v * EV_TO_CM1_SI == pytest.approx(5.034, abs=0.001)
    # the same in SI with scipy.constants: (1 D)^2 / (4 pi eps0 (1 nm)^3)
    debye = 1e-21 / sc.c
    v_si = debye**2 / (4 * np.pi * sc.epsilon_0 * 1e-27) / sc.e
    assert v == pytest.approx(v_si, rel=1e-10)


def test_orientation_factor_h_and_j():
    # Kasha et al. (1965): parallel side by side kappa = +1 (H aggregate, blue
    # shift), head-to-tail kappa = -2 (J aggregate, red shift), perpendicular 0.
    z, x = [0, 0, 1.0], [1.0, 0, 0]
    assert orientation_factor(z, z, x) == pytest.approx(1.0)
    assert orientation_factor(z, z, z) == pytest.approx(-2.0)
    assert orientation_factor(z, x, [0, 1.0, 0]) == pytest.approx(0.0)
    # magic angle 54.7356 deg in-line: kappa = 0 (cos^2 = 1/3)
    th = np.arccos(1 / np.sqrt(3))
    m = [np.sin(th), 0, np.cos(th)]
    assert orientation_factor(m, m, z) == pytest.approx(0.0, abs=1e-12)
    vh = point_dipole_coupling(z, z, [8.0, 0, 0])
    vj = point_dipole_coupling(z, z, [0, 0, 8.0])
    assert vh > 0 and vj < 0 and vj == pytest.approx(-2 * vh)


def test_point_dipole_vectorised_and_screened():
    rng = np.random.default_rng(0)
    a, b = rng.normal(size=(50, 3)) * 4, rng.normal(size=(50, 3)) * 4
    R = rng.normal(size=(50, 3)) * 10
    v = point_dipole_coupling(a, b, R, n=1.5)
    k = orientation_factor(a, b, R)
    ref = point_dipole_coupling(
        np.linalg.norm(a, axis=1)[:, None] * [0, 0, 1.0],
        np.linalg.norm(b, axis=1)[:, None] * [0, 0, 1.0],
        np.linalg.norm(R, axis=1)[:, None] * [1.0, 0, 0],
    )
    np.testing.assert_allclose(v, k * ref / 1.5**2, rtol=1e-12)
    # R^-3 law
    assert point_dipole_coupling(a[0], b[0], 2 * R[0]) == pytest.approx(
        point_dipole_coupling(a[0], b[0], R[0]) / 8
    )


def _pattern():
    """Synthetic transition charges, odd under inversion (like a pi-pi* transition):
    no quadrupole, so the point-dipole error falls as (size/R)^2."""
    pos = np.array([[1.2, 0.0, 0.0], [0.6, 1.0, 0.0], [0.6, -1.0, 0.3]])
    q = np.array([0.15, -0.05, 0.08])
    return np.concatenate([pos, -pos]), np.concatenate([q, -q])


def test_transition_charges_tend_to_point_dipole():
    # Exact multipole expansion: for charge sets odd under inversion the leading
    # correction to the dipole-dipole term is ~ R^-5, i.e. relative error ~ R^-2.
    pos, q = _pattern()
    mu_D = (q @ pos) / 0.20819434  # e Å -> D (1 D = 0.20819434 e Å, CODATA-derived)
    rot = np.array([[0, -1.0, 0], [1.0, 0, 0], [0, 0, 1.0]])
    posB, muB = pos @ rot.T, mu_D @ rot.T
    direction = np.array([0.3, 0.8, 0.52])
    direction /= np.linalg.norm(direction)
    errs = []
    for R in (20.0, 40.0, 80.0):
        Rv = R * direction
        vt = transition_charge_coupling(pos, q, posB + Rv, q)
        vp = point_dipole_coupling(mu_D, muB, Rv)
        errs.append(abs(vt / vp - 1))
    assert errs[-1] < 1e-3
    assert errs[0] / errs[1] == pytest.approx(4.0, rel=0.1)
    assert errs[1] / errs[2] == pytest.approx(4.0, rel=0.1)


def test_transition_charges_single_pair_exact():
    # Coulomb's law: +q/-q pairs, hand value q1 q2 e^2 / (4 pi eps0 r) in SI.
    v = transition_charge_coupling([[0, 0, 0]], [0.5], [[0, 0, 5.0]], [-0.2])
    ref = 0.5 * -0.2 * sc.e / (4 * np.pi * sc.epsilon_0 * 5e-10)
    assert v == pytest.approx(ref, rel=1e-10)


@pytest.fixture(scope="module")
def h2_transition():
    """H2 lowest singlet (TDA, HF/6-31G) transition density in the AO basis."""
    from pyscf import gto, scf, tdscf

    mol = gto.M(atom="H 0 0 -0.37; H 0 0 0.37", basis="6-31g", verbose=0)
    mf = scf.RHF(mol).run()
    td = tdscf.TDA(mf).run(nstates=1)
    nocc = mol.nelectron // 2
    C = mf.mo_coeff
    rho = 2.0 * C[:, :nocc] @ td.xy[0][0] @ C[:, nocc:].T
    dip_au = np.einsum("xij,ij->x", mol.intor("int1e_r"), rho)
    np.testing.assert_allclose(dip_au, td.transition_dipole()[0], atol=1e-10)
    return mol, rho, dip_au


def _exact_coupling_eV(mol, rho, shift_A):
    """Coulomb integral (rho_A | rho_B) from PySCF two-electron integrals."""
    from pyscf import gto

    atoms = [(a[0], np.array(a[1]) * sc.physical_constants["Bohr radius"][0] * 1e10) for a in mol._atom]
    dimer = gto.M(
        atom=[(s, p) for s, p in atoms] + [(s, p + shift_A) for s, p in atoms],
        basis=mol.basis, unit="Angstrom", verbose=0,
    )
    n = mol.nao
    eri = dimer.intor("int2e")[:n, :n, n:, n:]
    hartree_eV = sc.physical_constants["Hartree energy in eV"][0]
    return float(np.einsum("ij,ijkl,kl->", rho, eri, rho)) * hartree_eV


def test_point_dipole_matches_pyscf_transition_density_coupling(h2_transition):
    # Independent reference: the full Coulomb integral between two H2 transition
    # densities (PySCF integrals) tends to the point-dipole value; relative error
    # falls as R^-2 (the transition density is odd under inversion).
    mol, rho, dip_au = h2_transition
    mu_D = dip_au * sc.physical_constants["Bohr radius"][0] * sc.e / (1e-21 / sc.c)
    rel = []
    for R in (10.0, 20.0):
        shift = np.array([R, 0, 0])
        rel.append(_exact_coupling_eV(mol, rho, shift) / point_dipole_coupling(mu_D, mu_D, shift) - 1)
    assert abs(rel[1]) < 2e-3
    assert rel[0] / rel[1] == pytest.approx(4.0, rel=0.15)


def test_fitted_transition_charges_reproduce_coupling(h2_transition):
    # Transition charges (Madjet, Abdurahman & Renger, J. Phys. Chem. B 110, 17268
    # (2006)): a small least-squares fit of atomic charges (sum zero) to the
    # transition density's electrostatic potential on points 2.5-5 A from the
    # centre; the coupling they give matches the exact Coulomb integral at 6 A
    # within 1% (H2: two atomic charges describe the density well outside it;
    # measured 0.07%), and their dipole matches PySCF's transition dipole.
    mol, rho, dip_au = h2_transition
    rng = np.random.default_rng(1)
    d = rng.normal(size=(400, 3))
    pts_A = d / np.linalg.norm(d, axis=1)[:, None] * rng.uniform(2.5, 5.0, size=(400, 1))
    bohr_A = sc.physical_constants["Bohr radius"][0] * 1e10
    ints = mol.intor("int1e_grids", grids=pts_A / bohr_A)  # (ngrid, nao, nao) of 1/|r-g|
    pot = -np.einsum("gij,ij->g", ints, rho)  # a.u. (electron density counted negative)
    atoms_A = mol.atom_coords() * bohr_A
    # one free parameter: charges (+q, -q) on the two atoms
    basis = (1 / np.linalg.norm(pts_A - atoms_A[0], axis=1) - 1 / np.linalg.norm(pts_A - atoms_A[1], axis=1)) * bohr_A  # bohr^-1
    qfit = float(basis @ pot / (basis @ basis))
    q = np.array([qfit, -qfit])
    shift = np.array([6.0, 0, 0])
    vt = transition_charge_coupling(atoms_A, q, atoms_A + shift, q)
    assert vt == pytest.approx(_exact_coupling_eV(mol, rho, shift), rel=0.01)
    # charge dipole (e Å -> bohr) vs PySCF transition dipole; electron sign convention
    assert np.linalg.norm(q @ atoms_A) / bohr_A == pytest.approx(np.linalg.norm(dip_au), rel=0.01)


def test_errors():
    with pytest.raises(InputError, match="zero-length"):
        point_dipole_coupling([0, 0, 1.0], [0, 0, 1.0], [0, 0, 0])
    with pytest.raises(InputError, match="refractive index"):
        point_dipole_coupling([0, 0, 1.0], [0, 0, 1.0], [1.0, 0, 0], n=0)
    with pytest.raises(InputError, match="one charge per position"):
        transition_charge_coupling([[0, 0, 0]], [1.0, 2.0], [[1.0, 0, 0]], [1.0])
    with pytest.raises(InputError, match="coincides"):
        transition_charge_coupling([[0, 0, 0]], [1.0], [[0, 0, 0]], [1.0])


def test_pair_transition_charge_couplings_match_the_one_pair_sum():
    # Reference: transition_charge_coupling (a direct Coulomb double sum, checked
    # above against Coulomb's law) on each pair, with j's copy translated by hand.
    # Molecules of different sizes and with interleaved atoms exercise the padding.
    rng = np.random.default_rng(3)
    sizes = [3, 5, 2, 4]
    mol = rng.permutation(np.repeat(np.arange(4), sizes))
    cent = rng.uniform(0, 20, size=(4, 3))
    pos = cent[mol] + rng.normal(scale=0.8, size=(mol.size, 3))
    q = rng.normal(scale=0.1, size=mol.size)
    i, j = np.array([0, 0, 1, 2, 3]), np.array([1, 2, 3, 3, 0])
    d = rng.normal(size=(5, 3))
    d = 7.0 * d / np.linalg.norm(d, axis=1)[:, None]
    got = pair_transition_charge_couplings(pos, q, mol, cent, i, j, d, n=1.3)
    for p in range(5):
        a, b = np.flatnonzero(mol == i[p]), np.flatnonzero(mol == j[p])
        pb = pos[b] + (cent[i[p]] + d[p] - cent[j[p]])
        ref = transition_charge_coupling(pos[a], q[a], pb, q[b], n=1.3)
        assert got[p] == pytest.approx(ref, rel=1e-12, abs=1e-15)
    assert pair_transition_charge_couplings(pos, q, mol, cent, [], [], np.zeros((0, 3))).shape == (0,)


def test_pair_transition_charge_couplings_reject_bad_input():
    pos, mol, cent = np.zeros((2, 3)) + [[0, 0, 0], [0, 0, 1.0]], [0, 1], [[0, 0, 0], [0, 0, 1.0]]
    with pytest.raises(InputError, match="one entry per atom"):
        pair_transition_charge_couplings(pos, [0.1], mol, cent, [0], [1], [[5.0, 0, 0]])
    with pytest.raises(InputError, match="charges_e must be finite"):
        pair_transition_charge_couplings(pos, [np.nan, 0.1], mol, cent, [0], [1], [[5.0, 0, 0]])
    with pytest.raises(InputError, match="same pairs"):
        pair_transition_charge_couplings(pos, [0.1, 0.1], mol, cent, [0, 1], [1], [[5.0, 0, 0]])
    with pytest.raises(InputError, match="molecule ids in 0..1"):
        pair_transition_charge_couplings(pos, [0.1, 0.1], mol, cent, [0], [2], [[5.0, 0, 0]])
    with pytest.raises(InputError, match="refractive index"):
        pair_transition_charge_couplings(pos, [0.1, 0.1], mol, cent, [0], [1], [[5.0, 0, 0]], n=-1.0)
    with pytest.raises(InputError, match="coincides"):
        pair_transition_charge_couplings(pos, [0.1, 0.1], mol, cent, [0], [1], [[0, 0, 0.0]])
