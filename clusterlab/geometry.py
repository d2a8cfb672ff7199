"""Periodic-box geometry on plain arrays (Å, degrees).

Every function takes ``box = [lx, ly, lz, alpha, beta, gamma]`` as MDAnalysis
does, or ``None`` for no periodicity. Nothing here knows about files or
Universes.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import numpy.typing as npt
from MDAnalysis.lib.mdamath import triclinic_vectors

from .errors import InputError

FloatArray = npt.NDArray[np.float64]


def box_vectors(box: npt.ArrayLike) -> FloatArray:
    """Lattice vectors (rows a, b, c; Å) of a box.

    Parameters
    ----------
    box : array_like, shape (6,) or (3, 3)
        ``[lx, ly, lz, alpha, beta, gamma]`` in Å and degrees (``a`` along x,
        ``b`` in the xy plane, as MDAnalysis), or the three vectors as rows.

    Raises
    ------
    InputError
        Wrong shape, non-positive lengths, angles outside (0, 180) degrees,
        or zero volume.
    """
    b = np.asarray(box, dtype=np.float64)
    if b.shape == (3, 3):
        h = b.copy()
    else:
        b = b.reshape(-1)
        if b.shape != (6,) or not np.all(np.isfinite(b)):
            raise InputError(f"box must be [lx, ly, lz, alpha, beta, gamma] or 3 row vectors; got {box!r}.")
        if np.any(b[:3] <= 0):
            raise InputError(f"box lengths must be positive Å; got {b[:3].tolist()}.")
        if not np.all((b[3:] > 0) & (b[3:] < 180)):
            raise InputError(f"box angles must lie in (0, 180) degrees; got {b[3:].tolist()}.")
        h = np.asarray(triclinic_vectors(b, dtype=np.float64), dtype=np.float64)
    if not np.all(np.isfinite(h)) or abs(np.linalg.det(h)) < 1e-6:
        raise InputError(f"box {np.asarray(box).tolist()} is degenerate (zero volume).")
    return h


def box_volume_A3(box: npt.ArrayLike) -> float:
    """Cell volume in Å³."""
    return float(abs(np.linalg.det(box_vectors(box))))


def perpendicular_widths(h: FloatArray) -> FloatArray:
    """Distances between opposite faces of the cell spanned by rows of ``h`` (Å).

    Half the smallest width is the largest radius for which a sphere around
    any point holds at most one image of any other point.
    """
    vol = abs(np.linalg.det(h))
    a, b, c = h
    return np.array(
        [vol / np.linalg.norm(np.cross(b, c)), vol / np.linalg.norm(np.cross(c, a)),
         vol / np.linalg.norm(np.cross(a, b))]
    )


def half_box_width_A(box: npt.ArrayLike) -> float:
    """Half the smallest distance between opposite faces of the cell of
    ``box`` ([lx, ly, lz, alpha, beta, gamma] or 3x3 rows), Å: the largest
    radius at which the minimum image of every point is unique."""
    return 0.5 * float(perpendicular_widths(box_vectors(box)).min())


def to_fractional(positions_A: FloatArray, h: FloatArray) -> FloatArray:
    """Cartesian (n, 3) → fractional coordinates in the cell of rows ``h``."""
    return np.asarray(positions_A) @ np.linalg.inv(h)


def minimum_image(vectors_A: npt.ArrayLike, box: npt.ArrayLike | None) -> FloatArray:
    """Shortest periodic image of each difference vector (n, 3), Å, in double
    precision (MDAnalysis keeps boxes in single precision).

    Exact for orthorhombic and triclinic cells: vectors are reduced to
    [-0.5, 0.5) in fractional coordinates and, for a triclinic cell, the 27
    neighbouring translations are searched. ``box`` is ``[lx, ly, lz, alpha,
    beta, gamma]`` or a (3, 3) matrix of row vectors; ``None`` returns the
    vectors unchanged.
    """
    v = np.atleast_2d(np.asarray(vectors_A, dtype=np.float64))
    if box is None:
        return v.copy()
    h = box_vectors(box)
    if np.allclose(h, np.diag(np.diag(h)), rtol=0, atol=1e-12):
        L = np.diag(h)
        return v - L * np.round(v / L)
    f = v @ np.linalg.inv(h)
    f -= np.round(f)
    d0 = f @ h
    shifts = np.array(np.meshgrid([-1, 0, 1], [-1, 0, 1], [-1, 0, 1], indexing="ij")).reshape(3, -1).T @ h
    out = np.empty_like(d0)
    step = 50_000
    for s in range(0, len(d0), step):
        cand = d0[s:s + step, None, :] + shifts[None, :, :]
        best = np.argmin(np.einsum("pkx,pkx->pk", cand, cand), axis=1)
        out[s:s + step] = cand[np.arange(len(best)), best]
    return out


def make_whole(
    positions_A: FloatArray,
    molecule_of_atom: npt.NDArray[np.int64],
    box: npt.ArrayLike | None,
) -> FloatArray:
    """Make every molecule whole across periodic boundaries (vectorised).

    Each atom is moved to the periodic image nearest to the first atom of its
    molecule. Correct whenever every atom lies within half the smallest box
    width of that atom, which holds for any molecule smaller than half the
    box; :class:`clusterlab.Film` checks bond lengths afterwards and falls back
    to a bond-graph walk otherwise.

    Parameters
    ----------
    positions_A : ndarray, shape (n, 3)
    molecule_of_atom : ndarray of int, shape (n,)
        Molecule index of each atom; atoms of one molecule need not be
        contiguous.
    box : array-like (6,) or None
    """
    pos = np.asarray(positions_A, dtype=np.float64)
    if box is None:
        return pos.copy()
    mol = np.asarray(molecule_of_atom)
    order = np.argsort(mol, kind="stable")
    sorted_mol = mol[order]
    first_idx = np.empty(mol.max() + 1, dtype=np.int64)
    # first atom (in atom order) of each molecule
    starts = np.flatnonzero(np.r_[True, sorted_mol[1:] != sorted_mol[:-1]])
    first_idx[sorted_mol[starts]] = order[starts]
    ref = pos[first_idx[mol]]
    return ref + minimum_image(pos - ref, box)


def wrap_molecules(
    whole_A: FloatArray, molecule_of_atom: npt.NDArray[np.int64], n_molecules: int, box: npt.ArrayLike
) -> tuple[FloatArray, FloatArray]:
    """Translate whole molecules by lattice vectors so each centroid lies in the
    primary cell [0, 1)³ (fractional). Returns ``(positions, centroids)``."""
    h = box_vectors(box)
    cent = molecule_centroids(whole_A, molecule_of_atom, n_molecules)
    shift_frac = -np.floor(to_fractional(cent, h))
    shift = shift_frac @ h
    return whole_A + shift[molecule_of_atom], cent + shift


def molecule_centroids(
    positions_A: FloatArray, molecule_of_atom: npt.NDArray[np.int64], n_molecules: int
) -> FloatArray:
    """Geometric centroid of each molecule (unweighted mean of its atoms)."""
    mol = np.asarray(molecule_of_atom)
    counts = np.bincount(mol, minlength=n_molecules).astype(float)
    out = np.empty((n_molecules, 3))
    for k in range(3):
        out[:, k] = np.bincount(mol, weights=positions_A[:, k], minlength=n_molecules)
    return out / counts[:, None]


def lattice_translations(h: FloatArray, cutoff_A: float) -> npt.NDArray[np.int64]:
    """All integer translations n (k, 3) such that a point in the reduced cell
    [-0.5, 0.5)³ shifted by n·h can come within ``cutoff_A`` of the origin."""
    widths = perpendicular_widths(h)
    n_max = np.ceil(cutoff_A / widths + 0.5).astype(int)
    rng = [np.arange(-m, m + 1) for m in n_max]
    grid = np.stack(np.meshgrid(*rng, indexing="ij"), axis=-1).reshape(-1, 3)
    return grid.astype(np.int64)


def unwrap_over_frames(
    points_A: npt.ArrayLike,
    boxes: Sequence[npt.ArrayLike | None],
) -> FloatArray:
    """Points made continuous across frames by consecutive-frame minimum images.

    ``u(0) = p(0)`` and ``u(f) = u(f-1) + minimum_image(p(f) - p(f-1), box(f))``;
    a frame without a box starts again from its own points (``u(f) = p(f)``).
    Exact as long as no point moves by more than half the smallest box width
    between consecutive frames (true for MD snapshots of a solid film).

    Parameters
    ----------
    points_A : array_like, shape (n_frames, n, 3), Å
        Positions of the same ``n`` points in each frame (e.g. molecule
        centroids wrapped into the primary cell).
    boxes : sequence of length n_frames
        ``[lx, ly, lz, alpha, beta, gamma]`` (or a (3, 3) matrix) or ``None``
        per frame.

    Returns
    -------
    ndarray, shape (n_frames, n, 3), Å

    Raises
    ------
    InputError
        For a wrong shape, non-finite points or a box count that does not
        match the frames.

    Examples
    --------
    >>> p = [[[9.5, 0, 0]], [[0.5, 0, 0]]]  # a point crossing the x face of a 10 Å box
    >>> unwrap_over_frames(p, [[10, 10, 10, 90, 90, 90]] * 2)[:, 0, 0].tolist()
    [9.5, 10.5]
    """
    p = np.asarray(points_A, dtype=np.float64)
    if p.ndim != 3 or p.shape[-1] != 3:
        raise InputError(f"points_A must have shape (n_frames, n, 3); got {p.shape}.")
    if not np.all(np.isfinite(p)):
        raise InputError("points_A must be finite.")
    if len(boxes) != p.shape[0]:
        raise InputError(f"boxes must hold one box (or None) per frame: {p.shape[0]} frames, {len(boxes)} boxes.")
    out = np.empty_like(p)
    for f in range(p.shape[0]):
        if f == 0 or boxes[f] is None:
            out[f] = p[f]
        else:
            out[f] = out[f - 1] + minimum_image(p[f] - p[f - 1], boxes[f])
    return out


def dihedral_deg(p0_A: npt.ArrayLike, p1_A: npt.ArrayLike, p2_A: npt.ArrayLike, p3_A: npt.ArrayLike) -> FloatArray:
    """Dihedral angle of the atom chains p0-p1-p2-p3, degrees in (-180, 180].

    IUPAC sign convention (IUPAC Gold Book, "torsion angle"): looking along
    p1 -> p2, positive when the bond p2-p3 is turned clockwise from p1-p0.
    Computed as ``atan2(|b2| b1·(b2×b3), (b1×b2)·(b2×b3))`` with
    ``b1 = p1 - p0``, ``b2 = p2 - p1``, ``b3 = p3 - p2`` (Blondel & Karplus,
    J. Comput. Chem. 17, 1132 (1996)). The points are taken as they are (whole
    molecules): no periodic images.

    Parameters
    ----------
    p0_A, p1_A, p2_A, p3_A : array_like, shape (n, 3) or (3,), Å

    Returns
    -------
    ndarray, shape (n,), degrees

    Raises
    ------
    InputError
        For mismatched shapes, non-finite points, or a chain with a zero bond
        or three collinear points (the angle is undefined).

    Examples
    --------
    >>> dihedral_deg([1, 0, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]).round(6).tolist()
    [90.0]
    """
    pts = [np.atleast_2d(np.asarray(p, dtype=np.float64)) for p in (p0_A, p1_A, p2_A, p3_A)]
    shape = pts[0].shape
    if len(shape) != 2 or shape[1] != 3 or any(p.shape != shape for p in pts):
        raise InputError(f"dihedral_deg needs four arrays of shape (n, 3); got {[p.shape for p in pts]}.")
    if not all(np.all(np.isfinite(p)) for p in pts):
        raise InputError("dihedral_deg: the points must be finite.")
    b1, b2, b3 = pts[1] - pts[0], pts[2] - pts[1], pts[3] - pts[2]
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    scale = np.linalg.norm(b1, axis=1) * np.linalg.norm(b2, axis=1) ** 2 * np.linalg.norm(b3, axis=1)
    degenerate = (np.linalg.norm(n1, axis=1) * np.linalg.norm(n2, axis=1)) <= 1e-12 * np.maximum(scale, 1e-300)
    if np.any(degenerate):
        raise InputError(f"dihedral_deg: chain(s) {np.flatnonzero(degenerate)[:10].tolist()} have a zero bond or "
                         "three collinear points; their dihedral angle is undefined.")
    y = np.linalg.norm(b2, axis=1) * np.einsum("ij,ij->i", b1, n2)
    x = np.einsum("ij,ij->i", n1, n2)
    out = np.degrees(np.arctan2(y, x))
    return np.where(out <= -180.0, out + 360.0, out)
