"""A state-charge set laid onto a film: what the charge fits and the film model share.

* the checks of the values they both take (environment radius, carving rule);
* each molecule's net charge (the charge its QM fits run with);
* the conformer family of every copy in one frame (which reference it takes,
  the rotation from the reference's frame into the copy's, and the RMSD).

Units: Å, e.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from ..electrostatics.chargeset import StateChargeSet
from ..electrostatics.conformers import assign_conformers
from ..errors import ChargeError, InputError

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

#: States whose environment shift the film model gives.
SHIFT_STATES = ("S1", "T1", "cation", "anion")
#: Neutral excitations (second-order and field-response terms).
NEUTRAL_STATES = ("S1", "T1")
#: Charged states (Thole polarization).
CHARGED_STATES = ("cation", "anion")
#: Carving rules (see :mod:`clusterlab.carve`).
RULES = ("atom", "centroid")

__all__ = ["SHIFT_STATES", "NEUTRAL_STATES", "CHARGED_STATES", "RULES", "FrameFamilies", "check_radius_A",
           "check_rule", "frame_families", "molecule_net_charge"]


def check_radius_A(radius_A: Any) -> float:
    """``radius_A`` as a float after checking it is a finite positive number of Å.

    Raises
    ------
    InputError
        Not a number, not finite, or not positive.
    """
    try:
        r = float(radius_A)
    except (TypeError, ValueError) as exc:
        raise InputError(f"radius_A must be a number of Å; got {radius_A!r}.") from exc
    if not np.isfinite(r) or r <= 0:
        raise InputError(f"radius_A must be a finite positive number of Å; got {radius_A!r}.")
    return r


def check_rule(rule: Any) -> str:
    """``rule`` after checking it is a carving rule.

    Raises
    ------
    InputError
        Not one of :data:`RULES`.
    """
    if rule not in RULES:
        raise InputError(f"{rule!r} is an invalid rule. Use 'atom' or 'centroid'.")
    return str(rule)


def molecule_net_charge(film: "Film", molecule: int) -> int:
    """Net charge (e, rounded) of one molecule from the film's charges; 0 when unknown."""
    net = film.molecules["charge"].iloc[int(molecule)]
    return int(round(float(net))) if np.isfinite(net) else 0


@dataclass(frozen=True)
class FrameFamilies:
    """Conformer-family assignment of one frame.

    Attributes
    ----------
    family : ndarray (n_molecules,) int
        Index of each copy's reference; -1 for types without references.
    rotation : ndarray (n_molecules, 3, 3)
        Reference frame -> copy.
    rmsd_A : ndarray (n_molecules,), Å
        Superposed RMSD to the reference (NaN for types without references).
    """

    family: IntArray
    rotation: FloatArray
    rmsd_A: FloatArray


def frame_families(film: "Film", charges: StateChargeSet, positions_A: FloatArray) -> FrameFamilies:
    """Superpose every copy onto its type's conformer references and take the best
    (:func:`~clusterlab.electrostatics.conformers.assign_conformers`).

    Raises
    ------
    ChargeError
        References whose atom count differs from the film's molecules of that name.
    """
    names = np.asarray(film.molecule_species)
    fam = np.full(film.n_molecules, -1, np.int64)
    rot = np.tile(np.eye(3), (film.n_molecules, 1, 1))
    rms = np.full(film.n_molecules, np.nan)
    for res, refs in charges.conformers.items():
        ids = np.flatnonzero(names == res)
        if ids.size == 0 or not refs:
            continue
        n = len(refs[0].positions_A)
        if np.any(film.index.sizes()[ids] != n):
            raise ChargeError(f"conformer references of {res!r} have {n} atoms, but some molecules of that "
                              "name do not; the set does not fit this film.")
        atoms = film.index.atoms[(film.index.offsets[ids][:, None] + np.arange(n)).ravel()]
        copies = positions_A[atoms].reshape(len(ids), n, 3)
        f, r, d = assign_conformers(np.stack([c.positions_A for c in refs]), copies)
        fam[ids], rot[ids], rms[ids] = f, r, d
    return FrameFamilies(fam, rot, rms)
