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

__all__ = ["point_dipole_coupling", "orientation_factor", "transition_charge_coupling",
           "pair_transition_charge_couplings"]


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


def pair_transition_charge_couplings(
    positions_A: npt.ArrayLike,
    charges_e: npt.ArrayLike,
    molecule_of_atom: npt.ArrayLike,
    centroids_A: npt.ArrayLike,
    i: npt.ArrayLike,
    j: npt.ArrayLike,
    vectors_A: npt.ArrayLike,
    *,
    n: float = 1.0,
) -> FloatArray:
    """Transition-charge couplings of many pairs of one frame at once, eV.

    Pair ``p`` couples the charges of molecule ``i[p]`` at its own atoms with
    those of molecule ``j[p]`` translated as a rigid copy so that its centroid
    sits at ``centroids_A[i[p]] + vectors_A[p]`` (the minimum-image vector of
    the pair). Each value is :func:`transition_charge_coupling` of that pair;
    molecules are padded to the largest one and the pairs are summed in
    batches of about two million atom pairs.

    Parameters
    ----------
    positions_A : array_like, shape (n_atoms, 3), Å
        Atom positions, each molecule whole.
    charges_e : array_like, shape (n_atoms,), e
        Transition charge of each atom (0 for molecules that have none).
    molecule_of_atom : array_like of int, shape (n_atoms,)
        Molecule id of each atom (``0 .. n_molecules - 1``; the atoms of one
        molecule need not be contiguous).
    centroids_A : array_like, shape (n_molecules, 3), Å
        Centroid of each molecule, the reference point of ``vectors_A``.
    i, j : array_like of int, shape (n_pairs,)
        Molecule ids of the pairs.
    vectors_A : array_like, shape (n_pairs, 3), Å
        Vector from the centroid of ``i`` to that of the copy of ``j``.
    n : float
        Refractive index for ``1/n^2`` screening.

    Returns
    -------
    ndarray, shape (n_pairs,), eV

    Raises
    ------
    InputError
        For mismatched shapes, non-finite values, molecule ids out of range
        or ``n <= 0``.

    Examples
    --------
    >>> pos = [[0, 0, 0.5], [0, 0, -0.5], [0, 0, 0.5], [0, 0, -0.5]]
    >>> v = pair_transition_charge_couplings(pos, [0.1, -0.1, 0.1, -0.1], [0, 0, 1, 1],
    ...                                      [[0, 0, 0], [0, 0, 0]], [0], [1], [[10.0, 0, 0]])
    >>> bool(v[0] > 0)  # parallel dipoles side by side: H-type, positive
    True
    """
    pos = _vec("positions_A", positions_A).reshape(-1, 3)
    q = np.asarray(charges_e, dtype=np.float64).ravel()
    mol = np.asarray(molecule_of_atom).ravel()
    cent = _vec("centroids_A", centroids_A).reshape(-1, 3)
    a_ids, b_ids = np.asarray(i).ravel(), np.asarray(j).ravel()
    d = np.asarray(vectors_A, dtype=np.float64).reshape(-1, 3) if np.size(vectors_A) else np.zeros((0, 3))
    if q.size != pos.shape[0] or mol.size != pos.shape[0]:
        raise InputError(f"charges_e and molecule_of_atom need one entry per atom ({pos.shape[0]}); got "
                         f"{q.size} and {mol.size}.")
    if not np.all(np.isfinite(q)):
        raise InputError("charges_e must be finite (give 0 to molecules without transition charges).")
    if a_ids.size != b_ids.size or d.shape[0] != a_ids.size or not np.all(np.isfinite(d)):
        raise InputError(f"i, j and vectors_A must describe the same pairs; got {a_ids.size}, {b_ids.size} "
                         f"and shape {d.shape} (finite).")
    if not (np.isfinite(n) and n > 0):
        raise InputError(f"n (refractive index) must be > 0; got {n!r}.")
    n_mol = cent.shape[0]
    for name, ids in (("molecule_of_atom", mol), ("i", a_ids), ("j", b_ids)):
        if ids.size and (not np.issubdtype(ids.dtype, np.integer) or ids.min() < 0 or ids.max() >= n_mol):
            raise InputError(f"{name} must hold integer molecule ids in 0..{n_mol - 1}.")
    if a_ids.size == 0:
        return np.zeros(0)
    # pad every molecule to the largest: P (n_mol, amax, 3), Q (n_mol, amax), M marks real atoms
    order = np.argsort(mol, kind="stable")
    sizes = np.bincount(mol, minlength=n_mol)
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    slot = np.arange(order.size) - starts[mol[order]]
    amax = int(sizes.max())
    P = np.zeros((n_mol, amax, 3))
    Q = np.zeros((n_mol, amax))
    M = np.zeros((n_mol, amax), dtype=bool)
    P[mol[order], slot] = pos[order]
    Q[mol[order], slot] = q[order]
    M[mol[order], slot] = True
    shift = (cent[a_ids] + d) - cent[b_ids]  # translation that puts j's copy next to i
    out = np.empty(a_ids.size)
    step = max(1, 2_000_000 // (amax * amax))
    for s in range(0, a_ids.size, step):
        a, b = a_ids[s:s + step], b_ids[s:s + step]
        pb = P[b] + shift[s:s + step, None, :]
        r = np.linalg.norm(P[a][:, :, None, :] - pb[:, None, :, :], axis=-1)
        mask = M[a][:, :, None] & M[b][:, None, :]
        if np.any(mask & (r < 1e-8)):
            raise InputError("a transition charge of a pair's i coincides with one of its j copy (distance 0).")
        inv = np.where(mask, 1.0 / np.where(mask, r, 1.0), 0.0)
        out[s:s + step] = np.einsum("pa,pab,pb->p", Q[a], inv, Q[b])
    return np.asarray(COULOMB_EV_A * out / n**2, dtype=np.float64)
