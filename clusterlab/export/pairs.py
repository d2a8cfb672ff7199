"""The pair table of a transport export: neighbour pairs of one frame.

:func:`pair_table` finds the pairs within a cutoff (each once, ``i < j``,
with the minimum-image vector), adds excitonic couplings from S0->S1
transition charges (a Coulomb sum over each copy's own atoms) and from the
point-dipole formula, and joins hole and electron transfer integrals
computed elsewhere (:mod:`clusterlab.export.transfer_tasks`). The kernels
are in :mod:`clusterlab.transport.pairs` and
:mod:`clusterlab.transport.couplings`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Literal, Mapping

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError
from ..transport.couplings import (
    orientation_factor,
    pair_transition_charge_couplings,
    point_dipole_coupling,
)
from ..transport.pairs import neighbour_pairs
from ..units import DEBYE_E_A

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]

__all__ = ["pair_table", "pair_classes"]


def pair_classes(species_i: npt.ArrayLike, species_j: npt.ArrayLike) -> npt.NDArray[np.str_]:
    """The class of each pair: its two species joined by ``-`` in sorted
    order, so ``i -> j`` and ``j -> i`` share it.

    >>> pair_classes(["HST", "GST", "GST"], ["HST", "HST", "GST"]).tolist()
    ['HST-HST', 'GST-HST', 'GST-GST']
    """
    a = np.asarray(species_i).astype(str)
    b = np.asarray(species_j).astype(str)
    if a.shape != b.shape:
        raise InputError(f"species_i and species_j must have the same shape; got {a.shape} and {b.shape}.")
    swap = a > b
    lo, hi = np.where(swap, b, a), np.where(swap, a, b)
    return np.char.add(np.char.add(lo, "-"), hi)


def _transition_charges_per_atom(film: "Film", transition_charges: Any) -> tuple[FloatArray, np.ndarray]:
    """Per-atom transition charges (NaN for uncovered molecules) and a per-molecule mask."""
    tr = getattr(transition_charges, "transition_e", transition_charges)
    if not isinstance(tr, Mapping):
        raise InputError("transition_charges= must be a mapping {resname: charges (e) in atom order} or a "
                         f"StateChargeSet with transition charges; got {type(transition_charges).__name__}.")
    names = np.asarray(film.molecule_species).astype(str)
    sizes = film.index.sizes()
    q = np.full(film.n_atoms, np.nan)
    covered = np.zeros(film.n_molecules, dtype=bool)
    for res, vec in tr.items():
        if vec is None:
            continue
        v = np.asarray(vec, dtype=np.float64).ravel()
        ids = np.flatnonzero(names == str(res))
        if ids.size == 0:
            continue
        bad = ids[sizes[ids] != v.size]
        if bad.size:
            raise InputError(f"transition charges of {res!r} have {v.size} values but molecule {int(bad[0])} has "
                             f"{int(sizes[bad[0]])} atoms; give one charge per atom in the molecule's atom order.")
        if not np.all(np.isfinite(v)):
            raise InputError(f"transition charges of {res!r} must be finite.")
        for m in ids:
            q[film.index.of(int(m))] = v
        covered[ids] = True
    return q, covered


def pair_table(
    film: "Film",
    frame: int,
    cutoff_A: float,
    *,
    criterion: Literal["centroid", "atom"] = "centroid",
    transition_charges: Any = None,
    transition_dipoles: npt.ArrayLike | None = None,
    refractive_index: float = 1.0,
    transfer: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Neighbour pairs of one frame with excitonic couplings and transfer integrals.

    Parameters
    ----------
    film : Film
    frame : int
    cutoff_A : float, Å
        Pair cutoff on the centroid or closest-atom distance (below half the
        smallest box width).
    criterion : {'centroid', 'atom'}
    transition_charges : mapping or StateChargeSet, optional
        S0->S1 transition charges (e) per residue name, in the molecule's
        atom order (``StateChargeSet.transition_e``). They are placed on each
        copy's own atoms (charges are scalars: no rotation needed) and give
        ``V_charges_eV`` (Madjet, Abdurahman & Renger, J. Phys. Chem. B 110,
        17268 (2006)) and, through ``mu = sum_a q_a (r_a - centroid)`` at each
        copy's own geometry, ``V_dipole_eV`` (point-dipole formula, Kasha,
        Rawls & El-Bayoumi, Pure Appl. Chem. 11, 371 (1965)).
    transition_dipoles : array_like, shape (n_molecules, 3), Debye, optional
        Transition dipoles of every molecule in this frame, used for
        ``V_dipole_eV`` instead of those of the transition charges.
    refractive_index : float, > 0
        Optical screening ``1/n^2`` of both couplings.
    transfer : DataFrame, optional
        Transfer integrals with columns ``i, j, J_hole_eV, J_electron_eV``
        (and ``converged``, optionally ``frame``), e.g. from
        :func:`clusterlab.export.transfer_tasks.compute_transfer_integrals`;
        joined on ``(i, j)``; pairs without a value get NaN.

    Returns
    -------
    pandas.DataFrame
        ``frame, i, j, resname_i, resname_j, species_i, species_j,
        pair_class`` (:func:`pair_classes`), ``distance_A, dx_A, dy_A, dz_A,
        min_atom_distance_A``; with transition charges or dipoles also
        ``mu_i_x_D ... mu_j_z_D, kappa, V_dipole_eV`` and (charges)
        ``V_charges_eV``, NaN for pairs with an uncovered molecule; with
        ``transfer`` also ``J_hole_eV, J_electron_eV, transfer_converged``.

    Raises
    ------
    InputError
        For a bad cutoff, criterion, refractive index, or charges/dipoles
        that do not fit the film.
    """
    if not (np.isfinite(refractive_index) and refractive_index > 0):
        raise InputError(f"refractive_index must be > 0; got {refractive_index!r}.")
    f = film.check_frame(frame)
    geo = film.frame_geometry(f, periodic=film.has_box)
    pos = np.asarray(geo.positions_A, dtype=np.float64)
    cent = np.asarray(geo.centroids_A, dtype=np.float64)
    t = neighbour_pairs(cent, cutoff_A, box=geo.box, criterion=criterion, atom_positions_A=pos,
                        atom_molecule=film.molecule_of_atom, with_min_atom_distance=True)
    names = np.asarray(film.molecule_resnames).astype(str)
    species = np.asarray(film.molecule_species).astype(str)
    i, j = t["i"].to_numpy(), t["j"].to_numpy()
    d = t[["dx_A", "dy_A", "dz_A"]].to_numpy(dtype=float)
    t.insert(0, "frame", np.full(len(t), f, dtype=np.int64))
    t.insert(3, "resname_i", names[i])
    t.insert(4, "resname_j", names[j])
    t.insert(5, "species_i", species[i])
    t.insert(6, "species_j", species[j])
    t.insert(7, "pair_class", pair_classes(species[i], species[j]))
    mu = None
    covered = None
    if transition_charges is not None:
        q, covered = _transition_charges_per_atom(film, transition_charges)
        rel = pos - cent[film.molecule_of_atom]
        mu = np.stack([np.bincount(film.molecule_of_atom, weights=np.nan_to_num(q) * rel[:, k],
                                   minlength=film.n_molecules) for k in range(3)], axis=1) / DEBYE_E_A
        mu[~covered] = np.nan
    if transition_dipoles is not None:
        md = np.asarray(transition_dipoles, dtype=np.float64)
        if md.shape != (film.n_molecules, 3):
            raise InputError(f"transition_dipoles must have shape ({film.n_molecules}, 3) in Debye; got {md.shape}.")
        mu = md.copy()
    if mu is not None:
        for side, idx in (("i", i), ("j", j)):
            for k, ax in enumerate("xyz"):
                t[f"mu_{side}_{ax}_D"] = mu[idx, k]
        ok = np.all(np.isfinite(mu[i]), axis=1) & np.all(np.isfinite(mu[j]), axis=1)
        vd = np.full(len(t), np.nan)
        kap = np.full(len(t), np.nan)
        if ok.any():
            vd[ok] = point_dipole_coupling(mu[i[ok]], mu[j[ok]], d[ok], n=refractive_index)
            nz = ok & (np.linalg.norm(mu[i], axis=1) > 0) & (np.linalg.norm(mu[j], axis=1) > 0)
            if nz.any():
                kap[nz] = orientation_factor(mu[i[nz]], mu[j[nz]], d[nz])
        t["kappa"] = kap
        t["V_dipole_eV"] = vd
    if covered is not None:
        vc = np.full(len(t), np.nan)
        okc = covered[i] & covered[j]
        if okc.any():
            vc[okc] = pair_transition_charge_couplings(pos, np.nan_to_num(q), film.molecule_of_atom, cent,
                                                       i[okc], j[okc], d[okc], n=refractive_index)
        t["V_charges_eV"] = vc
    if transfer is not None:
        t = _join_transfer(t, transfer, f)
    return t.reset_index(drop=True)


