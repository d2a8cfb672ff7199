"""Thole induced-dipole model against analytic results and experiment."""

import numpy as np
import pytest

from clusterlab.electrostatics.thole import (
    THOLE_EXP_A,
    atomic_polarizabilities,
    dipole_tensor_matrix,
    molecular_polarizability,
    permanent_field,
    polarization_energy,
    solve_induced_dipoles,
    thole_lambdas,
)
from clusterlab.errors import ConvergenceError, InputError
from clusterlab.units import BOHR_A, COULOMB_EV_A


def water():
    th, r = np.radians(104.52), 0.9572  # TIP3P geometry, Jorgensen et al. 1983
    return ["O", "H", "H"], np.array([[0, 0, 0], [r * np.sin(th / 2), 0, r * np.cos(th / 2)],
                                      [-r * np.sin(th / 2), 0, r * np.cos(th / 2)]])


def benzene():
    ang = np.arange(6) * np.pi / 3
    rc, rh = 1.397, 1.397 + 1.084  # common ring geometry (C-C 1.397 Å, C-H 1.084 Å)
    c = np.c_[rc * np.cos(ang), rc * np.sin(ang), 0 * ang]
    h = np.c_[rh * np.cos(ang), rh * np.sin(ang), 0 * ang]
    return ["C"] * 6 + ["H"] * 6, np.vstack([c, h])


def test_polarizability_table_units():
    # van Duijnen & Swart 1998, exponential model: alpha_C = 8.6959 bohr^3 (project table, from memory)
    al = atomic_polarizabilities(["C", "h"])
    assert al[0] == pytest.approx(8.6959 * BOHR_A**3, rel=1e-12)
    assert al[1] == pytest.approx(2.7927 * BOHR_A**3, rel=1e-12)
    with pytest.raises(InputError, match="no Thole polarizability for element 'Xe'"):
        atomic_polarizabilities(["Xe"])


def test_damped_tensor_is_gradient_of_smeared_potential():
    """Physical law: the Thole field factor lambda3 is -d/dr of the potential of the
    exponential charge density, phi(r) = [1 - (1 + v/2) e^-v]/r (Thole 1981)."""
    a1, a2 = 1.3, 0.6
    s = (a1 * a2) ** (1 / 6)
    r = np.linspace(0.3, 4.0, 25)
    h = 1e-5

    def phi(x):
        v = THOLE_EXP_A * x / s
        return (1 - (1 + v / 2) * np.exp(-v)) / x

    l3, l5 = thole_lambdas(r, a1, a2)
    field = -(phi(r + h) - phi(r - h)) / (2 * h)
    assert np.allclose(l3 / r**2, field, rtol=1e-7)
    # second derivative gives lambda5: d2phi/dr2 = (3 l5 - l3)/r^3
    d2 = (phi(r + h) - 2 * phi(r) + phi(r - h)) / h**2
    assert np.allclose((3 * l5 - l3) / r**3, d2, rtol=1e-4)


@pytest.mark.parametrize("r", [1.0, 1.5, 3.0])
def test_dimer_polarizability_analytic(r):
    """Two sites on z: alpha_par = (a1+a2+2 a1 a2 t)/(1-a1 a2 t^2) with t = (3 l5 - l3)/r^3,
    alpha_perp the same with t = -l3/r^3 (from mu_i = a_i (E + T mu_j);
    undamped limit: Applequist, Carl & Fung, J. Am. Chem. Soc. 94, 2952 (1972))."""
    al = atomic_polarizabilities(["C", "O"])
    pos = np.array([[0, 0, 0], [0, 0, r]])
    l3, l5 = thole_lambdas(r, al[0], al[1])
    a1, a2 = al

    def pair(t):
        return (a1 + a2 + 2 * a1 * a2 * t) / (1 - a1 * a2 * t * t)

    tens = molecular_polarizability(["C", "O"], pos)
    assert tens[2, 2] == pytest.approx(pair((3 * l5 - l3) / r**3), rel=1e-10)
    assert tens[0, 0] == pytest.approx(pair(-l3 / r**3), rel=1e-10)
    assert tens[1, 1] == pytest.approx(tens[0, 0], rel=1e-12)
    # iterative solvers in a unit field along z give the same total dipole
    for method in ("cg", "jacobi"):
        res = solve_induced_dipoles(pos, al, np.tile([0, 0, COULOMB_EV_A], (2, 1)), method=method,
                                    tol_eA=1e-10)
        assert res.converged
        assert res.dipoles_eA.sum(axis=0)[2] == pytest.approx(tens[2, 2], rel=1e-7)


def test_iterative_matches_direct_random_field():
    rng = np.random.default_rng(3)
    sym, pos = benzene()
    al = atomic_polarizabilities(sym)
    field = rng.normal(size=(len(sym), 3))
    ref = solve_induced_dipoles(pos, al, field, method="direct")
    assert np.allclose(ref.dipoles_eA.ravel(),
                       np.linalg.solve(np.diag(1 / np.repeat(al, 3)) - dipole_tensor_matrix(pos, al),
                                       field.ravel() / COULOMB_EV_A), rtol=1e-10)
    for method in ("cg", "jacobi"):
        res = solve_induced_dipoles(pos, al, field, method=method, tol_eA=1e-10)
        assert res.converged and res.iterations > 1
        assert np.allclose(res.dipoles_eA, ref.dipoles_eA, atol=1e-9)
        assert res.energy_eV == pytest.approx(ref.energy_eV, rel=1e-8)


