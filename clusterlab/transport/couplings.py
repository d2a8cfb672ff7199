"""Excitonic couplings between molecules: point-dipole and transition charges.

Both return the Coulomb coupling ``V`` (eV) between the transition densities
of molecules A and B. Positive ``V`` for the side-by-side (H-type) geometry,
negative for head-to-tail (J-type). The sign of ``V`` for a pair also
depends on the (arbitrary) phases of the two transition dipoles; only
``|V|`` and relative signs within a consistent phase convention matter.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from ..units import COULOMB_EV_A, DEBYE_E_A

FloatArray = npt.NDArray[np.float64]

__all__ = ["point_dipole_coupling", "orientation_factor", "transition_charge_coupling"]


def _vec(name: str, value: npt.ArrayLike) -> FloatArray:
    a = np.asarray(value, dtype=np.float64)
    if a.ndim < 1 or a.shape[-1] != 3 or not np.all(np.isfinite(a)):
        raise InputError(f"{name} must be finite with last axis of length 3; got shape {a.shape}.")
    return a


def orientation_factor(
    mu_A: npt.ArrayLike, mu_B: npt.ArrayLike, R_vec: npt.ArrayLike
) -> FloatArray:
    """``kappa = cos(theta_AB) - 3 cos(theta_A) cos(theta_B)`` (dimensionless).

    Parameters
    ----------
    mu_A, mu_B, R_vec : array_like, shape (..., 3)
        Directions of the two transition dipoles and of the centre-centre
        vector (any lengths, non-zero); broadcast over leading axes.

    Returns
    -------
    ndarray, shape (...)
        ``1`` for parallel dipoles side by side, ``-2`` head to tail, ``0`` for
        perpendicular dipoles (Kasha, Rawls & El-Bayoumi, Pure Appl. Chem. 11,
        371 (1965)).
    """
    a, b, r = _vec("mu_A", mu_A), _vec("mu_B", mu_B), _vec("R_vec", R_vec)
    na, nb, nr = (np.linalg.norm(x, axis=-1) for x in (a, b, r))
    if np.any(na == 0) or np.any(nb == 0) or np.any(nr == 0):
        raise InputError("orientation_factor needs non-zero dipoles and a non-zero R_vec.")
    ea, eb, er = a / na[..., None], b / nb[..., None], r / nr[..., None]
    return np.asarray(
        np.sum(ea * eb, -1) - 3.0 * np.sum(ea * er, -1) * np.sum(eb * er, -1), dtype=np.float64
    )


def point_dipole_coupling(
    mu_A_D: npt.ArrayLike,
    mu_B_D: npt.ArrayLike,
    R_vec_A: npt.ArrayLike,
    n: float = 1.0,
) -> FloatArray:
    """Point-dipole excitonic coupling, eV.

    ``V = [mu_A . mu_B - 3 (mu_A . R^)(mu_B . R^)] / (4 pi eps0 n^2 R^3)
    = kappa |mu_A| |mu_B| / (4 pi eps0 n^2 R^3)``
    (Kasha, Rawls & El-Bayoumi, Pure Appl. Chem. 11, 371 (1965)).
    1 D^2/nm^3 gives 5.034 cm^-1.

    Parameters
    ----------
    mu_A_D, mu_B_D : array_like, shape (..., 3), Debye
        Transition dipole vectors.
    R_vec_A : array_like, shape (..., 3), Å
        Vector from the centre of A to the centre of B (minimum image).
    n : float
        Refractive index for optical screening ``1/n^2`` (1 = vacuum).

    Returns
    -------
    ndarray, shape (...), eV

    Raises
    ------
    InputError
        For zero separations, ``n <= 0`` or bad shapes.

    Notes
    -----
    Valid only when ``R`` is much larger than the molecular size; at
    contact distances in a film it can be wrong by a factor of several
    (use :func:`transition_charge_coupling`).

    Examples
    --------
    >>> v = point_dipole_coupling([0, 0, 5.0], [0, 0, 5.0], [10.0, 0, 0])
    >>> round(float(v) * 1000, 2)  # meV, side by side (H-type, kappa = 1)
    15.6
    """
    a, b, r = _vec("mu_A_D", mu_A_D), _vec("mu_B_D", mu_B_D), _vec("R_vec_A", R_vec_A)
    if not (np.isfinite(n) and n > 0):
        raise InputError(f"n (refractive index) must be > 0; got {n!r}.")
    R = np.linalg.norm(r, axis=-1)
    if np.any(R == 0):
        raise InputError("R_vec_A has a zero-length vector: the two dipoles coincide.")
    er = r / R[..., None]
    num = np.sum(a * b, -1) - 3.0 * np.sum(a * er, -1) * np.sum(b * er, -1)
    return np.asarray(COULOMB_EV_A * DEBYE_E_A**2 * num / (n**2 * R**3), dtype=np.float64)


def transition_charge_coupling(
    pos_A: npt.ArrayLike,
    q_A: npt.ArrayLike,
    pos_B: npt.ArrayLike,
    q_B: npt.ArrayLike,
    n: float = 1.0,
) -> float:
    """Coulomb coupling of two sets of transition charges, eV.

    ``V = sum_a sum_b q_a q_b / (4 pi eps0 n^2 |r_a - r_b|)``: the
    transition-charge (TrEsp) approximation of Madjet, Abdurahman & Renger,
    J. Phys. Chem. B 110, 17268 (2006).

    Parameters
    ----------
    pos_A : array_like, shape (n_A, 3), Å
    q_A : array_like, shape (n_A,), e
        Transition charges of A (they should sum to ~0).
    pos_B : array_like, shape (n_B, 3), Å
        Positions of B in the same frame (minimum image applied already).
    q_B : array_like, shape (n_B,), e
    n : float
        Refractive index for ``1/n^2`` screening.

    Returns
    -------
    float, eV

    Raises
    ------
    InputError
        For mismatched shapes, ``n <= 0`` or coinciding charges of A and B.
    """
    pa, pb = _vec("pos_A", pos_A).reshape(-1, 3), _vec("pos_B", pos_B).reshape(-1, 3)
    qa = np.asarray(q_A, dtype=np.float64).ravel()
    qb = np.asarray(q_B, dtype=np.float64).ravel()
    if qa.size != pa.shape[0] or qb.size != pb.shape[0]:
        raise InputError(
            f"q_A/q_B must have one charge per position; got {qa.size} for {pa.shape[0]} and "
            f"{qb.size} for {pb.shape[0]}."
        )
    if not (np.isfinite(n) and n > 0):
        raise InputError(f"n (refractive index) must be > 0; got {n!r}.")
    d = np.linalg.norm(pa[:, None, :] - pb[None, :, :], axis=-1)
    if np.any(d < 1e-8):
        raise InputError("a transition charge of A coincides with one of B (distance 0).")
    return float(COULOMB_EV_A * (qa @ (1.0 / d) @ qb) / n**2)
