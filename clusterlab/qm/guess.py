"""SCF starting densities carried from one copy of a molecule to another.

Every copy of a species in a film has the same atoms in the same order, at a
different position, orientation and (for a flexible molecule) conformation.
The converged orbitals of one copy, rotated onto another by the best rigid
superposition of their atoms (Kabsch, Acta Cryst. A32, 922 (1976)), are a far
better SCF start than a superposition of atomic densities: the AO rotation is
PySCF's own (``pyscf.gto.mole.ao_rotation_matrix``: real spherical harmonics
rotate by the Wigner matrices of each angular momentum). For a rigid rotation
the rotated density is the converged density of the rotated molecule
(rotational invariance; a test checks it); for a different conformation it is
a guess whose quality the SCF iteration count shows.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import numpy.typing as npt

from ..errors import InputError

FloatArray = npt.NDArray[np.float64]


def kabsch_rotation(ref_A: npt.ArrayLike, new_A: npt.ArrayLike) -> tuple[FloatArray, float]:
    """Proper rotation R minimising sum |R (p_i - p0) - (q_i - q0)|^2 over
    matched atoms (centroids p0, q0), and the RMSD (Å) after superposition."""
    p = np.asarray(ref_A, float).reshape(-1, 3)
    q = np.asarray(new_A, float).reshape(-1, 3)
    if p.shape != q.shape or len(p) < 3:
        raise InputError(f"superposition needs two matched sets of >= 3 atoms; got {p.shape} and {q.shape}.")
    p = p - p.mean(axis=0)
    q = q - q.mean(axis=0)
    u, _s, vt = np.linalg.svd(p.T @ q)
    d = np.sign(np.linalg.det(vt.T @ u.T))
    r = vt.T @ np.diag([1.0, 1.0, d]) @ u.T
    rmsd = float(np.sqrt(np.mean(np.sum((p @ r.T - q) ** 2, axis=1))))
    return r, rmsd


def aligned_density(ref_mol, ref_mo_coeff: FloatArray, ref_mo_occ: FloatArray, ref_symbols: Sequence[str],
                    symbols: Sequence[str], positions_A: npt.ArrayLike) -> tuple[FloatArray, float]:
    """The reference copy's density rotated onto a new copy of the same
    molecule (same atoms, same order, same basis).

    Returns
    -------
    dm : ndarray, shape (nao, nao)
        Closed-shell density (occupations of the reference).
    rmsd_A : float
        Superposition RMSD: 0 for a rigid copy, a few tenths of an Å for a
        copy with other torsions.

    Raises
    ------
    InputError
        The two atom lists differ.
    """
    if list(ref_symbols) != list(symbols):
        raise InputError("an aligned guess needs the same atoms in the same order; the two QM regions differ.")
    from pyscf.gto.mole import ao_rotation_matrix

    ref_xyz = ref_mol.atom_coords(unit="Angstrom")
    r, rmsd = kabsch_rotation(ref_xyz, positions_A)
    # PySCF's matrix for orientation O maps AO coefficients as C' = u(O) C for
    # coordinates x' = O^T x (checked against an SCF of the rotated copy): so O = R^T
    u = ao_rotation_matrix(ref_mol, r.T)
    c = u @ np.asarray(ref_mo_coeff, float)
    occ = np.asarray(ref_mo_occ, float)
    dm = (c * occ) @ c.T
    return dm, rmsd
