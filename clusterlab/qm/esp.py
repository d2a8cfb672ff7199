"""Electrostatic potentials of PySCF densities, and charges fitted to them.

* QM potential of a density matrix at many points through three-centre
  integrals with point-like fake nuclei (``pyscf.gto.fakemol_for_charges`` +
  ``int3c2e``), in chunks (:func:`esp_on_points`).
* ESP charges of a density (:func:`esp_charges`) with the fit points and the
  constrained least-squares fit of :mod:`clusterlab.electrostatics.espfit`.
* Transition charges: the same fit to the potential of a transition density
  (no nuclei, total charge 0) (Madjet, Abdurahman & Renger, J. Phys. Chem. B
  110, 17268 (2006); volume/page from memory).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from ..electrostatics.espfit import EspFit, Restraint, charge_dipole_D, esp_rrms, fit_esp_charges, fit_points
from ..errors import InputError
from ..units import A_TO_BOHR, AU_DIPOLE_TO_DEBYE

FloatArray = npt.NDArray[np.float64]

__all__ = ["esp_on_points", "esp_charges", "transition_density_ao", "transition_charges", "density_dipole_D"]


def esp_on_points(
    mol: Any,
    dm: npt.ArrayLike,
    points_A: npt.ArrayLike,
    *,
    include_nuclei: bool = True,
    max_memory_MB: float = 200.0,
) -> FloatArray:
    """Electrostatic potential (hartree/e) of a PySCF molecule's density at points.

    :math:`V(\\mathbf p) = \\sum_A Z_A/|\\mathbf p-\\mathbf R_A| - \\sum_{\\mu\\nu} D_{\\mu\\nu}(\\mu\\nu|\\,|\\mathbf r-\\mathbf p|^{-1})`.

    Parameters
    ----------
    mol : pyscf.gto.Mole
    dm : array_like, shape (nao, nao) or (2, nao, nao)
        AO density matrix (spin densities are summed). Need not be symmetric
        (transition densities).
    points_A : array_like, shape (n, 3), Å
    include_nuclei : bool
        Add the nuclear potential (False for difference/transition densities).
    max_memory_MB : float
        Chunk size bound of the (nao, nao, chunk) integral block.

    Returns
    -------
    ndarray, shape (n,), hartree/e
    """
    from pyscf import df, gto

    d = np.asarray(dm, dtype=np.float64)
    if d.ndim == 3:
        d = d.sum(axis=0)
    nao = mol.nao_nr()
    if d.shape != (nao, nao):
        raise InputError(f"dm must have shape ({nao}, {nao}) for this molecule; got {d.shape}.")
    d = 0.5 * (d + d.T)  # the integrals are symmetric in mu, nu
    pts = np.atleast_2d(np.asarray(points_A, dtype=np.float64)) * A_TO_BOHR
    out = np.empty(len(pts))
    chunk = max(1, int(max_memory_MB * 1e6 / (8.0 * nao * nao)))
    for s in range(0, len(pts), chunk):
        fake = gto.fakemol_for_charges(pts[s : s + chunk])
        ints = df.incore.aux_e2(mol, fake, intor="int3c2e", aosym="s1")
        out[s : s + chunk] = -np.einsum("ijp,ij->p", ints.reshape(nao, nao, -1), d)
    if include_nuclei:
        rn = mol.atom_coords()  # bohr
        z = mol.atom_charges()
        dist = np.linalg.norm(pts[:, None, :] - rn[None, :, :], axis=2)
        out += (z[None, :] / dist).sum(axis=1)
    return out


def density_dipole_D(mol: Any, dm: FloatArray, include_nuclei: bool = True) -> FloatArray:
    """Dipole (Debye) of a density (and the nuclei), about the origin."""
    with mol.with_common_orig((0.0, 0.0, 0.0)):
        r = mol.intor_symmetric("int1e_r", comp=3)
    d = dm.sum(axis=0) if dm.ndim == 3 else dm
    el = -np.einsum("xij,ji->x", r, d)
    if include_nuclei:
        el = el + mol.atom_charges() @ mol.atom_coords()
    return el * AU_DIPOLE_TO_DEBYE


def esp_charges(
    mol: Any,
    dm: npt.ArrayLike,
    *,
    grid: str = "shells",
    total_charge: float | None = None,
    include_nuclei: bool = True,
    restraint: Restraint | None = None,
    equivalent: Any = None,
    points_A: npt.ArrayLike | None = None,
    **grid_kw: Any,
) -> EspFit:
    """Fit charges to the potential of a PySCF density (convenience).

    Parameters
    ----------
    mol : pyscf.gto.Mole (its geometry defines the atoms)
    dm : AO density matrix, (nao, nao) or (2, nao, nao)
    grid : {"shells", "cubic"}
        :func:`shell_points` (Singh & Kollman) or :func:`cubic_points`
        (Breneman & Wiberg). Ignored if ``points_A`` is given.
    total_charge : float, optional
        Default ``mol.charge`` (or 0 without nuclei).
    include_nuclei : bool
        False for difference and transition densities.
    restraint, equivalent : see :func:`fit_esp_charges`
    points_A : array_like, optional
        Use these fit points instead of building a grid.
    **grid_kw : passed to the grid builder.

    Returns
    -------
    EspFit
    """
    from ..units import BOHR_A

    symbols = [mol.atom_pure_symbol(i) for i in range(mol.natm)]
    pos_A = mol.atom_coords() * BOHR_A
    if points_A is None:
        pts = fit_points(symbols, pos_A, grid, **grid_kw)
    else:
        pts = np.atleast_2d(np.asarray(points_A, float))
    d = np.asarray(dm, dtype=np.float64)
    v = esp_on_points(mol, d, pts, include_nuclei=include_nuclei)
    qtot = (float(mol.charge) if include_nuclei else 0.0) if total_charge is None else float(total_charge)
    q = fit_esp_charges(symbols, pos_A, pts, v, qtot, restraint=restraint, equivalent=equivalent)
    return EspFit(
        charges_e=q,
        points_A=pts,
        esp_au=v,
        rrms=esp_rrms(pos_A, q, pts, v),
        dipole_fit_D=charge_dipole_D(pos_A, q),
        dipole_qm_D=density_dipole_D(mol, d, include_nuclei),
    )


def transition_density_ao(mf: Any, x_ia: npt.ArrayLike) -> FloatArray:
    """AO transition density of a closed-shell singlet excitation from TDA amplitudes.

    :math:`T_{\\mu\\nu} = \\sqrt2 \\sum_{ia} C_{\\mu i}\\hat X_{ia} C_{\\nu a}`,
    with :math:`\\hat X` normalised to 1 (PySCF stores X with norm 1/2 for
    restricted singlets; the normalisation is redone here). Its dipole is
    ``sum T_mu_nu <mu|r|nu>`` (electrons counted positive, as PySCF's
    ``transition_dipole``).

    Parameters
    ----------
    mf : restricted PySCF SCF object (converged)
    x_ia : array_like, shape (nocc, nvir)

    Returns
    -------
    ndarray, shape (nao, nao)
    """
    c = mf.mo_coeff
    occ = mf.mo_occ > 0
    x = np.asarray(x_ia, dtype=np.float64)
    co, cv = c[:, occ], c[:, ~occ]
    if x.shape != (co.shape[1], cv.shape[1]):
        raise InputError(f"x_ia must have shape {(co.shape[1], cv.shape[1])}; got {x.shape}.")
    xn = x / np.sqrt(np.sum(x * x))
    return np.sqrt(2.0) * co @ xn @ cv.T


def transition_charges(
    mol: Any,
    tdm_ao: npt.ArrayLike,
    *,
    grid: str = "shells",
    points_A: npt.ArrayLike | None = None,
    equivalent: Any = None,
    **grid_kw: Any,
) -> EspFit:
    """Transition charges: charges (total 0) fitted to the potential of a
    transition density (no nuclear part).

    The potential is that of :math:`-\\rho_T` (electrons carry charge -1), so
    the charges' dipole is minus PySCF's ``transition_dipole`` convention;
    the overall sign of a transition density is arbitrary anyway.

    Returns
    -------
    EspFit (``dipole_qm_D`` is the transition dipole of ``-rho_T`` in Debye)
    """
    return esp_charges(mol, tdm_ao, grid=grid, total_charge=0.0, include_nuclei=False,
                       points_A=points_A, equivalent=equivalent, **grid_kw)
