"""The periodic limit: the QM region in the Ewald-summed field of the whole
film box (PySCF ``pyscf.qmmm.pbc``), reported as radius = inf.

Treatment of images (stated once, here):

* Every atom of the box except those of the QM molecules is a point charge,
  taken at its minimum image around the QM centroid; PySCF then sums all of
  their periodic images by Ewald summation (real space within
  ``rcut_ewald``, exact integrals within ``rcut_hcore``, multipole-expanded
  beyond).
* The QM molecules' own periodic images are NOT in the point-charge set.
  PySCF's periodic embedding includes them as the atom-centred multipoles
  (charge, dipole, quadrupole) of the QM density itself, updated
  self-consistently in the SCF; the QM region thus sees a lattice of copies
  of itself. The response (TDA/TDDFT) kernel does not include the images'
  response to the excitation.
* Only orthorhombic boxes are supported by PySCF's periodic embedding;
  triclinic boxes raise :class:`~clusterlab.errors.InputError`.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np
import numpy.typing as npt

from ..cluster import Cluster
from ..errors import InputError
from .calc import Embedding
from .engine import _excitations
from .method import Method, check_periodic_environment
from .results import ExcitationResult

FloatArray = npt.NDArray[np.float64]


def box_to_lattice_A(box: npt.ArrayLike) -> FloatArray:
    """Lattice vectors (rows, Å) from ``[lx, ly, lz, alpha, beta, gamma]``
    (Å, degrees), in the usual convention a along x, b in the xy plane."""
    lx, ly, lz, al, be, ga = np.asarray(box, dtype=float).reshape(6)
    al, be, ga = np.radians([al, be, ga])
    a = np.array([lx, 0.0, 0.0])
    b = np.array([ly * math.cos(ga), ly * math.sin(ga), 0.0])
    cx = lz * math.cos(be)
    cy = lz * (math.cos(al) - math.cos(be) * math.cos(ga)) / math.sin(ga)
    cz = math.sqrt(max(lz * lz - cx * cx - cy * cy, 0.0))
    lat = np.array([a, b, [cx, cy, cz]])
    lat[np.abs(lat) < 1e-12] = 0.0
    return lat


def _orthorhombic_lengths(box) -> FloatArray:
    if box is None:
        raise InputError("Periodic embedding needs the film box; this cluster has box=None.")
    box = np.asarray(box, dtype=float).reshape(6)
    if not np.allclose(box[3:], 90.0, atol=1e-6):
        raise InputError(f"Periodic embedding supports orthorhombic boxes only (PySCF's Ewald embedding); "
                         f"got angles {box[3:].tolist()} degrees.")
    if np.any(box[:3] <= 0):
        raise InputError(f"Box lengths must be positive; got {box[:3].tolist()} Å.")
    return box[:3]


def periodic_cluster(qm_symbols: list[str], qm_positions_A: npt.ArrayLike, other_positions_A: npt.ArrayLike,
                     other_charges_e: npt.ArrayLike, box: npt.ArrayLike, **provenance) -> Cluster:
    """A cluster holding the QM region and every other atom of the box,
    for :func:`periodic_excitations` (no cut radius)."""
    return Cluster.from_arrays(qm_symbols, qm_positions_A, other_positions_A, other_charges_e, box=box, **provenance)


def _minimum_image_set(cluster: Cluster, lengths: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Environment charges wrapped to the minimum image around the QM
    centroid, duplicates (images of the same atom) removed, QM molecules'
    own images dropped."""
    centre = cluster.qm_positions.mean(axis=0)
    pos, q = cluster.env_positions, cluster.env_charges
    keep = np.ones(len(q), dtype=bool)
    if cluster.qm_molecules and len(cluster.env_molecules):
        keep &= ~np.isin(cluster.env_molecules, np.asarray(cluster.qm_molecules))
    pos, q = pos[keep], q[keep]
    d = pos - centre
    d -= lengths * np.round(d / lengths)
    wrapped = centre + d
    if len(q):
        key = np.round(wrapped / 1e-4).astype(np.int64)
        _, first = np.unique(np.column_stack([key, np.round(q * 1e8).astype(np.int64)]), axis=0, return_index=True)
        first.sort()
        wrapped, q = wrapped[first], q[first]
    return wrapped, q


