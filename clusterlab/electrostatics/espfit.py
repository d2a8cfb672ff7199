"""Atomic charges fitted to a quantum-mechanical electrostatic potential (ESP).

* Fit points: nested shells at 1.4, 1.6, 1.8 and 2.0 times the atoms' van der
  Waals radii (Singh & Kollman, J. Comput. Chem. 5, 129 (1984)), or a cubic
  grid between the vdW surface and 2.8 Å from the nearest atom (Breneman &
  Wiberg, J. Comput. Chem. 11, 361 (1990)). Points on a sphere are placed on a
  golden-angle spiral (our choice; the papers used other point sets).
* Fit: least squares of the point-charge potential against the QM one, with
  the total charge imposed exactly by a Lagrange multiplier; optional
  hyperbolic restraint :math:`a\\sum_j(\\sqrt{q_j^2+b^2}-b)` (Bayly, Cieplak,
  Cornell & Kollman, J. Phys. Chem. 97, 10269 (1993)), solved iteratively; and
  optional equivalence constraints (atoms in one group share one charge).
* The QM potential these fits take (and transition charges, fitted to the
  potential of a transition density) is computed in the quantum engine:
  :mod:`clusterlab.qm.esp`.

Internal fit units are atomic units (bohr, hartree/e, e); arguments and
results carry their units in their names.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt

from ..errors import ConvergenceError, InputError
from ..units import A_TO_BOHR, DEBYE_E_A

FloatArray = npt.NDArray[np.float64]

#: Radii (Å) for the shell grid, as used with Singh & Kollman fits (from memory);
#: other elements fall back to :data:`BONDI_RADII_A`.
SHELL_RADII_A: dict[str, float] = {"H": 1.2, "C": 1.5, "N": 1.5, "O": 1.4, "F": 1.35,
                                   "P": 1.8, "S": 1.75, "Cl": 1.7}
#: Radii (Å) of Breneman & Wiberg's cubic-grid fits (from memory); fallback Bondi.
CUBIC_RADII_A: dict[str, float] = {"H": 1.45, "C": 1.5, "N": 1.7, "O": 1.7}
#: Bondi, J. Phys. Chem. 68, 441 (1964) van der Waals radii (Å).
BONDI_RADII_A: dict[str, float] = {"H": 1.20, "He": 1.40, "C": 1.70, "N": 1.55, "O": 1.52,
                                   "F": 1.47, "Ne": 1.54, "Si": 2.10, "P": 1.80, "S": 1.80,
                                   "Cl": 1.75, "Ar": 1.88, "Se": 1.90, "Br": 1.85, "I": 1.98}
SHELL_SCALES = (1.4, 1.6, 1.8, 2.0)

__all__ = [
    "SHELL_RADII_A", "CUBIC_RADII_A", "BONDI_RADII_A", "SHELL_SCALES",
    "Restraint", "EspFit",
    "shell_points", "cubic_points", "fit_esp_charges", "esp_rrms", "charge_dipole_D", "fit_points",
]


def _radii(symbols: Sequence[str], table: dict[str, float]) -> FloatArray:
    out = np.empty(len(symbols))
    for n, s in enumerate(symbols):
        key = str(s).strip().capitalize()
        if key in table:
            out[n] = table[key]
        elif key in BONDI_RADII_A:
            out[n] = BONDI_RADII_A[key]
        else:
            raise InputError(
                f"no van der Waals radius for element {s!r}; known: {sorted(set(table) | set(BONDI_RADII_A))}."
            )
    return out


def _sphere(n: int) -> FloatArray:
    """n nearly uniform unit vectors on a golden-angle spiral, shape (n, 3)."""
    k = np.arange(n) + 0.5
    z = 1.0 - 2.0 * k / n
    rho = np.sqrt(1.0 - z * z)
    phi = np.pi * (3.0 - np.sqrt(5.0)) * k
    return np.c_[rho * np.cos(phi), rho * np.sin(phi), z]


def shell_points(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    *,
    scales: Sequence[float] = SHELL_SCALES,
    density_per_A2: float = 1.0,
    radii_A: dict[str, float] | None = None,
) -> FloatArray:
    """Fit points on nested vdW shells (Singh & Kollman 1984).

    For every scale s and atom i, points on the sphere of radius s·R_i
    (``density_per_A2`` points per Å² of that sphere), keeping those outside
    every other atom's sphere of radius s·R_j.

    Returns
    -------
    ndarray, shape (n_points, 3), Å
    """
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    rad = _radii(symbols, SHELL_RADII_A if radii_A is None else radii_A)
    if density_per_A2 <= 0:
        raise InputError(f"density_per_A2 must be positive; got {density_per_A2!r}.")
    out = []
    for s in scales:
        r = s * rad
        for i in range(len(pos)):  # one sphere per atom (not per pair)
            n = max(8, int(round(4 * np.pi * r[i] ** 2 * density_per_A2)))
            pts = pos[i] + r[i] * _sphere(n)
            d = np.linalg.norm(pts[:, None, :] - pos[None, :, :], axis=2)
            inside = d < r[None, :] - 1e-10
            inside[:, i] = False
            out.append(pts[~inside.any(axis=1)])
    return np.concatenate(out) if out else np.zeros((0, 3))


def cubic_points(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    *,
    spacing_A: float = 0.3,
    max_distance_A: float = 2.8,
    radii_A: dict[str, float] | None = None,
) -> FloatArray:
    """Cubic-grid fit points (Breneman & Wiberg 1990): grid points with
    spacing ``spacing_A`` outside every atom's vdW radius and within
    ``max_distance_A`` of at least one atom.

    Returns
    -------
    ndarray, shape (n_points, 3), Å
    """
    from scipy.spatial import cKDTree

    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    rad = _radii(symbols, CUBIC_RADII_A if radii_A is None else radii_A)
    if spacing_A <= 0 or max_distance_A <= rad.max():
        raise InputError(
            f"need spacing_A > 0 and max_distance_A > the largest radius ({rad.max()} Å); "
            f"got {spacing_A}, {max_distance_A}."
        )
    lo = pos.min(axis=0) - max_distance_A
    hi = pos.max(axis=0) + max_distance_A
    axes = [np.arange(lo[x], hi[x] + 1e-9, spacing_A) for x in range(3)]
    grid = np.array(np.meshgrid(*axes, indexing="ij")).reshape(3, -1).T
    tree = cKDTree(grid)
    near = np.zeros(len(grid), bool)
    for i in range(len(pos)):
        near[tree.query_ball_point(pos[i], max_distance_A)] = True
    grid = grid[near]
    d = np.linalg.norm(grid[:, None, :] - pos[None, :, :], axis=2)
    return grid[~(d < rad[None, :]).any(axis=1)]


@dataclass(frozen=True)
class Restraint:
    """Hyperbolic restraint of Bayly et al. (1993).

    Attributes
    ----------
    a_au : float
        Strength (atomic units; 0.0005 and 0.001 are the published choices).
    b_e : float
        Hyperbola width (e), 0.1 in the paper.
    hydrogens : bool
        Restrain hydrogen charges too (common practice: only heavy atoms).
    tol_e, max_iter : convergence of the iterated fit.
    """

    a_au: float = 0.0005
    b_e: float = 0.1
    hydrogens: bool = False
    tol_e: float = 1e-7
    max_iter: int = 200


def _equivalence_matrix(n: int, equivalent: Any) -> FloatArray:
    """Map from independent parameters to atoms, shape (n, n_par)."""
    labels = np.arange(n)
    if equivalent is not None:
        eq = list(equivalent)
        if len(eq) == n and all(np.ndim(x) == 0 for x in eq):
            labels = np.asarray(eq, dtype=np.int64)
        else:
            for group in eq:
                g = np.asarray(group, dtype=np.int64).ravel()
                if g.size and (g.min() < 0 or g.max() >= n):
                    raise InputError(f"equivalence group {g.tolist()} names atoms outside 0..{n - 1}.")
                if g.size:
                    labels[g] = labels[g].min()
            # groups may chain: resolve to a fixed point
            for _ in range(n):
                new = labels[labels]
                if np.array_equal(new, labels):
                    break
                labels = new
    _, inv = np.unique(labels, return_inverse=True)
    p = np.zeros((n, inv.max() + 1))
    p[np.arange(n), inv] = 1.0
    return p


def fit_esp_charges(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    esp_points_A: npt.ArrayLike,
    esp_values_au: npt.ArrayLike,
    total_charge: float,
    restraint: Restraint | None = None,
    equivalent: Any = None,
) -> FloatArray:
    """Atomic charges (e) that best reproduce a potential on points.

    Minimises :math:`\\sum_k (V_k - \\sum_j q_j/r_{kj})^2` (+ restraint) with
    :math:`\\sum_j q_j` = ``total_charge`` exactly (Lagrange multiplier).

    Parameters
    ----------
    symbols : sequence of str, length n
    positions_A : array_like, shape (n, 3), Å
    esp_points_A : array_like, shape (m, 3), Å
    esp_values_au : array_like, shape (m,), hartree/e
    total_charge : float, e
    restraint : Restraint, optional
        Hyperbolic restraint toward zero (RESP-type), iterated to self-consistency.
    equivalent : optional
        Either one label per atom (atoms with equal labels share a charge) or
        a list of index groups, e.g. ``[[1, 2]]`` for the two H of water.

    Returns
    -------
    ndarray, shape (n,), e

    Raises
    ------
    InputError
        On inconsistent shapes or too few points.
    ConvergenceError
        If the restrained fit does not settle within ``restraint.max_iter``.
    """
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64)) * A_TO_BOHR
    pts = np.atleast_2d(np.asarray(esp_points_A, dtype=np.float64)) * A_TO_BOHR
    v = np.asarray(esp_values_au, dtype=np.float64).ravel()
    n = len(pos)
    if len(symbols) != n:
        raise InputError(f"{len(symbols)} symbols for {n} positions; they must match.")
    if len(v) != len(pts):
        raise InputError(f"{len(v)} ESP values for {len(pts)} points; they must match.")
    if len(pts) < n:
        raise InputError(f"only {len(pts)} fit points for {n} charges; need at least as many.")
    b = 1.0 / np.linalg.norm(pts[:, None, :] - pos[None, :, :], axis=2)  # (m, n) 1/bohr
    p = _equivalence_matrix(n, equivalent)
    a_mat = p.T @ (b.T @ b) @ p
    rhs = p.T @ (b.T @ v)
    ones = p.T @ np.ones(n)
    npar = len(rhs)

    def solve(extra_diag_atoms: FloatArray) -> FloatArray:
        m = np.zeros((npar + 1, npar + 1))
        m[:npar, :npar] = a_mat + p.T @ np.diag(extra_diag_atoms) @ p
        m[:npar, npar] = ones
        m[npar, :npar] = ones
        sol = np.linalg.lstsq(m, np.r_[rhs, total_charge], rcond=None)[0]
        return p @ sol[:npar]

    q = solve(np.zeros(n))
    if restraint is None:
        return q
    mask = np.array([restraint.hydrogens or str(s).strip().capitalize() != "H" for s in symbols], float)
    for _ in range(restraint.max_iter):
        w = mask * restraint.a_au / np.sqrt(q * q + restraint.b_e**2)
        q_new = solve(w)
        if np.max(np.abs(q_new - q)) < restraint.tol_e:
            return q_new
        q = q_new
    raise ConvergenceError(
        f"restrained ESP fit did not converge in {restraint.max_iter} iterations "
        f"(tol {restraint.tol_e} e); raise Restraint.max_iter."
    )


def esp_rrms(positions_A: npt.ArrayLike, charges_e: npt.ArrayLike,
             esp_points_A: npt.ArrayLike, esp_values_au: npt.ArrayLike) -> float:
    """Relative RMS error of the charges' potential on the points,
    :math:`\\sqrt{\\sum (V-V_q)^2/\\sum V^2}`."""
    pos = np.atleast_2d(np.asarray(positions_A, float)) * A_TO_BOHR
    pts = np.atleast_2d(np.asarray(esp_points_A, float)) * A_TO_BOHR
    v = np.asarray(esp_values_au, float)
    vq = (np.asarray(charges_e, float)[None, :] / np.linalg.norm(pts[:, None] - pos[None], axis=2)).sum(1)
    return float(np.sqrt(np.sum((v - vq) ** 2) / np.sum(v**2)))


def charge_dipole_D(positions_A: npt.ArrayLike, charges_e: npt.ArrayLike,
                    origin_A: npt.ArrayLike | None = None) -> FloatArray:
    """Dipole moment (Debye) of point charges, :math:`\\sum_j q_j (\\mathbf r_j - \\mathbf o)`.

    The origin matters only for charged sets (default: the coordinate origin).

    Returns
    -------
    ndarray, shape (3,), D
    """
    pos = np.atleast_2d(np.asarray(positions_A, float))
    o = np.zeros(3) if origin_A is None else np.asarray(origin_A, float)
    return (np.asarray(charges_e, float) @ (pos - o)) / DEBYE_E_A


@dataclass(frozen=True)
class EspFit:
    """Charges fitted to a QM potential, with diagnostics.

    Attributes
    ----------
    charges_e : ndarray (n,)
    points_A : ndarray (m, 3)
    esp_au : ndarray (m,)
        QM potential on the points.
    rrms : float
        Relative RMS misfit of the charges' potential.
    dipole_fit_D, dipole_qm_D : ndarray (3,)
        Dipole of the charges and of the QM density (nuclei + electrons),
        both about the coordinate origin.
    """

    charges_e: FloatArray
    points_A: FloatArray
    esp_au: FloatArray
    rrms: float
    dipole_fit_D: FloatArray
    dipole_qm_D: FloatArray


def fit_points(symbols: Sequence[str], positions_A: npt.ArrayLike, grid: str = "shells", **grid_kw: Any
               ) -> FloatArray:
    """Fit points around a molecule: :func:`shell_points` (``grid="shells"``,
    Singh & Kollman) or :func:`cubic_points` (``"cubic"``, Breneman & Wiberg).

    Raises
    ------
    InputError
        Any other ``grid``.
    """
    if grid == "shells":
        return shell_points(symbols, positions_A, **grid_kw)
    if grid == "cubic":
        return cubic_points(symbols, positions_A, **grid_kw)
    raise InputError(f"{grid!r} is an invalid grid. Use 'shells' or 'cubic'.")