def _join_transfer(t: pd.DataFrame, transfer: pd.DataFrame, frame: int) -> pd.DataFrame:
    if not isinstance(transfer, pd.DataFrame):
        raise InputError(f"transfer= must be a DataFrame with i, j, J_hole_eV, J_electron_eV; got "
                         f"{type(transfer).__name__}.")
    miss = [c for c in ("i", "j") if c not in transfer.columns]
    if miss:
        raise InputError(f"the transfer table lacks the column(s) {miss}.")
    tr = transfer.copy()
    if "frame" in tr.columns:
        tr = tr[tr["frame"].astype(int) == int(frame)]
    a, b = tr["i"].astype(np.int64).to_numpy(), tr["j"].astype(np.int64).to_numpy()
    tr["i"], tr["j"] = np.minimum(a, b), np.maximum(a, b)
    cols = [c for c in ("J_hole_eV", "J_electron_eV") if c in tr.columns]
    keep = tr[["i", "j", *cols] + (["converged"] if "converged" in tr.columns else [])]
    keep = keep.rename(columns={"converged": "transfer_converged"}).drop_duplicates(["i", "j"], keep="last")
    out = t.merge(keep, on=["i", "j"], how="left")
    if "transfer_converged" in out:
        tc = out["transfer_converged"]
        out["transfer_converged"] = tc.where(tc.notna(), False).astype(bool)
    return out
