"""Neighbour pairs of molecules, periodic or not.

Pure functions on arrays: centroids (Å) and, optionally, atom positions
with a molecule index per atom. Distances and minimum-image vectors come
from MDAnalysis (:func:`MDAnalysis.lib.distances.capped_distance` for the search,
:func:`~MDAnalysis.lib.distances.minimize_vectors` in double precision for
the reported vectors and distances), which handle orthorhombic and
triclinic boxes ``[lx, ly, lz, alpha, beta, gamma]``.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from MDAnalysis.lib import distances as mdadist

from ..errors import InputError
from ..geometry import half_box_width_A

FloatArray = npt.NDArray[np.float64]

__all__ = ["neighbour_pairs", "PAIR_COLUMNS"]

#: Columns of the table returned by :func:`neighbour_pairs`
PAIR_COLUMNS = ("i", "j", "distance_A", "dx_A", "dy_A", "dz_A")


def _box(box: npt.ArrayLike | None) -> FloatArray | None:
    if box is None:
        return None
    b = np.asarray(box, dtype=np.float64).ravel()
    if b.shape != (6,) or not np.all(np.isfinite(b)) or np.any(b[:3] <= 0):
        raise InputError(
            f"box must be [lx, ly, lz, alpha, beta, gamma] with positive lengths (Å); got {box!r}."
        )
    return b


def _positions(name: str, value: npt.ArrayLike) -> FloatArray:
    a = np.asarray(value, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] != 3 or not np.all(np.isfinite(a)):
        raise InputError(f"{name} must be a finite array of shape (n, 3) in Å; got shape {a.shape}.")
    return a


def _flat_atoms(
    atom_positions_A: npt.ArrayLike | list[npt.ArrayLike],
    atom_molecule: npt.ArrayLike | None,
    n_mol: int,
) -> tuple[FloatArray, npt.NDArray[np.int64]]:
    if atom_molecule is None:
        if not isinstance(atom_positions_A, (list, tuple)):
            raise InputError(
                "atom_positions_A must be a list of (n_k, 3) arrays (one per molecule) "
                "or a flat (n_atoms, 3) array together with atom_molecule."
            )
        if len(atom_positions_A) != n_mol:
            raise InputError(
                f"atom_positions_A has {len(atom_positions_A)} molecules but there are {n_mol} centroids."
            )
        parts = [_positions(f"atom_positions_A[{k}]", p) for k, p in enumerate(atom_positions_A)]
        pos = np.concatenate(parts) if parts else np.zeros((0, 3))
        mol = np.repeat(np.arange(n_mol), [p.shape[0] for p in parts])
    else:
        pos = _positions("atom_positions_A", atom_positions_A)
        mol = np.asarray(atom_molecule, dtype=np.int64).ravel()
        if mol.size != pos.shape[0]:
            raise InputError(
                f"atom_molecule has {mol.size} entries but atom_positions_A has {pos.shape[0]} atoms."
            )
    if mol.size and (mol.min() < 0 or mol.max() >= n_mol):
        raise InputError(f"atom_molecule values must lie in [0, {n_mol}).")
    if np.any(np.bincount(mol, minlength=n_mol) == 0):
        raise InputError("every molecule needs at least one atom in atom_positions_A.")
    return pos, mol


def _min_atom_distance(
    pos: FloatArray, mol: npt.NDArray[np.int64], i: npt.NDArray[np.int64],
    j: npt.NDArray[np.int64], box: FloatArray | None,
) -> FloatArray:
    """Closest minimum-image atom-atom distance of each molecule pair (i, j)."""
    if i.size == 0:
        return np.zeros(0)
    order = np.argsort(mol, kind="stable")
    pos = pos[order]
    counts = np.bincount(mol, minlength=int(mol.max()) + 1)
    start = np.concatenate(([0], np.cumsum(counts)[:-1]))
    ni, nj = counts[i], counts[j]
    sizes = ni * nj
    pair_of = np.repeat(np.arange(i.size), sizes)
    offs = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    local = np.arange(sizes.sum()) - offs[pair_of]
    a = start[i][pair_of] + local // nj[pair_of]
    b = start[j][pair_of] + local % nj[pair_of]
    vec = pos[b] - pos[a]
    if box is not None:
        vec = mdadist.minimize_vectors(vec, box)
    d = np.linalg.norm(vec, axis=1)
    return np.minimum.reduceat(d, offs)


def neighbour_pairs(
    centroids_A: npt.ArrayLike,
    cutoff_A: float,
    *,
    box: npt.ArrayLike | None = None,
    criterion: Literal["centroid", "atom"] = "centroid",
    atom_positions_A: npt.ArrayLike | list[npt.ArrayLike] | None = None,
    atom_molecule: npt.ArrayLike | None = None,
    with_min_atom_distance: bool = False,
) -> pd.DataFrame:
    """Molecule pairs closer than a cutoff, each once, with minimum-image vectors.

    Parameters
    ----------
    centroids_A : array_like, shape (n, 3), Å
        One point per molecule (centroid or centre of mass of the whole molecule).
    cutoff_A : float, Å, > 0
    box : array_like, shape (6,), optional
        ``[lx, ly, lz, alpha, beta, gamma]`` (Å, degrees); ``None`` = no
        periodicity.
    criterion : {'centroid', 'atom'}
        ``'centroid'``: centroid-centroid distance <= cutoff. ``'atom'``:
        closest atom-atom distance <= cutoff (needs atom positions).
    atom_positions_A : list of (n_k, 3) arrays, or array (n_atoms, 3), Å, optional
        Atoms per molecule (a list), or a flat array with ``atom_molecule``.
    atom_molecule : array_like of int, shape (n_atoms,), optional
        Molecule index (row of ``centroids_A``) of each atom of a flat array.
    with_min_atom_distance : bool
        Add ``min_atom_distance_A`` (needs atom positions).

    Returns
    -------
    pandas.DataFrame
        Columns ``i, j`` (int64, ``i < j``), ``distance_A`` (centroid
        minimum-image distance), ``dx_A, dy_A, dz_A`` (minimum-image vector
        from centroid ``i`` to centroid ``j``), plus ``min_atom_distance_A``
        when asked or when ``criterion='atom'``. Sorted by ``(i, j)``.

    Raises
    ------
    InputError
        For a bad cutoff (or one beyond half the shortest box width), box,
        criterion, or missing atom positions.

    Notes
    -----
    The cutoff must not exceed half the shortest box width (perpendicular
    distance between faces), so that each pair has one nearest image.
    Atom distances are minimum-image per atom pair, so molecules need not be
    whole for them; centroids must belong to whole molecules.

    Examples
    --------
    >>> c = [[0.0, 0, 0], [9.0, 0, 0], [5.0, 0, 0]]
    >>> t = neighbour_pairs(c, 4.5, box=[10, 10, 10, 90, 90, 90])
    >>> t[["i", "j"]].values.tolist()
    [[0, 1], [1, 2]]
    >>> t["dx_A"].round(6).tolist()
    [-1.0, -4.0]
    """
    c = _positions("centroids_A", centroids_A)
    if (isinstance(cutoff_A, (bool, np.bool_)) or not isinstance(cutoff_A, (int, float, np.integer, np.floating))
            or not (np.isfinite(cutoff_A) and cutoff_A > 0)):
        raise InputError(f"cutoff_A must be a finite number > 0 of Å; got {cutoff_A!r}.")
    b = _box(box)
    if b is not None:
        half = half_box_width_A(b)
        if cutoff_A > half * (1 + 1e-6):  # float32 boxes: 16 Å may read 16.0000005
            # beyond half the width a pair has two images within the cutoff; one would be dropped
            raise InputError(f"cutoff_A={cutoff_A!r} Å exceeds half the shortest box width ({half:.3f} Å); "
                             f"each pair has one nearest image only up to {half:.3f} Å.")
    if criterion not in ("centroid", "atom"):
        raise InputError(f"{criterion!r} is not a pair criterion. Use 'centroid' or 'atom'.")
    need_atoms = criterion == "atom" or with_min_atom_distance
    if need_atoms and atom_positions_A is None:
        raise InputError(
            f"criterion={criterion!r} / with_min_atom_distance={with_min_atom_distance} needs atom_positions_A."
        )
    n = c.shape[0]
    if need_atoms:
        pos, mol = _flat_atoms(atom_positions_A, atom_molecule, n)  # type: ignore[arg-type]
    if criterion == "centroid":
        pr, _ = mdadist.capped_distance(c, c, float(cutoff_A), box=b, return_distances=True)
        pr = np.asarray(pr, dtype=np.int64).reshape(-1, 2)
        pr = pr[pr[:, 0] < pr[:, 1]]
    else:
        pa = mdadist.capped_distance(pos, pos, float(cutoff_A), box=b, return_distances=False)
        pa = np.asarray(pa, dtype=np.int64).reshape(-1, 2)
        mi, mj = mol[pa[:, 0]], mol[pa[:, 1]]
        keep = mi != mj
        pr = np.stack([np.minimum(mi, mj), np.maximum(mi, mj)], axis=1)[keep]
    pr = np.unique(pr, axis=0) if pr.size else np.zeros((0, 2), dtype=np.int64)
    i, j = pr[:, 0].astype(np.int64), pr[:, 1].astype(np.int64)
    vec = c[j] - c[i]
    if b is not None and vec.shape[0]:
        vec = mdadist.minimize_vectors(vec, b)
    table = pd.DataFrame(
        {
            "i": i,
            "j": j,
            "distance_A": np.linalg.norm(vec, axis=1),
            "dx_A": vec[:, 0],
            "dy_A": vec[:, 1],
            "dz_A": vec[:, 2],
        }
    )
    if need_atoms:
        table["min_atom_distance_A"] = _min_atom_distance(pos, mol, i, j, b)
    return table.reset_index(drop=True)
