"""The uniform field that best reproduces a potential over each molecule's atoms.

For molecule m with atoms a at positions r_a and potential values V_a, the fit
is the least-squares solution of

.. math:: V_a \\approx V_m - \\mathbf F_m\\cdot(\\mathbf r_a - \\bar{\\mathbf r}_m),

with :math:`\\bar{\\mathbf r}_m` the mean position of the molecule's atoms
(so :math:`V_m` is the mean of its V_a and the field is fitted on centred
data). Step by step, for all molecules at once:

1. the molecules' atoms are scattered into a padded (n_mol, m, 3) block (m =
   the largest atom count; padding rows are zero and masked out), centred on
   each molecule's mean position;
2. one batched SVD of the centred coordinates ``x = u diag(s) v^T`` gives the
   pseudo-inverse, and ``-pinv(x) @ (V - V_m)`` the field;
3. directions in which the atoms spread less than ``min_spread_A`` (rms) get
   no field component: a planar molecule has no out-of-plane gradient to fit,
   and a linear one only the component along its axis (the minimum-norm
   solution, as ``numpy.linalg.lstsq`` gives).

Uses: the field of the second-order (quadratic Stark) term
``-1/2 F·Δα·F`` and of the dipole term ``-Δμ·F`` of a film model. What it
leaves out: the variation of the field across the molecule (gradients and
higher), which shows as the fit's residual.

Units: Å, V (= eV/e), V/Å.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ..errors import InputError

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

__all__ = ["UniformFieldFit", "uniform_field_fit"]


@dataclass(frozen=True)
class UniformFieldFit:
    """Least-squares uniform field of every molecule (see the module docstring).

    Attributes
    ----------
    field_V_A : ndarray (n_molecules, 3), V/Å
        :math:`\\mathbf F_m` (minus the potential's fitted gradient).
    center_A : ndarray (n_molecules, 3), Å
        Mean position of each molecule's atoms.
    center_potential_V : ndarray (n_molecules,), V
        :math:`V_m`, the fitted potential at ``center_A``.
    rank : ndarray (n_molecules,) int
        Directions fitted (3; 2 for a planar molecule; 1 for a linear one; 0
        for a single atom).
    """

    field_V_A: FloatArray
    center_A: FloatArray
    center_potential_V: FloatArray
    rank: IntArray


def uniform_field_fit(positions_A: npt.ArrayLike, potential_V: npt.ArrayLike, atoms: npt.ArrayLike,
                      offsets: npt.ArrayLike, *, min_spread_A: float = 0.1) -> UniformFieldFit:
    """Uniform field (V/Å) that best reproduces the potential over each molecule's atoms.

    Parameters
    ----------
    positions_A : array_like (n_atoms, 3), Å
        Whole molecules.
    potential_V : array_like (n_atoms,), V
        Potential at every atom.
    atoms, offsets : array_like of int
        Molecule layout: ``atoms[offsets[m]:offsets[m+1]]`` are molecule m's
        atoms (as :func:`~clusterlab.electrostatics.pairsum.environment_potential`).
    min_spread_A : float, Å
        Directions in which a molecule's atoms spread less than this (rms) get
        no field component.

    Returns
    -------
    UniformFieldFit

    Raises
    ------
    InputError
        Shapes that do not match, non-finite values, a negative spread, or an
        empty molecule.

    Examples
    --------
    A potential made by a uniform field of 0.2 V/Å along z plus a constant
    is recovered exactly, at any atom positions:

    >>> pos = np.array([[0.0, 0, 0], [1.0, 0, 0.5], [0, 1.2, -0.3], [0.4, 0.3, 1.0]])
    >>> v = 1.5 - pos @ np.array([0.0, 0.0, 0.2])
    >>> fit = uniform_field_fit(pos, v, np.arange(4), np.array([0, 4]))
    >>> (np.round(fit.field_V_A, 12) + 0.0).tolist(), fit.rank.tolist()
    ([[0.0, 0.0, 0.2]], [3])
    """
    pos = np.asarray(positions_A, dtype=np.float64)
    pot = np.asarray(potential_V, dtype=np.float64).ravel()
    atoms = np.asarray(atoms, dtype=np.int64).ravel()
    offsets = np.asarray(offsets, dtype=np.int64).ravel()
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"positions_A must have shape (n_atoms, 3) in Å; got {pos.shape}.")
    if len(pot) != len(pos):
        raise InputError(f"{len(pot)} potential values for {len(pos)} atoms; they must match.")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(pot))):
        raise InputError("positions_A and potential_V must be finite.")
    if len(offsets) < 1 or offsets[0] != 0 or offsets[-1] != len(atoms) or np.any(np.diff(offsets) <= 0):
        raise InputError("offsets must start at 0, end at len(atoms) and rise strictly (no empty molecule).")
    if len(atoms) and (atoms.min() < 0 or atoms.max() >= len(pos)):
        raise InputError(f"atoms must be indices into the {len(pos)} positions.")
    if not np.isfinite(min_spread_A) or min_spread_A < 0:
        raise InputError(f"min_spread_A must be a finite non-negative number of Å; got {min_spread_A!r}.")
    sizes = np.diff(offsets)
    n_mol, m = len(sizes), int(sizes.max(initial=1))
    rows = np.repeat(np.arange(n_mol), sizes)
    slot = np.arange(len(atoms)) - offsets[:-1][rows]
    x = np.zeros((n_mol, m, 3))
    v = np.zeros((n_mol, m))
    x[rows, slot] = pos[atoms]
    v[rows, slot] = pot[atoms]
    mask = np.zeros((n_mol, m))
    mask[rows, slot] = 1.0
    cnt = sizes[:, None].astype(float)
    center = x.sum(axis=1) / cnt
    v_center = v.sum(axis=1, keepdims=True) / cnt
    x = (x - center[:, None, :]) * mask[..., None]
    v = (v - v_center) * mask
    u, sv, vt = np.linalg.svd(x, full_matrices=False)             # x = u diag(sv) vt
    keep = sv > min_spread_A * np.sqrt(cnt)
    inv = np.where(keep, 1.0 / np.where(keep, sv, 1.0), 0.0)
    grad = np.einsum("nji,nj,nkj,nk->ni", vt, inv, u, v)           # pinv(x) @ v
    return UniformFieldFit(field_V_A=-grad, center_A=center, center_potential_V=v_center[:, 0],
                           rank=keep.sum(axis=1).astype(np.int64))
