"""Common container for excited states from any response model.

Both the full TDA/TDDFT path (PySCF ``tdscf``) and the simplified TDA
(:mod:`clusterlab.qm.stda`) return :class:`ResponseStates`, so state
following, results and studies do not care which model made them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


@dataclass
class ResponseStates:
    """Excited states of one spin kind from one response calculation.

    Attributes
    ----------
    kind : {"singlet", "triplet"}
    model : str
        "tda", "tddft" or "stda".
    energies_Eh : ndarray, shape (n,)
        Excitation energies (Hartree), ascending.
    amplitudes : ndarray, shape (n, nocc, nvir)
        Excitation amplitudes X (for full TDDFT: X + Y) over the occupied x
        virtual orbital pairs of the SCF (``mo_occ > 0`` first, in orbital
        order), normalised so that ``sum(X**2) == 1`` for every state.
        States of the sTDA live in a truncated space: amplitudes outside it
        are zero.
    transition_dipoles_au : ndarray, shape (n, 3)
        <0|mu|n> in e·bohr (zeros for triplets).
    osc_strength : ndarray, shape (n,)
        Oscillator strength f = 2/3 E |mu|^2 (zero for triplets).
    converged : ndarray of bool, shape (n,)
    extra : dict
        Model-specific diagnostics (e.g. sTDA configuration-space sizes).
    """

    kind: str
    model: str
    energies_Eh: FloatArray
    amplitudes: FloatArray
    transition_dipoles_au: FloatArray
    osc_strength: FloatArray
    converged: npt.NDArray[np.bool_]
    extra: dict = field(default_factory=dict)

    @property
    def n_states(self) -> int:
        return int(len(self.energies_Eh))


def _orthonormal_rows(x: FloatArray, tol: float = 1e-6) -> FloatArray:
    """Orthonormal basis (rows) of the span of the rows of ``x``; rows that
    add less than ``tol`` of new direction are dropped."""
    q, r = np.linalg.qr(np.asarray(x, dtype=float).T)
    keep = np.abs(np.diag(r)) > tol * max(1.0, float(np.abs(np.diag(r)).max(initial=0.0)))
    return q[:, keep].T


def subspace_refine(aop, hdiag: FloatArray, guess: FloatArray, n_correct: int
                    ) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Two subspace iterations for the lowest eigenpairs of a symmetric matrix.

    1. Rayleigh-Ritz in the span of ``guess``;
    2. one Davidson correction vector per lowest ``n_correct`` Ritz pair,
       ``t = r / (e - D)`` with the residual ``r = A y - e y`` and the
       diagonal ``D`` of A (Davidson, J. Comput. Phys. 17, 87 (1975)),
       then Rayleigh-Ritz in the enlarged space.

    Because they are Rayleigh-Ritz values of a symmetric matrix, the k-th
    returned value is never below the k-th eigenvalue of A (Cauchy
    interlacing / Courant-Fischer), and it is exact when the space holds
    the eigenvector.

    Parameters
    ----------
    aop : callable
        ``aop(x)`` with x of shape (m, n) returns A x of shape (m, n).
    hdiag : ndarray, shape (n,)
        Diagonal of A.
    guess : ndarray, shape (m, n)
        Starting vectors (need not be orthonormal; dependent ones are dropped).
    n_correct : int
        Ritz pairs that get a correction vector.

    Returns
    -------
    energies : ndarray, shape (k,)
        Ritz values, ascending.
    vectors : ndarray, shape (k, n)
        Orthonormal Ritz vectors.
    residual_norms : ndarray, shape (n_correct,)
        ``|A y - e y|`` of the first-step Ritz pairs (a measure of how far
        the starting space was from the answer).
    """
    x = _orthonormal_rows(guess)
    ax = np.asarray(aop(x), dtype=float)
    w, v = np.linalg.eigh(0.5 * (x @ ax.T + ax @ x.T))
    y, ay = v.T @ x, v.T @ ax
    nc = min(int(n_correct), len(w))
    res = ay[:nc] - w[:nc, None] * y[:nc]
    denom = w[:nc, None] - np.asarray(hdiag, dtype=float)[None, :]
    denom = np.where(np.abs(denom) < 1e-4, np.copysign(1e-4, denom), denom)
    t = res / denom
    t -= (t @ y.T) @ y
    t = _orthonormal_rows(t) if len(t) else t
    if len(t):
        y = np.vstack([y, t])
        ay = np.vstack([ay, np.asarray(aop(t), dtype=float)])
    w2, v2 = np.linalg.eigh(0.5 * (y @ ay.T + ay @ y.T))
    return w2, v2.T @ y, np.linalg.norm(res, axis=1)
