"""Cluster carving on plain arrays.

:func:`select_images` decides which periodic images of which molecules lie
within the cut radius of a central molecule; :func:`carve_cluster` turns the
choice into a :class:`~clusterlab.cluster.Cluster`. Both work on molecules
that are already whole with their centroids in the primary cell (see
:func:`clusterlab.geometry.wrap_molecules`).

Semantics
---------
- ``rule="atom"``: a molecule image joins when any of its atoms lies within
  ``radius_A`` of any atom of the central molecule.
- ``rule="centroid"``: when its centroid lies within ``radius_A`` of the
  central centroid.
- Molecules join or leave whole, never cut.
- Radii larger than half the box are supported: every periodic image that
  qualifies is included exactly once, images of the central molecule itself
  included (they belong to the environment).
- ``qm_shell_A > 0``: molecule images whose closest atom lies within that
  distance of the central molecule's atoms move into the QM region (whole).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.spatial import cKDTree

from .errors import CarvingError
from .geometry import box_vectors, lattice_translations, to_fractional

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

RULES = ("atom", "centroid")


@dataclass(frozen=True)
class MoleculeIndex:
    """Atoms grouped by molecule, as a CSR-like layout.

    ``atoms[offsets[i]:offsets[i+1]]`` are the atom indices of molecule i.
    """

    atoms: IntArray
    offsets: IntArray

    @classmethod
    def from_molecule_of_atom(cls, molecule_of_atom: IntArray) -> "MoleculeIndex":
        mol = np.asarray(molecule_of_atom, dtype=np.int64)
        order = np.argsort(mol, kind="stable")
        counts = np.bincount(mol)
        offsets = np.r_[0, np.cumsum(counts)].astype(np.int64)
        return cls(atoms=order.astype(np.int64), offsets=offsets)

    @property
    def n_molecules(self) -> int:
        return len(self.offsets) - 1

    def of(self, i: int) -> IntArray:
        return self.atoms[self.offsets[i]:self.offsets[i + 1]]

    def sizes(self) -> IntArray:
        return np.diff(self.offsets)


@dataclass(frozen=True)
class ImageSelection:
    """Molecule images chosen by a carve.

    ``molecules[k]`` shifted by lattice translation ``images[k]`` (integer
    multiples of the box vectors) lies at closest-atom distance
    ``atom_distance_A[k]`` and centroid distance ``centroid_distance_A[k]``
    from the central molecule.
    """

    molecules: IntArray
    images: IntArray
    centroid_distance_A: FloatArray
    atom_distance_A: FloatArray
    in_qm: npt.NDArray[np.bool_]


def _candidate_images(
    centroids_A: FloatArray, center: int, cutoff_A: float, box: npt.ArrayLike | None
) -> tuple[IntArray, IntArray, FloatArray]:
    """All (molecule, translation) pairs whose centroid lies within cutoff of
    the central centroid, the central molecule's own untranslated copy excluded."""
    c = centroids_A[center]
    n_mol = len(centroids_A)
    if box is None:
        d = np.linalg.norm(centroids_A - c, axis=1)
        keep = np.flatnonzero(d <= cutoff_A)
        keep = keep[keep != center]
        return keep.astype(np.int64), np.zeros((len(keep), 3), np.int64), d[keep]
    h = box_vectors(box)
    f = to_fractional(centroids_A - c, h)
    shift = -np.round(f)
    fr = f + shift
    trans = lattice_translations(h, cutoff_A)
    v0 = fr @ h  # reduced (near-minimum-image) centroid vectors, (n_mol, 3)
    v0_sq = np.einsum("mi,mi->m", v0, v0)
    mols, imgs, dists = [], [], []
    chunk = max(1, int(4_000_000 // max(n_mol, 1)))
    for start in range(0, len(trans), chunk):
        t = trans[start:start + chunk]
        tv = t @ h
        # |v0 + T|^2 = |v0|^2 + |T|^2 + 2 v0.T, as one matrix product
        d2 = v0_sq[:, None] + np.einsum("ti,ti->t", tv, tv)[None, :] + 2.0 * (v0 @ tv.T)
        mi, ti = np.nonzero(d2 <= cutoff_A * cutoff_A * (1 + 1e-12) + 1e-9)
        mols.append(mi)
        imgs.append(t[ti] + shift[mi].astype(np.int64))
        dists.append(np.linalg.norm(v0[mi] + tv[ti], axis=1))
    mol = np.concatenate(mols).astype(np.int64)
    img = np.concatenate(imgs).astype(np.int64)
    dist = np.concatenate(dists)
    self_copy = (mol == center) & np.all(img == 0, axis=1)
    return mol[~self_copy], img[~self_copy], dist[~self_copy]


def select_images(
    positions_A: FloatArray,
    centroids_A: FloatArray,
    index: MoleculeIndex,
    center: int,
    radius_A: float,
    *,
    box: npt.ArrayLike | None,
    rule: str = "atom",
    qm_shell_A: float = 0.0,
) -> ImageSelection:
    """Choose the molecule images of a cluster (see module docstring).

    Parameters
    ----------
    positions_A : ndarray (n_atoms, 3)
        Whole molecules, centroids in the primary cell.
    centroids_A : ndarray (n_molecules, 3)
    index : MoleculeIndex
    center : int
    radius_A : float
    box : array-like (6,) or None
        None carves without periodic images.
    rule : {"atom", "centroid"}
    qm_shell_A : float
    """
    if rule not in RULES:
        raise CarvingError(f"{rule!r} is an invalid carving rule. Use 'atom' or 'centroid'.")
    if not np.isfinite(radius_A) or radius_A < 0:
        raise CarvingError(f"radius must be a finite non-negative number of Å; got {radius_A!r}.")
    if not np.isfinite(qm_shell_A) or qm_shell_A < 0:
        raise CarvingError(f"qm_shell must be a finite non-negative number of Å; got {qm_shell_A!r}.")
    n_mol = index.n_molecules
    if not (0 <= center < n_mol):
        raise CarvingError(f"molecule {center!r} does not exist; valid ids are 0..{n_mol - 1}.")

    sizes = index.sizes()
    ext = np.empty(n_mol)
    # extent: largest atom-centroid distance of each molecule
    d_atoms = np.linalg.norm(positions_A[index.atoms] - np.repeat(centroids_A, sizes, axis=0), axis=1)
    ext = np.maximum.reduceat(d_atoms, index.offsets[:-1]) if len(d_atoms) else ext
    c_atoms = positions_A[index.of(center)]
    need_atoms = rule == "atom" or qm_shell_A > 0
    atom_reach = max(radius_A if rule == "atom" else 0.0, qm_shell_A)
    cutoff = max(radius_A if rule == "centroid" else 0.0,
                 atom_reach + ext[center] + ext.max() if need_atoms else 0.0)
    mol, img, dcen = _candidate_images(centroids_A, center, cutoff, box)

    datom = np.full(len(mol), np.inf)
    if need_atoms and len(mol):
        # only candidates that could be within atom_reach need the atom test
        maybe = dcen <= atom_reach + ext[center] + ext[mol]
        idx_c = np.flatnonzero(maybe)
        if len(idx_c):
            h = box_vectors(box) if box is not None else np.zeros((3, 3))
            shift = img[idx_c] @ h
            counts = sizes[mol[idx_c]]
            starts = index.offsets[mol[idx_c]]
            # flat list of atoms of all candidate images
            rep = np.repeat(np.arange(len(idx_c)), counts)
            within = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
            atoms = index.atoms[np.repeat(starts, counts) + within]
            pts = positions_A[atoms] + shift[rep]
            tree = cKDTree(c_atoms)
            dmin, _ = tree.query(pts, k=1, distance_upper_bound=atom_reach + 1e-9)
            block_starts = np.r_[0, np.cumsum(counts)[:-1]]
            datom[idx_c] = np.minimum.reduceat(dmin, block_starts)
    if rule == "atom":
        keep = datom <= radius_A
    else:
        keep = dcen <= radius_A
    in_qm = datom <= qm_shell_A if qm_shell_A > 0 else np.zeros(len(mol), bool)
    keep |= in_qm
    order = np.lexsort((img[:, 2], img[:, 1], img[:, 0], mol))
    order = order[keep[order]]
    return ImageSelection(
        molecules=mol[order], images=img[order], centroid_distance_A=dcen[order],
        atom_distance_A=datom[order], in_qm=in_qm[order],
    )
