"""Conformer families of one molecule type: alignment, reference choice, assignment.

Copies of a molecule type in a film differ in shape (ring torsions, thermal
distortions). State charges and polarizability changes are fitted on a few
*reference copies*; every copy then takes the numbers of the reference it
resembles most. "Resembles" means the smallest root-mean-square deviation
after the best superposition with atom correspondence (atom order within the
molecule). The superposition may include a reflection: charges are scalars
and a polarizability tensor transforms as ``R A R^T`` under any orthogonal
``R``, so a mirror-image conformer carries the same numbers.

The superposition is the orthogonal Procrustes solution (Kabsch, Acta Cryst.
A 32, 922 (1976), without the determinant correction when reflections are
allowed), batched with numpy's SVD.

Units: Å.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import numpy.typing as npt

from ..errors import InputError

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

__all__ = ["superpose", "pick_references", "assign_conformers", "equivalence_classes", "bonds_by_distance"]


def superpose(reference_A: npt.ArrayLike, copies_A: npt.ArrayLike, *, reflections: bool = True
              ) -> tuple[FloatArray, FloatArray]:
    """Best orthogonal superposition of ``reference_A`` onto each copy.

    Parameters
    ----------
    reference_A : array_like (n, 3)
    copies_A : array_like (k, n, 3) or (n, 3)
        Same atom order as the reference.
    reflections : bool
        Allow improper rotations (determinant -1).

    Returns
    -------
    rotation : ndarray (k, 3, 3)
        ``(copy - centroid) ≈ (reference - centroid) @ rotation[k].T``.
    rmsd_A : ndarray (k,)
        Root-mean-square deviation after superposition (Å).

    Raises
    ------
    InputError
        Shapes that do not match.

    Examples
    --------
    >>> ref = np.array([[0.0, 0, 0], [1.0, 0, 0], [0.0, 2.0, 0]])
    >>> rot90 = np.array([[0.0, -1, 0], [1.0, 0, 0], [0, 0, 1.0]])
    >>> r, d = superpose(ref, ref @ rot90.T + 5.0)
    >>> bool(np.allclose(r[0], rot90)), bool(d[0] < 1e-12)
    (True, True)
    """
    ref = np.asarray(reference_A, dtype=np.float64)
    cop = np.asarray(copies_A, dtype=np.float64)
    if cop.ndim == 2:
        cop = cop[None]
    if ref.ndim != 2 or ref.shape[1] != 3 or cop.shape[1:] != ref.shape:
        raise InputError(f"reference shape {ref.shape} and copies shape {cop.shape} do not match; "
                         "use (n, 3) and (k, n, 3) with the same atom order.")
    a = ref - ref.mean(axis=0)
    b = cop - cop.mean(axis=1, keepdims=True)
    cov = np.einsum("ni,kny->kiy", a, b)                      # a^T b
    u, _, vt = np.linalg.svd(cov)
    if not reflections:
        d = np.sign(np.linalg.det(u @ vt))
        u = u.copy()
        u[:, :, 2] *= d[:, None]
    rot = np.transpose(u @ vt, (0, 2, 1))                     # b ≈ a @ rot^T
    fit = np.einsum("ni,kyi->kny", a, rot)
    rmsd = np.sqrt(np.mean(np.sum((fit - b) ** 2, axis=2), axis=1))
    return rot, rmsd


def pick_references(copies_A: npt.ArrayLike, n_references: int, *, first: int = 0,
                    min_rmsd_A: float = 0.0, medoids: bool = False, max_rounds: int = 5) -> IntArray:
    """Choose reference copies by farthest-point sampling in superposed RMSD.

    The first reference is copy ``first``; each next one is the copy farthest
    (in RMSD to its nearest reference) from those chosen so far. Sampling stops
    early when no copy is farther than ``min_rmsd_A`` from every reference.
    Farthest points are the family's extremes; with ``medoids=True`` every
    reference then moves to the medoid of its family (the member with the
    smallest summed RMSD to the others; k-medoids rounds, at most
    ``max_rounds``), a copy typical of the family.

    Parameters
    ----------
    copies_A : array_like (k, n, 3)
    n_references : int
    first : int
    min_rmsd_A : float
    medoids : bool
    max_rounds : int

    Returns
    -------
    ndarray (r,) int
        Indices into ``copies_A``, ``r <= n_references``.

    Raises
    ------
    InputError
        ``n_references < 1`` or ``first`` out of range.
    """
    cop = np.asarray(copies_A, dtype=np.float64)
    if int(n_references) < 1:
        raise InputError(f"n_references must be at least 1; got {n_references!r}.")
    if not (0 <= int(first) < len(cop)):
        raise InputError(f"first={first!r} is not a copy index (0..{len(cop) - 1}).")
    chosen = [int(first)]
    dist = superpose(cop[first], cop)[1]
    while len(chosen) < int(n_references):
        nxt = int(np.argmax(dist))
        if dist[nxt] <= min_rmsd_A:
            break
        chosen.append(nxt)
        dist = np.minimum(dist, superpose(cop[nxt], cop)[1])
    if not medoids:
        return np.asarray(chosen, dtype=np.int64)
    for _ in range(int(max_rounds)):
        fam = assign_conformers(cop[chosen], cop)[0]
        new = []
        for k in range(len(chosen)):
            members = np.flatnonzero(fam == k)
            if members.size == 0:
                new.append(chosen[k])
                continue
            pair = np.stack([superpose(cop[a], cop[members])[1] for a in members])
            new.append(int(members[np.argmin(pair.sum(axis=1))]))
        if new == chosen:
            break
        chosen = new
    return np.asarray(chosen, dtype=np.int64)


def assign_conformers(references_A: npt.ArrayLike, copies_A: npt.ArrayLike
                      ) -> tuple[IntArray, FloatArray, FloatArray]:
    """Nearest reference (by superposed RMSD) of every copy.

    Parameters
    ----------
    references_A : array_like (r, n, 3)
    copies_A : array_like (k, n, 3)

    Returns
    -------
    family : ndarray (k,) int
        Index of the nearest reference.
    rotation : ndarray (k, 3, 3)
        Superposition of that reference onto the copy (see :func:`superpose`).
    rmsd_A : ndarray (k,)
    """
    refs = np.asarray(references_A, dtype=np.float64)
    cop = np.asarray(copies_A, dtype=np.float64)
    rots, rms = zip(*(superpose(r, cop) for r in refs))
    rms_all = np.stack(rms)                                   # (r, k)
    fam = np.argmin(rms_all, axis=0)
    k = np.arange(len(cop))
    return fam.astype(np.int64), np.stack(rots)[fam, k], rms_all[fam, k]


def equivalence_classes(symbols: Sequence[str], bonds: npt.ArrayLike) -> IntArray:
    """Topologically equivalent atoms of one molecule by colour refinement.

    Every atom starts with its element; each round it takes the multiset of its
    neighbours' colours as well, until the partition stops changing (Morgan's
    extended connectivity, J. Chem. Doc. 5, 107 (1965); also known as 1-dim
    Weisfeiler-Lehman refinement). Atoms of one class are equivalent under the
    molecule's symmetry in ordinary molecules (2,2'-bithiophene: the two rings;
    water: the two hydrogens); for some highly regular graphs refinement merges
    atoms that no symmetry maps onto each other (a known limit).

    Parameters
    ----------
    symbols : sequence of str, length n
    bonds : array_like (k, 2) int
        Atom index pairs within the molecule (0-based).

    Returns
    -------
    ndarray (n,) int
        Class label of every atom (0, 1, ... in order of first appearance).

    Examples
    --------
    >>> equivalence_classes(["O", "H", "H"], [[0, 1], [0, 2]]).tolist()
    [0, 1, 1]
    """
    n = len(symbols)
    nb: list[list[int]] = [[] for _ in range(n)]
    for a, b in np.asarray(bonds, dtype=np.int64).reshape(-1, 2):
        nb[int(a)].append(int(b))
        nb[int(b)].append(int(a))
    colour = _relabel([str(s) for s in symbols])
    while True:
        new = _relabel([(colour[i], tuple(sorted(colour[j] for j in nb[i]))) for i in range(n)])
        if len(set(new)) == len(set(colour)):
            return np.asarray(new, dtype=np.int64)
        colour = new


def _relabel(keys: list) -> list[int]:
    seen: dict = {}
    return [seen.setdefault(k, len(seen)) for k in keys]


def bonds_by_distance(symbols: Sequence[str], positions_A: npt.ArrayLike, scale: float = 1.2) -> IntArray:
    """Bonds where two atoms are closer than ``scale`` times the sum of their
    covalent radii (PySCF's table, Cordero et al., Dalton Trans. 2832 (2008);
    common practice), for molecules whose topology has no bonds."""
    from pyscf.data import elements, radii

    pos = np.asarray(positions_A, dtype=np.float64)
    r = np.array([radii.COVALENT[elements.charge(s)] for s in symbols]) * radii.BOHR
    d = np.linalg.norm(pos[:, None] - pos[None], axis=2)
    i, j = np.nonzero(np.triu(d < scale * (r[:, None] + r[None, :]), k=1))
    return np.stack([i, j], axis=1).astype(np.int64)
