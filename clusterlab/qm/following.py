"""State following: match excited states of two calculations on the same
atoms and basis (e.g. embedded vs vacuum, or radius r vs r') by the overlap
of their transition densities.

The AO transition density of state I is T_I = C_occ X_I C_vir^T. With the
AO overlap S, the overlap of two states from SCFs A and B is

    <T_I^A | T_J^B> = Tr(S T_I^A S (T_J^B)^T) = Tr(X_I^A^T O_occ X_J^B O_vir^T)

with the MO overlaps O_occ = C_occ^A^T S C_occ^B and O_vir likewise; this
handles orbital sign flips and rotations between the two SCFs. Amplitudes
normalised to sum(X^2) = 1 give |<T|T>| <= 1.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy.optimize import linear_sum_assignment

FloatArray = npt.NDArray[np.float64]


def mo_overlaps(mo_a: FloatArray, mo_b: FloatArray, s_ao: FloatArray, nocc: int) -> tuple[FloatArray, FloatArray]:
    """Occupied and virtual MO overlap blocks between two SCFs.

    Parameters
    ----------
    mo_a, mo_b : ndarray, shape (nao, nmo)
    s_ao : ndarray, shape (nao, nao)
    nocc : int

    Returns
    -------
    o_occ : ndarray, shape (nocc, nocc)
    o_vir : ndarray, shape (nvir, nvir)
    """
    full = mo_a.T @ s_ao @ mo_b
    return full[:nocc, :nocc], full[nocc:, nocc:]


def transition_overlaps(amps_a: FloatArray, mo_a: FloatArray, amps_b: FloatArray, mo_b: FloatArray,
                        s_ao: FloatArray) -> FloatArray:
    """|<T_I^A|T_J^B>| for all state pairs.

    Parameters
    ----------
    amps_a : ndarray, shape (na, nocc, nvir)
    amps_b : ndarray, shape (nb, nocc, nvir)
    mo_a, mo_b : ndarray, shape (nao, nmo)
    s_ao : ndarray, shape (nao, nao)

    Returns
    -------
    ndarray, shape (na, nb), values in [0, 1] for normalised amplitudes.
    """
    amps_a = np.asarray(amps_a, dtype=float)
    amps_b = np.asarray(amps_b, dtype=float)
    if amps_a.size == 0 or amps_b.size == 0:
        return np.zeros((len(amps_a), len(amps_b)))
    nocc = amps_a.shape[1]
    o_occ, o_vir = mo_overlaps(mo_a, mo_b, s_ao, nocc)
    # X_b rotated into A's orbital basis: O_occ X_b O_vir^T
    rotated = np.einsum("ij,njb,ab->nia", o_occ, amps_b, o_vir, optimize=True)
    return np.abs(np.einsum("mia,nia->mn", amps_a, rotated, optimize=True))


def rotate_amplitudes(amps_old: FloatArray, mo_old: FloatArray, mo_new: FloatArray, s_ao: FloatArray) -> FloatArray:
    """Express amplitudes of an old SCF in the orbitals of a new one
    (a Davidson guess for the new calculation), renormalised.

    Returns
    -------
    ndarray, shape (n, nocc, nvir)
    """
    amps_old = np.asarray(amps_old, dtype=float)
    nocc = amps_old.shape[1]
    o_occ, o_vir = mo_overlaps(mo_new, mo_old, s_ao, nocc)
    new = np.einsum("ij,njb,ab->nia", o_occ, amps_old, o_vir, optimize=True)
    norms = np.sqrt(np.einsum("nia,nia->n", new, new))
    norms[norms == 0] = 1.0
    return new / norms[:, None, None]


def assign_states(overlap: FloatArray) -> tuple[npt.NDArray[np.int64], FloatArray]:
    """One-to-one match of the rows (states of A) to columns (states of B)
    maximising the total overlap (Hungarian algorithm, scipy).

    Returns
    -------
    match : ndarray of int, shape (na,)
        Column index matched to each row, -1 where there are more rows than
        columns and the row is left unmatched.
    value : ndarray, shape (na,)
        The overlap of each matched pair (nan if unmatched).
    """
    overlap = np.asarray(overlap, dtype=float)
    na = overlap.shape[0]
    match = np.full(na, -1, dtype=np.int64)
    value = np.full(na, np.nan)
    if overlap.size == 0:
        return match, value
    rows, cols = linear_sum_assignment(-overlap)
    match[rows] = cols
    value[rows] = overlap[rows, cols]
    return match, value
