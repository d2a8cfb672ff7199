"""Exact Coulomb potentials of every molecule's carved environment, all molecules at once.

For every molecule ``i`` of one frame, :func:`environment_potential` gives the
potential (V) at each of its atoms from the point charges of the molecule
images that carving would put around it (same membership as
:func:`clusterlab.carve.select_images`: ``rule="atom"``, any atom pair within
the radius; ``rule="centroid"``, centroids within the radius; periodic images
of every molecule, ``i`` itself included, join once each when they qualify).
The sum is exact (no cut-off inside the environment, no multipole expansion);
only the order of the floating-point operations differs from a direct sum
(agreement to about 1e-13 relative).

How it is made fast
-------------------
1. Candidate molecule-image pairs (:func:`candidate_pairs`): the centroids
   and their periodic replicas (only replicas within the cut-off of the cell
   are built); small films take all centroid-replica distances from one
   matrix product, large ones from a KD-tree. Each unordered pair is kept
   once, a pair's atom-atom terms serve both molecules (Newton's third law
   for potentials: ``1/r_ab`` is symmetric). Inside the model the pair is
   owned by one of its two molecules by a parity rule, so that every
   molecule owns about half of its partners.
2. Atoms are stored molecule-major (padded to the largest molecule),
   augmented so that one matrix product gives squared distances:
   ``[x, |x|^2, 1] · [-2y, 1, |y|^2] = |x - y|^2`` (coordinates relative to
   the centroids' mean, so rounding stays near 1e-13 relative for boxes of
   100 Å).
3. Membership (``rule="atom"``), before any potential is summed: from the
   owner's atoms to the partner's centroid (all pairs in a few batched matrix
   products), a lower bound (minus the partner's extent) drops the partners
   that are certainly outside and an upper bound (plus the partner's atom
   nearest its centroid) keeps those certainly inside. Only the pairs between
   the bounds get their closest atom pair, from single-precision stacked
   products with a rounding-error band; a pair whose band contains the radius
   is decided again from plain float64 coordinate differences, so boundary
   cases follow carving's arithmetic.
4. Owners of member pairs with similar partner counts are batched (a few
   hundred thousand atom pairs per step, into reused buffers): one stacked
   float64 matrix product gives all their squared distances, ``sqrt`` and
   ``divide`` in place give ``1/r``, and two stacked matrix-vector products
   give the potential at the owners' atoms and at the partners' atoms.
   Partner contributions are added with one ``np.bincount`` per atom slot.

There is one Python-level iteration per batch of molecules (not per molecule,
pair or atom).

Units: Å, e, V (= eV/e).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import numpy.typing as npt
from scipy.spatial import cKDTree

from ..geometry import box_vectors
from ..units import COULOMB_EV_A

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
BoolArray = npt.NDArray[np.bool_]

__all__ = ["candidate_pairs", "environment_potential", "EnvironmentPairs", "PotentialResult"]

#: centroid-replica distance matrices up to this many entries are computed densely (else KD-tree)
_DENSE_MAX = 4_000_000
#: atom pairs per batch of owner molecules (squared-distance buffer of 8 bytes each)
_BATCH_ENTRIES = 1 << 18
#: stand-in squared norm of padding atoms: they sit 10^6 Å from everything
_FAR = 1e12


@dataclass(frozen=True)
class EnvironmentPairs:
    """Directed molecule-image pairs of one frame: image ``shift_A[k]`` of
    molecule ``env[k]`` belongs to the environment of molecule ``center[k]``
    (``image[k]``: integer lattice translation)."""

    center: IntArray
    env: IntArray
    image: IntArray
    shift_A: FloatArray


@dataclass(frozen=True)
class PotentialResult:
    """Output of :func:`environment_potential`.

    Attributes
    ----------
    potential_V : ndarray (n_atoms,)
        Environment potential at every atom, in the caller's atom order (V).
    pairs : EnvironmentPairs
        Directed member pairs (both directions of each unordered pair).
    n_candidates : int
        Unordered candidate pairs examined.
    n_atom_pairs : int
        Atom pairs whose ``1/r`` entered the sums (unordered).
    """

    potential_V: FloatArray
    pairs: EnvironmentPairs
    n_candidates: int
    n_atom_pairs: int


@dataclass(frozen=True)
class CandidatePairs:
    """Unordered candidate molecule-image pairs of one frame (see :func:`candidate_pairs`).

    Attributes
    ----------
    i, j : ndarray (p,) int
        Either ``i < j``, or ``i == j`` with a lexicographically positive
        translation (a molecule and its own periodic image).
    image : ndarray (p, 3) int
        Lattice translation of ``j``.
    replica : ndarray (p,) int
        Index of ``j``'s translated copy in ``replica_molecule`` / ``replica_shift_A``.
    vector_A : ndarray (p, 3)
        ``c_i - (c_j + image @ h)`` (Å).
    replica_molecule : ndarray (n_rep,) int
    replica_shift_A : ndarray (n_rep, 3)
        The translated molecule copies the pairs refer to.
    """

    i: IntArray
    j: IntArray
    image: IntArray
    replica: IntArray
    vector_A: FloatArray
    replica_molecule: IntArray
    replica_shift_A: FloatArray

    def take(self, sel: IntArray | BoolArray) -> "CandidatePairs":
        return CandidatePairs(self.i[sel], self.j[sel], self.image[sel], self.replica[sel], self.vector_A[sel],
                              self.replica_molecule, self.replica_shift_A)


@dataclass(frozen=True)
class _Replicas:
    """Translated copies of the centroids within reach of the primary cell."""

    molecule: IntArray        # (n_rep,) molecule of each copy
    image: IntArray           # (n_rep, 3) integer translation
    shift_A: FloatArray       # (n_rep, 3) translation (Å)
    centroid_A: FloatArray    # (n_rep, 3) translated centroid (Å)
    positive: BoolArray       # (n_rep,) translation lexicographically positive


def _replicas(c: FloatArray, box: npt.ArrayLike | None, cutoff_A: float) -> _Replicas:
    n = len(c)
    if box is None:
        return _Replicas(np.arange(n, dtype=np.int64), np.zeros((n, 3), np.int64), np.zeros((n, 3)), c,
                         np.zeros(n, bool))
    h = box_vectors(box)
    h_inv = np.linalg.inv(h)
    # distances between opposite faces: 1 / |reciprocal vector| (columns of h^-1)
    w = 1.0 / np.sqrt(np.einsum("ki,ki->i", h_inv, h_inv))
    margin = cutoff_A / w + 1e-9
    frac = c @ h_inv
    # translations t for which frac + t can land inside [-margin, 1 + margin)
    t_lo = np.ceil(-margin - frac.max(axis=0)).astype(int)
    t_hi = np.ceil(1 + margin - frac.min(axis=0)).astype(int) - 1
    grid = np.stack(np.meshgrid(*[np.arange(a, b + 1) for a, b in zip(t_lo, t_hi)], indexing="ij"),
                    -1).reshape(-1, 3).astype(np.int64)
    rep_f = frac[None, :, :] + grid[:, None, :]
    keep = np.all((rep_f >= -margin) & (rep_f < 1 + margin), axis=2)
    t_idx, j_idx = np.nonzero(keep)
    img = grid[t_idx]
    positive = (img[:, 0] > 0) | ((img[:, 0] == 0) & ((img[:, 1] > 0) | ((img[:, 1] == 0) & (img[:, 2] > 0))))
    return _Replicas(j_idx.astype(np.int64), img, img @ h, rep_f[t_idx, j_idx] @ h, positive)


def _close_pairs(c: FloatArray, box: npt.ArrayLike | None, cutoff_A: float, *, balanced: bool
                 ) -> tuple[IntArray, IntArray, FloatArray, FloatArray, _Replicas]:
    """Unordered centroid-replica pairs within ``cutoff_A``: ``(owner, replica,
    vector, squared distance, replicas)``, sorted by owner; ``vector = c[owner] -
    replica centroid``.

    ``balanced=False``: the owner is the smaller molecule index; ``True``: for
    ``i != j`` the owner is ``min(i, j)`` when ``i + j`` is even, else ``max(i, j)``
    (every molecule owns about half of its partners). A molecule and its own
    image: the owner holds the lexicographically positive translation.
    """
    reps = _replicas(c, box, cutoff_A)
    n, n_rep = len(c), len(reps.molecule)
    if n * n_rep <= _DENSE_MAX:
        # all centroid-replica distances from one augmented matrix product; the
        # threshold is loosened by far more than its rounding, the exact test follows
        o = c.mean(axis=0) if n else np.zeros(3)
        a = np.empty((n, 5))
        b = np.empty((n_rep, 5))
        np.subtract(c, o, out=a[:, :3])
        a[:, 3] = np.einsum("nk,nk->n", a[:, :3], a[:, :3])
        a[:, 4] = 1.0
        np.subtract(reps.centroid_A, o, out=b[:, :3])
        b[:, 4] = np.einsum("nk,nk->n", b[:, :3], b[:, :3])
        b[:, :3] *= -2.0
        b[:, 3] = 1.0
        scale = float(max(a[:, 3].max(initial=0.0), b[:, 4].max(initial=0.0)))
        d2 = a @ b.T
        flat = np.flatnonzero(d2 <= cutoff_A * cutoff_A * (1 + 1e-9) + 1e-12 * scale + 1e-9)
        i = flat // n_rep
        k = flat - i * n_rep
    else:
        coo = cKDTree(c).sparse_distance_matrix(cKDTree(reps.centroid_A), cutoff_A * (1 + 1e-12),
                                                output_type="coo_matrix")
        # sparse_distance_matrix drops exact zero distances: an image never sits on
        # another molecule's centroid in a physical film
        i = coo.row.astype(np.int64)
        k = coo.col.astype(np.int64)
    j = reps.molecule[k]
    if balanced:
        own = (i < j) == (((i ^ j) & 1) == 0)
    else:
        own = i < j
    same = np.flatnonzero(i == j)
    own[same] = reps.positive[k[same]]
    sel = np.flatnonzero(own)
    i, k = i[sel], k[sel]
    vec = np.take(c, i, axis=0)
    vec -= np.take(reps.centroid_A, k, axis=0)
    d2 = np.einsum("pk,pk->p", vec, vec)
    sel = np.flatnonzero(d2 <= cutoff_A * cutoff_A)
    if len(sel) < len(i):
        i, k, vec, d2 = i[sel], k[sel], vec[sel], d2[sel]
    if len(i) > 1 and np.any(i[1:] < i[:-1]):
        order = np.argsort(i, kind="stable")
        i, k, vec, d2 = i[order], k[order], vec[order], d2[order]
    return i, k, vec, d2, reps


def candidate_pairs(centroids_A: FloatArray, box: npt.ArrayLike | None, cutoff_A: float) -> CandidatePairs:
    """Unordered molecule-image pairs with centroid distance <= ``cutoff_A``.

    The centroids against their periodic replicas (only replicas within
    ``cutoff_A`` of the cell are built): one matrix of distances for small
    films, a KD-tree search for large ones.

    Parameters
    ----------
    centroids_A : ndarray (n, 3)
        Centroids in the primary cell (Å).
    box : array_like (6,) or None
        ``[lx, ly, lz, alpha, beta, gamma]``; None: no periodic images.
    cutoff_A : float

    Returns
    -------
    CandidatePairs

    Examples
    --------
    >>> c = np.array([[1.0, 1, 1], [2.0, 1, 1]])
    >>> p = candidate_pairs(c, [10, 10, 10, 90, 90, 90], 1.5)
    >>> p.i.tolist(), p.j.tolist(), p.image.tolist()
    ([0], [1], [[0, 0, 0]])
    """
    c = np.asarray(centroids_A, dtype=np.float64)
    i, k, vec, _, reps = _close_pairs(c, box, float(cutoff_A), balanced=False)
    return CandidatePairs(i, reps.molecule[k], reps.image[k], k, vec, reps.molecule, reps.shift_A)


def environment_potential(
    positions_A: FloatArray,
    charges_e: FloatArray,
    atoms: IntArray,
    offsets: IntArray,
    centroids_A: FloatArray,
    box: npt.ArrayLike | None,
    radius_A: float,
    *,
    rule: str = "atom",
    want: BoolArray | None = None,
    threads: int = 1,
) -> PotentialResult:
    """Potential at every atom from its molecule's carved environment (exact sum).

    Parameters
    ----------
    positions_A : ndarray (n_atoms, 3)
        Whole molecules, centroids in the primary cell (Å).
    charges_e : ndarray (n_atoms,)
        Ground-state charges of the environment (e).
    atoms, offsets : ndarray int
        Molecule layout: ``atoms[offsets[m]:offsets[m+1]]`` are molecule m's atoms.
    centroids_A : ndarray (n_molecules, 3)
    box : array_like (6,) or None
    radius_A : float
    rule : {"atom", "centroid"}
    want : ndarray (n_molecules,) bool, optional
        Only pairs that touch a flagged molecule are evaluated (default: all).
        Potentials of molecules not flagged are then incomplete.
    threads : int
        Threads over the batches of molecules (numpy and BLAS release the GIL
        in the heavy steps); 1 runs in the calling thread.

    Returns
    -------
    PotentialResult

    Notes
    -----
    Molecules are padded to the largest molecule's atom count (padding atoms
    sit, through their augmented coordinates, 10^6 Å from everything and carry
    no charge), so films that mix very different molecule sizes pay for the
    largest size.

    Examples
    --------
    Two point charges in a 10 Å box, 3 Å apart, radius 4 Å (each sees the other
    once; the images are further than 4 Å):

    >>> pos = np.array([[1.0, 1, 1], [4.0, 1, 1]])
    >>> r = environment_potential(pos, np.array([1.0, -1.0]), np.arange(2), np.array([0, 1, 2]),
    ...                           pos, [10, 10, 10, 90, 90, 90], 4.0)
    >>> np.round(r.potential_V / COULOMB_EV_A * 3, 12).tolist()
    [-1.0, 1.0]
    """
    atoms = np.asarray(atoms, dtype=np.int64)
    offsets = np.asarray(offsets, dtype=np.int64)
    sizes = np.diff(offsets)
    n_mol = len(sizes)
    m = int(sizes.max(initial=1))
    cent = np.asarray(centroids_A, dtype=np.float64)
    rows_mol = np.repeat(np.arange(n_mol), sizes)
    rows_slot = np.arange(int(offsets[-1])) - offsets[:-1][rows_mol]
    mask = np.zeros((n_mol, m), bool)
    mask[rows_mol, rows_slot] = True
    pos = np.zeros((n_mol, m, 3))
    pos[rows_mol, rows_slot] = np.asarray(positions_A, dtype=np.float64)[atoms]
    q = np.zeros((n_mol, m))
    q[rows_mol, rows_slot] = np.asarray(charges_e, dtype=np.float64)[atoms]
    local = pos - cent[:, None, :]
    local[~mask] = 0.0
    n2loc = np.einsum("nak,nak->na", local, local)
    ext = np.sqrt(n2loc.max(axis=1)) if m else np.zeros(n_mol)
    atom_rule = rule == "atom"
    radius_A = float(radius_A)
    r2cut = radius_A * radius_A
    n_threads = max(1, int(threads))

    cut = radius_A + 2.0 * float(ext.max(initial=0.0)) + 1e-9 if atom_rule else radius_A * (1 + 1e-12) + 1e-9
    pi, pk, vec, d2cen, reps = _close_pairs(cent, box, cut, balanced=True)
    pj = reps.molecule[pk]
    dcen = np.sqrt(d2cen)
    if atom_rule:
        ok = dcen <= radius_A + ext[pi] + ext[pj] + 1e-9
    else:
        ok = dcen <= radius_A * (1 + 1e-12) + 1e-9
    if want is not None:
        ok &= want[pi] | want[pj]
    n_candidates = int(np.count_nonzero(ok))

    # augmented coordinates relative to the centroids' mean (|x|, |y| stay below a box
    # diagonal plus the radius); padding atoms and the stand-in replica sit 10^6 Å away
    origin = cent.mean(axis=0) if n_mol else np.zeros(3)
    xa = pos - origin
    x_aug = np.empty((n_mol, m, 5))
    x_aug[..., :3] = xa
    x_aug[..., 3] = np.einsum("nak,nak->na", xa, xa)
    x_aug[..., 3][~mask] = _FAR
    x_aug[..., 4] = 1.0
    rep_mol = reps.molecule
    n_rep = len(rep_mol)
    ya = pos[rep_mol]
    ya += (reps.shift_A - origin)[:, None, :]
    y_aug = np.empty((n_rep + 1, m, 5))
    np.multiply(ya, -2.0, out=y_aug[:n_rep, :, :3])
    y_aug[:n_rep, :, 3] = 1.0
    y_aug[:n_rep, :, 4] = np.einsum("nak,nak->na", ya, ya)
    y_aug[:n_rep, :, 4][~mask[rep_mol]] = _FAR
    y_aug[n_rep] = (0.0, 0.0, 0.0, 0.0, _FAR)

    if atom_rule:
        # owner atoms to the partner's centroid: a lower bound of the closest approach
        # (minus the partner's extent) and an upper bound (plus the partner's atom nearest
        # its centroid); pairs between the bounds get their closest atom pair
        l_aug = np.empty((n_mol, m, 5))
        l_aug[..., :3] = local
        l_aug[..., 3] = np.where(mask, n2loc, _FAR)
        l_aug[..., 4] = 1.0
        near_atom = np.sqrt(np.where(mask, n2loc, np.inf).min(axis=1)) if m else np.zeros(n_mol)
        sel = np.flatnonzero(ok)
        near = np.sqrt(np.maximum(_owner_atoms_to_point(l_aug, pi[sel], vec[sel], n_mol), 0.0))
        far_out = near - ext[pj[sel]] > radius_A * (1 + 1e-9) + 1e-9
        sure_in = near + near_atom[pj[sel]] <= radius_A * (1 - 1e-9) - 1e-9
        ok[sel[far_out]] = False
        test = sel[~far_out & ~sure_in]
        if len(test):
            d2 = _closest_d2(x_aug, y_aug, pi[test], pk[test], n_mol, r2cut, n_threads)
            edge = np.flatnonzero(np.isnan(d2))
            for e in edge:                             # within the rounding band: plain differences
                d2[e] = _exact_min_d2(pos, mask, int(pi[test[e]]), int(pj[test[e]]), reps.shift_A[pk[test[e]]])
            ok[test[d2 > r2cut]] = False
    pi, pk, pj = pi[ok], pk[ok], pj[ok]
    n_pairs = len(pi)

    # every remaining pair is a member: 1/r of all its atom pairs
    q_rep = np.zeros((n_rep + 1, m))
    q_rep[:n_rep] = q[rep_mol]
    pair_rep = np.append(pk, n_rep)                # pair index n_pairs: stand-in, far and uncharged
    lay = _OwnerLayout.of(pi, n_mol)
    pot = np.zeros((n_mol, m))
    back = np.zeros((m, n_pairs + 1))
    ctx = _Batch(x_aug=x_aug, y_aug=y_aug, q=q, q_rep=q_rep, pair_rep=pair_rep, lay=lay, m=m, pot=pot, back=back)
    _in_threads(lambda part: _potential_batches(ctx, part), _batches(lay.counts[lay.owners], m, _BATCH_ENTRIES),
                n_threads)
    if n_pairs:
        for a in range(m):                                       # potential at the partners' atoms
            pot[:, a] += np.bincount(pj, weights=back[a, :n_pairs], minlength=n_mol)
    full = np.zeros(len(positions_A))
    full[atoms] = pot[rows_mol, rows_slot] * COULOMB_EV_A
    center = np.empty(2 * n_pairs, np.int64)
    env = np.empty(2 * n_pairs, np.int64)
    center[:n_pairs] = pi
    center[n_pairs:] = pj
    env[:n_pairs] = pj
    env[n_pairs:] = pi
    image = np.empty((2 * n_pairs, 3), np.int64)
    shift = np.empty((2 * n_pairs, 3))
    np.take(reps.image, pk, axis=0, out=image[:n_pairs])
    np.negative(image[:n_pairs], out=image[n_pairs:])
    np.take(reps.shift_A, pk, axis=0, out=shift[:n_pairs])
    np.negative(shift[:n_pairs], out=shift[n_pairs:])
    n_terms = int(np.dot(sizes[pi], sizes[pj]))
    pairs = EnvironmentPairs(center=center, env=env, image=image, shift_A=shift)
    return PotentialResult(potential_V=full, pairs=pairs, n_candidates=n_candidates, n_atom_pairs=n_terms)


def _owner_atoms_to_point(l_aug: FloatArray, owner: IntArray, vec: FloatArray, n_mol: int) -> FloatArray:
    """Smallest squared distance from the atoms of molecule ``owner[p]`` to the
    point ``c[owner[p]] - vec[p]``, for every pair ``p`` (pairs sorted by owner).

    ``l_aug`` (n_mol, m, 5): ``[x - c, |x - c|^2 (padding: far), 1]``. Pairs are
    laid out per owner (owners of similar counts together) for stacked matrix
    products.
    """
    n_p = len(owner)
    m = l_aug.shape[1]
    out = np.empty(n_p + 1)
    v_aug = np.empty((n_p + 1, 5))
    np.multiply(vec, 2.0, out=v_aug[:n_p, :3])
    v_aug[:n_p, 3] = 1.0
    v_aug[:n_p, 4] = np.einsum("pk,pk->p", vec, vec)
    v_aug[n_p] = (0.0, 0.0, 0.0, 0.0, _FAR)
    lay = _OwnerLayout.of(owner, n_mol)
    for a, b, km in _batches(lay.counts[lay.owners], 1, _BATCH_ENTRIES // m):
        cs, pid, _ = lay.pairs(a, b, km, n_p)
        v = np.take(v_aug, pid, axis=0, mode="clip")                        # (owners, km, 5)
        out[pid] = np.matmul(l_aug[cs], v.transpose(0, 2, 1)).min(axis=1)
    return out[:n_p]


@dataclass(frozen=True)
class _OwnerLayout:
    """Pairs sorted by owner: ``counts[o]`` pairs of owner ``o`` from ``starts[o]``;
    ``owners``: the owners with pairs, by decreasing count."""

    counts: IntArray
    starts: IntArray
    owners: IntArray

    @classmethod
    def of(cls, owner: IntArray, n_mol: int) -> "_OwnerLayout":
        counts = np.bincount(owner, minlength=n_mol)
        owners = np.argsort(-counts, kind="stable")
        return cls(counts, np.cumsum(counts) - counts, owners[counts[owners] > 0])

    def pairs(self, a: int, b: int, km: int, stand_in: int) -> tuple[IntArray, IntArray, BoolArray]:
        """Owners ``a..b-1`` (in ``owners`` order), their pair indices padded to ``km``
        with ``stand_in``, and which entries are real."""
        cs = self.owners[a:b]
        slot = np.arange(km)
        pid = self.starts[cs][:, None] + slot
        valid = slot < self.counts[cs][:, None]
        pid[~valid] = stand_in
        return cs, pid, valid


def _batches(counts: IntArray, m: int, entries: int) -> list[tuple[int, int, int]]:
    """Split owners (sorted by decreasing pair count) into batches ``(first, end,
    padded count)`` of about ``entries`` atom pairs."""
    out = []
    a, n = 0, len(counts)
    per_pair = m * m
    while a < n:
        km = int(counts[a])
        g = max(1, entries // (km * per_pair))
        out.append((a, min(n, a + g), km))
        a += g
    return out


def _in_threads(fn: Callable[[list[tuple[int, int, int]]], None], batches: list[tuple[int, int, int]],
                threads: int) -> None:
    """Run ``fn`` over the batches, split over ``threads`` threads (round robin;
    batches come largest first)."""
    n_threads = max(1, min(threads, len(batches)))
    if n_threads == 1:
        fn(batches)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        list(pool.map(fn, [batches[t::n_threads] for t in range(n_threads)]))


def _block_buffers(batches: list[tuple[int, int, int]], m: int, floor: int,
                   dtype: type) -> tuple[npt.NDArray[Any], npt.NDArray[Any]]:
    """Reusable buffers for :func:`_block_d2` over ``batches``: squared distances
    (at least ``floor`` entries, enough for the largest batch) and gathered partners."""
    size = max(floor, max(((b - a) * km * m * m for a, b, km in batches), default=0))
    return np.empty(size, dtype), np.empty(size // m * 5, dtype)


def _block_d2(x_aug: npt.NDArray[Any], y_aug: npt.NDArray[Any], cs: IntArray, reps: IntArray,
              gbuf: npt.NDArray[Any], ybuf: npt.NDArray[Any]) -> npt.NDArray[Any]:
    """Squared atom distances of owners ``cs`` (G) to their partner replicas ``reps``
    (G, km): one stacked product of augmented coordinates, shape (G, m, km * m), in
    ``gbuf`` (padding entries of ``reps`` name the far stand-in replica)."""
    g_n, km = reps.shape
    m = x_aug.shape[1]
    y = np.take(y_aug, reps, axis=0, out=ybuf[: g_n * km * m * 5].reshape(g_n, km, m, 5), mode="clip")
    return np.matmul(x_aug[cs], y.reshape(g_n, km * m, 5).transpose(0, 2, 1),
                     out=gbuf[: g_n * m * km * m].reshape(g_n, m, km * m))


def _closest_d2(x_aug: FloatArray, y_aug: FloatArray, owner: IntArray, rep: IntArray, n_mol: int, r2cut: float,
                threads: int) -> FloatArray:
    """Closest squared atom distance of each pair (``owner`` sorted; ``rep``: partner
    replica), as far as needed to compare with ``r2cut``.

    Single-precision stacked products: each value is exact to within a bound of its
    rounding error; values whose band contains ``r2cut`` come back as NaN (the caller
    decides those from plain differences), the others decide membership exactly.
    """
    m = x_aug.shape[1]
    n_p = len(owner)
    real_x = x_aug[..., 3] < _FAR
    real_y = y_aug[..., 4] < _FAR
    big = float(np.sqrt(x_aug[..., 3][real_x].max(initial=0.0)) + np.sqrt(y_aug[..., 4][real_y].max(initial=0.0)))
    # rounding of inputs (2u per product) and of a 5-term sum (5u), u = 2^-24, on terms
    # summing to at most (|x| + |y|)^2; twice that, for margin
    band = 2.0 * 8.0 * 2.0 ** -24 * big * big
    x32 = x_aug.astype(np.float32)
    y32 = y_aug.astype(np.float32)
    rep_ext = np.append(rep, len(y_aug) - 1)
    lay = _OwnerLayout.of(owner, n_mol)
    out = np.empty(n_p + 1, np.float32)

    def run(batches: list[tuple[int, int, int]]) -> None:
        gbuf, ybuf = _block_buffers(batches, m, 2 * _BATCH_ENTRIES, np.float32)
        for a, b, km in batches:
            cs, pid, _ = lay.pairs(a, b, km, n_p)
            g = _block_d2(x32, y32, cs, rep_ext[pid], gbuf, ybuf)
            out[pid] = g.min(axis=1).reshape(len(cs), km, m).min(axis=2)

    _in_threads(run, _batches(lay.counts[lay.owners], m, 2 * _BATCH_ENTRIES), threads)
    d2 = out[:n_p].astype(np.float64)
    d2[np.abs(d2 - r2cut) <= band + 1e-9 * r2cut] = np.nan
    return d2


@dataclass(frozen=True)
class _Batch:
    """Arrays shared by the batches of :func:`environment_potential`."""

    x_aug: FloatArray         # (n_mol, m, 5) owner atoms, [x, |x|^2, 1]
    y_aug: FloatArray         # (n_rep + 1, m, 5) replica atoms, [-2y, 1, |y|^2]
    q: FloatArray             # (n_mol, m)
    q_rep: FloatArray         # (n_rep + 1, m)
    pair_rep: IntArray        # (n_pairs + 1,) replica of each pair
    lay: _OwnerLayout
    m: int
    pot: FloatArray           # (n_mol, m) out: potential at owner atoms
    back: FloatArray          # (m, n_pairs + 1) out: potential at partner atoms


def _potential_batches(ctx: _Batch, batches: list[tuple[int, int, int]]) -> None:
    """Sum ``1/r`` over all atom pairs of the member pairs of the owners in ``batches``;
    writes ``ctx.pot`` rows of those owners and ``ctx.back`` columns of their pairs
    (padding entries point at the stand-in replica: far and uncharged, so they add
    exact zeros; the stand-in column of ``back`` takes garbage and is never read)."""
    m = ctx.m
    if not batches:
        return
    gbuf, ybuf = _block_buffers(batches, m, _BATCH_ENTRIES, np.float64)
    wbuf = np.empty(len(gbuf) // m)
    stand_in = len(ctx.pair_rep) - 1
    for a, b, km in batches:
        cs, pid, _ = ctx.lay.pairs(a, b, km, stand_in)
        g_n = len(cs)
        kk = ctx.pair_rep[pid]                                              # (G, km) replicas
        g = _block_d2(ctx.x_aug, ctx.y_aug, cs, kk, gbuf, ybuf)             # squared distances
        np.sqrt(g, out=g)
        np.divide(1.0, g, out=g)                                             # 1/r
        w = np.take(ctx.q_rep, kk, axis=0, out=wbuf[: g_n * km * m].reshape(g_n, km, m), mode="clip")
        ctx.pot[cs] += np.matmul(g, w.reshape(g_n, km * m, 1))[:, :, 0]
        bk = np.matmul(ctx.q[cs][:, None, :], g).reshape(g_n, km, m)
        ctx.back[:, pid] = bk.transpose(2, 0, 1)


def _exact_min_d2(pos: FloatArray, mask: BoolArray, owner: int, partner: int, shift_A: FloatArray) -> float:
    """Closest squared distance between the atoms of ``owner`` and of the partner
    image (``partner`` moved by ``shift_A``), from plain coordinate differences."""
    x = pos[owner][mask[owner]]
    y = pos[partner][mask[partner]] + shift_A
    d = x[:, None, :] - y[None, :, :]
    return float(np.min(np.einsum("abk,abk->ab", d, d)))