def periodic_embedding(cluster: Cluster, *, rcut_hcore_A: float | None = None,
                       rcut_ewald_A: float | None = None) -> Embedding:
    """The Ewald :class:`~clusterlab.qm.calc.Embedding` of ``cluster`` (its box's other atoms as
    periodic charges), as :func:`periodic_excitations` uses it; arguments and errors as there."""
    lengths = _orthorhombic_lengths(cluster.box)
    lat = np.diag(lengths)
    centre = cluster.qm_positions.mean(axis=0)
    extent = float(np.max(np.linalg.norm(cluster.qm_positions - centre, axis=1)))
    lmin = float(lengths.min())
    rcut_hcore = 0.5 * lmin if rcut_hcore_A is None else float(rcut_hcore_A)
    rcut_ewald = 0.5 * lmin if rcut_ewald_A is None else float(rcut_ewald_A)
    if not extent < rcut_hcore < lmin - extent:
        raise InputError(f"rcut_hcore_A={rcut_hcore:g} Å must exceed the QM region's extent ({extent:.2f} Å from "
                         f"its centroid) and stay below box length minus extent ({lmin - extent:.2f} Å); "
                         "the box is too small for this QM region.")
    if not 0 < rcut_ewald < lmin:
        raise InputError(f"rcut_ewald_A={rcut_ewald:g} Å must be between 0 and the shortest box length {lmin:g} Å.")
    pos, q = _minimum_image_set(cluster, lengths)
    periodic = {"lattice_A": lat, "rcut_hcore_A": rcut_hcore, "rcut_ewald_A": rcut_ewald,
                "n_charges_in_cell": int(len(q)),
                "qm_images": "included by PySCF as self-consistent QM atom multipoles (SCF only)"}
    return Embedding(pos, q, periodic)


def periodic_excitations(cluster: Cluster, method: Method, *, vacuum: bool = True, guess=None,
                         raise_on_failure: bool = False, rcut_hcore_A: float | None = None,
                         rcut_ewald_A: float | None = None,
                         progress: Callable[[str], None] | None = None) -> ExcitationResult:
    """Excitations with Ewald (periodic) point-charge embedding: the
    infinite-radius limit of a radius series.

    Parameters
    ----------
    cluster : Cluster
        QM region plus the other atoms of the box as charges (any images;
        they are wrapped to the minimum image around the QM centroid and
        de-duplicated), with ``cluster.box`` orthorhombic. A cluster carved
        with a radius of at least half the box diagonal, or one from
        :func:`periodic_cluster`, qualifies. Charges of the QM molecules'
        own images (``env_molecules`` in ``qm_molecules``) are dropped; see
        the module notes for how PySCF includes those images instead.
    method : Method
    vacuum : bool or ExcitationResult
        True computes the vacuum reference; an earlier in-memory result of the
        same QM region (a finite radius of a scan) reuses its vacuum calculation.
    rcut_hcore_A : float, optional
        Charges within this distance of the QM centroid enter the one-electron
        Hamiltonian exactly; default half the shortest box length (it must
        enclose the QM region and exclude its images).
    rcut_ewald_A : float, optional
        Ewald real-space cut-off; default half the shortest box length.

    Returns
    -------
    ExcitationResult with ``radius_A = inf`` and ``periodic = True``.

    Raises
    ------
    InputError
        A box that is not orthorhombic or too small for the QM region, and a
        polarizable ``method`` (the induced dipoles are not periodic; the
        message says what to use instead).
    """
    check_periodic_environment(method, "periodic_excitations")
    embedding = periodic_embedding(cluster, rcut_hcore_A=rcut_hcore_A, rcut_ewald_A=rcut_ewald_A)
    res = _excitations(cluster, method, vacuum=vacuum, guess=guess, raise_on_failure=raise_on_failure,
                       progress=progress, embedding=embedding, radius_A=math.inf)
    return res