def test_several_fields_at_once_match_one_by_one():
    """A stack of fields (k, n, 3): the dense block CG (the automatic choice
    without cutoff) gives each field's dipoles and energy of the direct solve;
    "cg" on the stack gives exactly what one field at a time gives; the
    automatic choice for one field (n, 3) is exactly "cg"."""
    rng = np.random.default_rng(8)
    sym, pos = benzene()
    al = atomic_polarizabilities(sym)
    fields = rng.normal(size=(3, len(sym), 3))
    dense = solve_induced_dipoles(pos, al, fields, tol_eA=1e-10)
    per_cg = solve_induced_dipoles(pos, al, fields, method="cg", tol_eA=1e-10)
    assert len(dense) == 3 and all(p.method == "dense-cg" and p.converged for p in dense)
    for k, f in enumerate(fields):
        ref = solve_induced_dipoles(pos, al, f, method="direct")
        assert np.allclose(dense[k].dipoles_eA, ref.dipoles_eA, atol=1e-9)
        assert dense[k].energy_eV == pytest.approx(ref.energy_eV, rel=1e-8)
        one = solve_induced_dipoles(pos, al, f, method="cg", tol_eA=1e-10)
        assert np.array_equal(per_cg[k].dipoles_eA, one.dipoles_eA) and per_cg[k].energy_eV == one.energy_eV
        auto = solve_induced_dipoles(pos, al, f, tol_eA=1e-10)
        assert auto.method == "cg" and np.array_equal(auto.dipoles_eA, one.dipoles_eA)
    # a cutoff keeps the stack on the pair-list path
    assert {p.method for p in solve_induced_dipoles(pos, al, fields, cutoff_A=4.0)} == {"cg"}
    with pytest.raises(InputError, match=r"field_V_per_A must have shape \(12, 3\) or \(k, 12, 3\)"):
        solve_induced_dipoles(pos, al, fields[:, :5])
    with pytest.raises(InputError, match="invalid method"):
        solve_induced_dipoles(pos, al, fields, method="block")


def test_non_convergence_is_flagged_or_raised():
    sym, pos = benzene()
    al = atomic_polarizabilities(sym)
    field = np.ones((12, 3))
    res = solve_induced_dipoles(pos, al, field, method="jacobi", max_iter=2)
    assert not res.converged and res.residual_eA > 1e-8
    with pytest.raises(ConvergenceError, match="did not converge"):
        solve_induced_dipoles(pos, al, field, method="jacobi", max_iter=2, raise_on_fail=True)


@pytest.mark.parametrize(
    "name, exp_A3",
    [
        # experimental mean polarizabilities (from memory; CRC Handbook, "Atomic and
        # molecular polarizabilities"): water 1.45 Å^3, benzene 10.3 Å^3
        ("water", 1.45),
        ("benzene", 10.3),
    ],
)
def test_molecular_polarizability_vs_experiment(name, exp_A3):
    sym, pos = water() if name == "water" else benzene()
    mean = np.trace(molecular_polarizability(sym, pos)) / 3
    assert mean == pytest.approx(exp_A3, rel=0.15)


def test_benzene_anisotropy_sign():
    # experiment: in-plane polarizability exceeds out-of-plane (alpha_par ~12.3, alpha_perp ~6.7 Å^3,
    # from memory); the Thole model must reproduce the ordering
    sym, pos = benzene()
    t = molecular_polarizability(sym, pos)
    assert t[0, 0] > 1.5 * t[2, 2]
    assert t[0, 0] == pytest.approx(t[1, 1], rel=1e-8)


def test_charge_far_from_molecule_r4_law():
    """Physics: U = -(1/2) E.alpha.E with E = q/r^2 -> -alpha q^2/(2 r^4) at large r."""
    sym, pos = benzene()
    tens = molecular_polarizability(sym, pos)
    u = []
    for r in (20.0, 40.0):
        q_pos = np.array([[r, 0.0, 0.0]])
        res = polarization_energy(pos, sym, q_pos, [1.0], method="cg", tol_eA=1e-12)
        assert res.converged and res.energy_eV < 0
        u.append(res.energy_eV)
        limit = -0.5 * tens[0, 0] * COULOMB_EV_A / r**4
        assert res.energy_eV == pytest.approx(limit, rel=0.05 if r < 30 else 0.012)
        # finite-size correction ~ (molecular radius / r)^2: about 3.5 % at 20 Å, 0.9 % at 40 Å
    assert u[0] / u[1] == pytest.approx(16.0, rel=0.05)


def test_permanent_field_excludes_own_molecule():
    sites = np.array([[0.0, 0, 0], [1.0, 0, 0]])
    charges = np.array([[0.5, 0, 0], [5.0, 0, 0]])
    f = permanent_field(sites, charges, [1.0, 2.0], site_molecules=[0, 0], charge_molecules=[0, 1])
    expect = COULOMB_EV_A * 2.0 * np.array([[-1 / 25.0, 0, 0], [-1 / 16.0, 0, 0]])
    assert np.allclose(f, expect, rtol=1e-12)
    f_cut = permanent_field(sites, charges, [1.0, 2.0], site_molecules=[0, 0], charge_molecules=[0, 1],
                            cutoff_A=4.5)
    assert np.allclose(f_cut, [[0, 0, 0], expect[1]])
