"""Induced-dipole polarization with Thole's exponential damping.

Model (Thole, Chem. Phys. 59, 341 (1981); parameters of van Duijnen & Swart,
J. Phys. Chem. A 102, 2399 (1998)): every atom i carries an isotropic
polarizability :math:`\\alpha_i` and an induced dipole

.. math:: \\boldsymbol\\mu_i = \\alpha_i \\Big(\\mathbf E^0_i + \\sum_{j \\ne i} \\mathsf T_{ij} \\boldsymbol\\mu_j\\Big),
   \\qquad
   \\mathsf T_{ij} = \\lambda_5 \\frac{3\\,\\mathbf r\\mathbf r^{\\mathsf T}}{r^5} - \\lambda_3 \\frac{\\mathsf 1}{r^3},

with :math:`v = a\\, r/(\\alpha_i\\alpha_j)^{1/6}`,
:math:`\\lambda_3 = 1-(1+v+v^2/2)e^{-v}` and
:math:`\\lambda_5 = 1-(1+v+v^2/2+v^3/6)e^{-v}` (exponential charge smearing,
``a = 2.1304``). The polarization energy is
:math:`U = -\\tfrac12 \\sum_i \\boldsymbol\\mu_i\\cdot\\mathbf E^0_i`.

Exclusion rule (common practice for polarizable embedding): the permanent
field :math:`\\mathbf E^0_i` on an atom comes only from the charges of *other*
molecules (a molecule's own charges already describe its own polarized
density); every pair of induced dipoles couples, including pairs within one
molecule, through the damped tensor, so a molecule has its proper
anisotropic polarizability. The permanent field is not damped (it comes from
other molecules, at intermolecular distances).

Units: positions Å, polarizabilities Å³, charges e, fields V/Å, dipoles e·Å,
energies eV. Internally Gaussian-type units (e, Å) are used: the field in
e/Å² is ``field_V_per_A / COULOMB_EV_A`` and ``mu = alpha * field``.

The model is non-periodic (a cluster); for a periodic permanent field use
:func:`clusterlab.electrostatics.ewald.ewald_potential` with ``field=True``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.spatial import cKDTree

from ..errors import ConvergenceError, InputError
from ..units import BOHR_A, COULOMB_EV_A

FloatArray = npt.NDArray[np.float64]

#: Exponential-damping parameter a (dimensionless), van Duijnen & Swart 1998.
THOLE_EXP_A = 2.1304

#: Atomic polarizabilities of the exponential Thole model (bohr^3), van Duijnen
#: & Swart, J. Phys. Chem. A 102, 2399 (1998). H, C, N, O as in the project's
#: reference table (from memory, not yet checked against the paper's table);
#: F, S, Cl, Br, I from memory.
THOLE_EXP_POLARIZABILITY_BOHR3: dict[str, float] = {
    "H": 2.7927,
    "C": 8.6959,
    "N": 6.5565,
    "O": 5.7494,
    "F": 3.0013,
    "S": 16.6984,
    "Cl": 16.1979,
    "Br": 23.5714,
    "I": 36.9880,
}

__all__ = [
    "THOLE_EXP_A",
    "THOLE_EXP_POLARIZABILITY_BOHR3",
    "Polarization",
    "atomic_polarizabilities",
    "thole_lambdas",
    "permanent_field",
    "dipole_tensor_matrix",
    "solve_induced_dipoles",
    "SOLVE_METHODS",
    "polarization_energy",
    "molecular_polarizability",
]


def atomic_polarizabilities(
    symbols: list[str] | tuple[str, ...], table: dict[str, float] | None = None
) -> FloatArray:
    """Polarizabilities (Å³) of atoms by element.

    Parameters
    ----------
    symbols : sequence of str
        Element symbols (case-insensitive: "CL" and "cl" both mean Cl).
    table : dict, optional
        Element -> polarizability in bohr³; default
        :data:`THOLE_EXP_POLARIZABILITY_BOHR3`.

    Raises
    ------
    InputError
        For an element the table lacks.
    """
    tab = THOLE_EXP_POLARIZABILITY_BOHR3 if table is None else table
    norm = {k.capitalize(): v for k, v in tab.items()}
    out = np.empty(len(symbols))
    for n, s in enumerate(symbols):
        key = str(s).strip().capitalize()
        if key not in norm:
            raise InputError(
                f"no Thole polarizability for element {s!r}; known elements: {sorted(norm)}. "
                "Pass table={...} (bohr^3) to add one."
            )
        out[n] = norm[key]
    return out * BOHR_A**3


def thole_lambdas(r_A: npt.ArrayLike, alpha_i_A3: npt.ArrayLike, alpha_j_A3: npt.ArrayLike,
                  a: float = THOLE_EXP_A) -> tuple[FloatArray, FloatArray]:
    """Exponential Thole damping factors λ3 and λ5 for pair distances.

    Returns
    -------
    lambda3, lambda5 : ndarray, same shape as ``r_A``
    """
    r = np.asarray(r_A, dtype=np.float64)
    s = (np.asarray(alpha_i_A3) * np.asarray(alpha_j_A3)) ** (1.0 / 6.0)
    v = a * r / s
    e = np.exp(-v)
    l3 = 1.0 - (1.0 + v + 0.5 * v * v) * e
    l5 = l3 - (v**3 / 6.0) * e
    return l3, l5


def _check_sites(positions_A: npt.ArrayLike, alpha_A3: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    al = np.asarray(alpha_A3, dtype=np.float64).ravel()
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"positions_A must have shape (n, 3) in Å; got {pos.shape}.")
    if len(al) != len(pos):
        raise InputError(f"{len(al)} polarizabilities for {len(pos)} sites; they must match.")
    if np.any(al < 0) or not np.all(np.isfinite(al)):
        raise InputError("polarizabilities must be finite and non-negative (Å^3).")
    return pos, al


def permanent_field(
    site_positions_A: npt.ArrayLike,
    charge_positions_A: npt.ArrayLike,
    charges_e: npt.ArrayLike,
    *,
    site_molecules: npt.ArrayLike | None = None,
    charge_molecules: npt.ArrayLike | None = None,
    cutoff_A: float | None = None,
) -> FloatArray:
    """Field (V/Å) of point charges at sites, leaving out each site's own molecule.

    Parameters
    ----------
    site_positions_A : array_like, shape (n, 3), Å
    charge_positions_A : array_like, shape (m, 3), Å
    charges_e : array_like, shape (m,), e
    site_molecules, charge_molecules : array_like of int, optional
        Molecule ids; charges with the site's id are left out. A charge
        closer than 1e-8 Å to a site is always left out.
    cutoff_A : float, optional
        Leave out charges farther than this (default: all charges).

    Returns
    -------
    ndarray, shape (n, 3), V/Å
    """
    sp = np.atleast_2d(np.asarray(site_positions_A, dtype=np.float64))
    cp = np.atleast_2d(np.asarray(charge_positions_A, dtype=np.float64))
    q = np.asarray(charges_e, dtype=np.float64).ravel()
    if len(q) != len(cp):
        raise InputError(f"{len(q)} charges for {len(cp)} charge positions; they must match.")
    sm = None if site_molecules is None else np.asarray(site_molecules).ravel()
    cm = None if charge_molecules is None else np.asarray(charge_molecules).ravel()
    if (sm is None) != (cm is None):
        raise InputError("give both site_molecules and charge_molecules, or neither.")
    out = np.zeros((len(sp), 3))
    if len(cp) == 0 or len(sp) == 0:
        return out
    if cutoff_A is not None:
        pairs = cKDTree(sp).sparse_distance_matrix(cKDTree(cp), cutoff_A, output_type="ndarray")
        i, j = pairs["i"].astype(np.int64), pairs["j"].astype(np.int64)
        chunks = [(i, j)]
    else:
        step = max(1, 2_000_000 // len(cp))
        chunks = []
        for s in range(0, len(sp), step):
            ii, jj = np.meshgrid(np.arange(s, min(s + step, len(sp))), np.arange(len(cp)), indexing="ij")
            chunks.append((ii.ravel(), jj.ravel()))
    for i, j in chunks:
        if sm is not None:
            keep = sm[i] != cm[j]
            i, j = i[keep], j[keep]
        d = sp[i] - cp[j]
        r = np.linalg.norm(d, axis=1)
        keep = r > 1e-8
        i, d, r, qj = i[keep], d[keep], r[keep], q[j[keep]]
        w = qj / r**3
        for x in range(3):
            out[:, x] += np.bincount(i, weights=w * d[:, x], minlength=len(sp))
    return out * COULOMB_EV_A


class _Coupling:
    """Matrix-free application of the damped dipole tensor T (e/Å^3 units)."""

    def __init__(self, pos: FloatArray, alpha: FloatArray, a: float, cutoff_A: float | None):
        n = len(pos)
        if cutoff_A is None:
            i, j = np.triu_indices(n, k=1)
        else:
            pairs = cKDTree(pos).query_pairs(cutoff_A, output_type="ndarray")
            i, j = pairs[:, 0].astype(np.int64), pairs[:, 1].astype(np.int64)
        d = pos[i] - pos[j]
        r = np.linalg.norm(d, axis=1)
        if np.any(r < 1e-6):
            raise InputError("two polarizable sites coincide (distance < 1e-6 Å).")
        l3, l5 = thole_lambdas(r, alpha[i], alpha[j], a)
        self.n, self.i, self.j = n, i, j
        self.u = d / r[:, None]
        self.c3 = l3 / r**3
        self.c5 = 3.0 * l5 / r**3

    def apply(self, mu: FloatArray) -> FloatArray:
        """Field at each site from all other dipoles: sum_j T_ij mu_j, shape (n, 3)."""
        i, j, u = self.i, self.j, self.u
        mj, mi = mu[j], mu[i]
        uj = np.einsum("px,px->p", u, mj)
        ui = np.einsum("px,px->p", u, mi)
        f_i = self.c5[:, None] * uj[:, None] * u - self.c3[:, None] * mj
        f_j = self.c5[:, None] * ui[:, None] * u - self.c3[:, None] * mi
        out = np.empty((self.n, 3))
        for x in range(3):
            out[:, x] = np.bincount(i, weights=f_i[:, x], minlength=self.n) + np.bincount(
                j, weights=f_j[:, x], minlength=self.n
            )
        return out


def dipole_tensor_matrix(positions_A: npt.ArrayLike, alpha_A3: npt.ArrayLike,
                         a: float = THOLE_EXP_A) -> FloatArray:
    """Dense damped coupling matrix T, shape (3n, 3n) (1/Å³), zero diagonal blocks.

    For small systems (direct solves, tests); memory grows as 9 n².
    """
    pos, al = _check_sites(positions_A, alpha_A3)
    n = len(pos)
    d = pos[:, None, :] - pos[None, :, :]
    r = np.linalg.norm(d, axis=2)
    np.fill_diagonal(r, 1.0)
    l3, l5 = thole_lambdas(r, al[:, None], al[None, :], a)
    u = d / r[:, :, None]
    t = 3 * (l5 / r**3)[:, :, None, None] * u[:, :, :, None] * u[:, :, None, :] - (
        l3 / r**3
    )[:, :, None, None] * np.eye(3)
    t[np.arange(n), np.arange(n)] = 0.0
    return t.transpose(0, 2, 1, 3).reshape(3 * n, 3 * n)


@dataclass(frozen=True)
class Polarization:
    """Result of an induced-dipole solve.

    Attributes
    ----------
    dipoles_eA : ndarray, shape (n, 3), e·Å
    energy_eV : float
        :math:`-\\tfrac12 \\sum_i \\mu_i \\cdot E^0_i`.
    converged : bool
    iterations : int
    residual_eA : float
        Largest component of ``mu - alpha (E0 + T mu)`` at the end (e·Å).
    method : str
    """

    dipoles_eA: FloatArray
    energy_eV: float
    converged: bool
    iterations: int
    residual_eA: float
    method: str


#: Methods of :func:`solve_induced_dipoles`.
SOLVE_METHODS = ("auto", "cg", "dense-cg", "jacobi", "direct")
#: Largest 3n for which ``method="auto"`` builds the dense tensor (about 230 MB).
_DENSE_MAX = 5400


def solve_induced_dipoles(
    positions_A: npt.ArrayLike,
    alpha_A3: npt.ArrayLike,
    field_V_per_A: npt.ArrayLike,
    *,
    a: float = THOLE_EXP_A,
    method: str = "auto",
    tol_eA: float = 1e-8,
    max_iter: int = 500,
    omega: float = 0.8,
    cutoff_A: float | None = None,
    raise_on_fail: bool = False,
) -> Polarization | tuple[Polarization, ...]:
    """Induced dipoles in one or several permanent fields, by an iterative or a direct solve.

    Solves :math:`(\\alpha^{-1} - \\mathsf T)\\,\\mu = \\mathbf E^0`, written
    as :math:`(1 - \\alpha \\mathsf T)\\mu = \\alpha \\mathbf E^0` so that
    zero-polarizability sites are allowed.

    Parameters
    ----------
    positions_A : array_like, shape (n, 3), Å
    alpha_A3 : array_like, shape (n,), Å³
    field_V_per_A : array_like, shape (n, 3) or (k, n, 3), V/Å
        Permanent field at each site (see :func:`permanent_field`); a stack
        of k fields is solved for at once (same sites, one solution each).
    a : float
        Thole damping parameter.
    method : {"auto", "cg", "dense-cg", "jacobi", "direct"}
        ``"cg"``: preconditioned conjugate gradients on the symmetric system
        :math:`\\alpha^{1/2}(\\alpha^{-1}-T)\\alpha^{1/2}`, with the coupling
        applied pair by pair (memory grows with the pairs, so ``cutoff_A``
        can thin it), one field after the other;
        ``"dense-cg"``: the same conjugate gradients for all fields at once
        (block), with the dense tensor of :func:`dipole_tensor_matrix`
        (memory 72 n² bytes; one matrix product per iteration for all k
        fields; a field stops when its residual is below ``tol_eA``);
        ``"jacobi"``: relaxed Jacobi iteration
        :math:`\\mu \\leftarrow (1-\\omega)\\mu + \\omega\\alpha(E^0+T\\mu)`;
        ``"direct"``: dense linear solve (small systems, reference).
        ``"auto"`` (default): ``"dense-cg"`` for a stack of fields (k, n, 3)
        without ``cutoff_A`` when 3n <= 5400, ``"cg"`` otherwise (so one
        field of shape (n, 3) is solved exactly as by ``"cg"``).
    tol_eA : float
        Convergence: largest residual component below this (e·Å).
    max_iter : int
    omega : float
        Relaxation factor of ``"jacobi"`` (0 < omega <= 1 damps the iteration).
    cutoff_A : float, optional
        Leave out dipole-dipole pairs beyond this distance (default: all pairs).
    raise_on_fail : bool
        Raise :class:`~clusterlab.errors.ConvergenceError` instead of returning
        ``converged=False``.

    Returns
    -------
    Polarization
        For one field of shape (n, 3); a tuple of k of them (in the order of
        the stack) for fields of shape (k, n, 3).

    Raises
    ------
    InputError
        Bad shapes, polarizabilities, method or omega.
    ConvergenceError
        Only with ``raise_on_fail=True``.
    """
    pos, al = _check_sites(positions_A, alpha_A3)
    n = len(pos)
    fields = np.asarray(field_V_per_A, dtype=np.float64)
    stacked = fields.ndim == 3
    if (stacked and fields.shape[1:] != (n, 3)) or (not stacked and fields.size != 3 * n):
        raise InputError(f"field_V_per_A must have shape ({n}, 3) or (k, {n}, 3) for {n} sites; got {fields.shape}.")
    if method not in SOLVE_METHODS:
        raise InputError(f"{method!r} is an invalid method. Use {', '.join(map(repr, SOLVE_METHODS))}.")
    if not 0 < omega <= 1.5:
        raise InputError(f"omega must lie in (0, 1.5]; got {omega!r}.")
    if method == "auto":
        method = "dense-cg" if stacked and cutoff_A is None and 3 * n <= _DENSE_MAX else "cg"
    e0 = fields.reshape(-1, n, 3) / COULOMB_EV_A
    if n == 0:
        out = [Polarization(np.zeros((0, 3)), 0.0, True, 0, 0.0, method) for _ in e0]
    elif method == "dense-cg":
        out = _dense_block_cg(pos, al, e0, a, cutoff_A, tol_eA, max_iter)
    else:
        out = [_solve_one(pos, al, e, a, method, tol_eA, max_iter, omega, cutoff_A) for e in e0]
    for pol in out:
        if not pol.converged and raise_on_fail:
            raise ConvergenceError(
                f"induced dipoles did not converge with method {method!r}: residual {pol.residual_eA:.3g} e·Å "
                f"after {pol.iterations} iterations (tol_eA={tol_eA}). Raise max_iter, lower omega, or check "
                "for sites that are too close (polarization catastrophe)."
            )
    return tuple(out) if stacked else out[0]


def _masked_tensor(pos: FloatArray, al: FloatArray, a: float, cutoff_A: float | None) -> FloatArray:
    """Dense T of :func:`dipole_tensor_matrix`, pairs beyond ``cutoff_A`` set to zero."""
    t = dipole_tensor_matrix(pos, al, a)
    if cutoff_A is not None:
        rr = np.linalg.norm(pos[:, None] - pos[None], axis=2)
        t = t * np.repeat(np.repeat(rr <= cutoff_A, 3, 0), 3, 1)
    return t


def _solve_one(pos: FloatArray, al: FloatArray, e0: FloatArray, a: float, method: str, tol_eA: float,
               max_iter: int, omega: float, cutoff_A: float | None) -> Polarization:
    """One field (n, 3) in e/Å² by "cg", "jacobi" or "direct"."""
    n = len(pos)
    rhs = al[:, None] * e0
    if method == "direct":
        t = _masked_tensor(pos, al, a, cutoff_A)
        m = np.eye(3 * n) - np.repeat(al, 3)[:, None] * t
        mu = np.linalg.solve(m, rhs.ravel()).reshape(n, 3)
        coup = None
        it = 1
    else:
        coup = _Coupling(pos, al, a, cutoff_A)
        if method == "jacobi":
            mu = rhs.copy()
            it = 0
            for it in range(1, max_iter + 1):
                new = rhs + al[:, None] * coup.apply(mu)
                step = new - mu
                mu = mu + omega * step
                if np.max(np.abs(step)) < tol_eA:
                    break
        else:
            # symmetric form: y = alpha^-1/2 mu;  (1 - s T s) y = s E0, s = alpha^1/2
            s = np.sqrt(al)[:, None]
            b = s * e0
            y = s * e0
            r = b - (y - s * coup.apply(s * y))
            pvec = r.copy()
            rs = float(np.sum(r * r))
            it = 0
            for it in range(1, max_iter + 1):
                ap = pvec - s * coup.apply(s * pvec)
                pap = float(np.sum(pvec * ap))
                if pap <= 0:
                    break  # not positive definite: polarization catastrophe
                step = rs / pap
                y = y + step * pvec
                r = r - step * ap
                rs_new = float(np.sum(r * r))
                if np.max(np.abs(s * r)) < 0.1 * tol_eA:
                    break
                pvec = r + (rs_new / rs) * pvec
                rs = rs_new
            mu = s * y
    if coup is None:
        resid = mu - rhs - al[:, None] * (dipole_tensor_matrix(pos, al, a) @ mu.ravel()).reshape(n, 3)
    else:
        resid = mu - rhs - al[:, None] * coup.apply(mu)
    res = float(np.max(np.abs(resid)))
    converged = bool(res < tol_eA and np.all(np.isfinite(mu)))
    energy = -0.5 * float(np.sum(mu * e0)) * COULOMB_EV_A
    return Polarization(mu, energy, converged, it, res, method)


def _dense_block_cg(pos: FloatArray, al: FloatArray, e0_k: FloatArray, a: float, cutoff_A: float | None,
                    tol_eA: float, max_iter: int) -> list[Polarization]:
    """Fields (k, n, 3) in e/Å² at once: conjugate gradients on the symmetric
    system (1 - s T s) y = s E0, s = alpha^1/2, mu = s y (the equations of "cg"),
    one column per field, with the dense tensor."""
    k, n = len(e0_k), len(pos)
    s = np.repeat(np.sqrt(al), 3)
    mat = -(s[:, None] * _masked_tensor(pos, al, a, cutoff_A) * s[None, :])
    mat[np.diag_indices_from(mat)] += 1.0
    e0 = np.ascontiguousarray(e0_k.reshape(k, 3 * n).T)                  # (3n, k), e/Å^2
    b = s[:, None] * e0
    y = b.copy()
    r = b - mat @ y
    p = r.copy()
    rs = np.einsum("ik,ik->k", r, r)
    done = np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
    its = np.zeros(k, np.int64)
    for it in range(1, max_iter + 1):
        if done.all():
            break
        its[~done] = it
        ap = mat @ p
        pap = np.einsum("ik,ik->k", p, ap)
        step = np.where(done | (pap <= 0), 0.0, rs / np.where(pap > 0, pap, 1.0))
        y += step * p
        r -= step * ap
        rs_new = np.einsum("ik,ik->k", r, r)
        done |= np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
        done |= pap <= 0                                                   # not positive definite
        p = r + np.where(rs > 0, rs_new / np.where(rs > 0, rs, 1.0), 0.0) * p
        rs = rs_new
    mu = s[:, None] * y
    resid = np.max(np.abs(s[:, None] * (b - mat @ y)), axis=0)
    energy = -0.5 * np.einsum("ik,ik->k", mu, e0) * COULOMB_EV_A
    return [Polarization(np.ascontiguousarray(mu[:, j].reshape(n, 3)), float(energy[j]),
                         bool(resid[j] < tol_eA and np.all(np.isfinite(mu[:, j]))), int(its[j]), float(resid[j]),
                         "dense-cg") for j in range(k)]


def polarization_energy(
    site_positions_A: npt.ArrayLike,
    site_symbols: list[str] | tuple[str, ...],
    charge_positions_A: npt.ArrayLike,
    charges_e: npt.ArrayLike,
    *,
    site_molecules: npt.ArrayLike | None = None,
    charge_molecules: npt.ArrayLike | None = None,
    **solve_kw,
) -> Polarization:
    """Polarization of Thole sites by point charges: field with the molecule
    exclusion rule, then :func:`solve_induced_dipoles`.

    Parameters
    ----------
    site_positions_A : (n, 3) Å; site_symbols : elements of the sites
    charge_positions_A : (m, 3) Å; charges_e : (m,) e
    site_molecules, charge_molecules : molecule ids (see :func:`permanent_field`)
    **solve_kw : passed to :func:`solve_induced_dipoles`
    """
    al = atomic_polarizabilities(site_symbols)
    e0 = permanent_field(site_positions_A, charge_positions_A, charges_e,
                         site_molecules=site_molecules, charge_molecules=charge_molecules)
    return solve_induced_dipoles(site_positions_A, al, e0, **solve_kw)


def molecular_polarizability(
    symbols: list[str] | tuple[str, ...],
    positions_A: npt.ArrayLike,
    *,
    alpha_A3: npt.ArrayLike | None = None,
    a: float = THOLE_EXP_A,
) -> FloatArray:
    """Molecular polarizability tensor (Å³) of the Thole model, by a direct solve.

    :math:`\\alpha_{mol} = \\sum_{ij} [(\\alpha^{-1} - T)^{-1}]_{ij}` (3x3 blocks).
    The isotropic (mean) polarizability is ``trace / 3``.

    Returns
    -------
    ndarray, shape (3, 3), Å³
    """
    al = atomic_polarizabilities(symbols) if alpha_A3 is None else np.asarray(alpha_A3, float)
    pos, al = _check_sites(positions_A, al)
    n = len(pos)
    t = dipole_tensor_matrix(pos, al, a)
    m = np.eye(3 * n) - np.repeat(al, 3)[:, None] * t
    rhs = np.repeat(al, 3)[:, None] * np.tile(np.eye(3), (n, 1))
    mu = np.linalg.solve(m, rhs)  # (3n, 3): dipoles per unit field (Å³)
    return mu.reshape(n, 3, 3).sum(axis=0)
