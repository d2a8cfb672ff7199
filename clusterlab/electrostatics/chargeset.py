"""State charges per molecule type: plain data and their JSON.

A :class:`StateChargeSet` holds, per residue name, atomic charges of the
ground state S0 and of the states whose environment shift a film model
computes (S1, T1, cation, anion), optional S0->S1 transition charges, and the
reference copies they were fitted on (:class:`ConformerCharges`: geometry,
charges and, when fitted, the dipole and polarizability changes of the
neutral excitations). Every copy of a molecule type takes these numbers by
atom correspondence (atom order within the molecule).

This module holds data only: no film, no quantum chemistry. The fits that
fill a set from a film live in :mod:`clusterlab.study.chargefits`; the film
model that uses it in :mod:`clusterlab.study.filmmodel`.

The JSON text (:meth:`StateChargeSet.to_json`, kind
``"clusterlab.StateChargeSet"``, version 1) is the one sets have always been
stored in, so stored sets load unchanged.

Units: Å, e, Å³ (polarizability changes), D (dipole changes).
"""

from __future__ import annotations

import copy
import json
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError

FloatArray = npt.NDArray[np.float64]

#: States a set may carry; every state is relative to S0.
KNOWN_STATES = ("S0", "S1", "T1", "cation", "anion")

__all__ = ["KNOWN_STATES", "ConformerCharges", "StateChargeSet"]


@dataclass
class ConformerCharges:
    """State charges (and, optionally, polarizability changes) fitted on one reference copy.

    Attributes
    ----------
    positions_A : ndarray (n, 3)
        Geometry of the reference copy (the frame ``dalpha_A3`` refers to).
    charges_e : dict state -> ndarray (n,)
    transition_e : ndarray (n,) or None
        S0->S1 transition charges.
    dalpha_A3 : dict state -> ndarray (3, 3)
        ``alpha_X - alpha_S0`` (Å³) of the neutral excitations, from a
        finite-field fit (empty when not fitted).
    dmu_D : dict state -> ndarray (3,)
        ``mu_X - mu_S0`` (D) of the same finite-field fit.
    frame, molecule : int
        Where the reference copy came from (-1: given by hand).
    """

    positions_A: FloatArray
    charges_e: dict[str, FloatArray]
    transition_e: FloatArray | None = None
    dalpha_A3: dict[str, FloatArray] = field(default_factory=dict)
    dmu_D: dict[str, FloatArray] = field(default_factory=dict)
    frame: int = -1
    molecule: int = -1

    def has_response(self, states: Iterable[str]) -> bool:
        """Whether Δμ and Δα of every one of ``states`` are fitted."""
        return all(s in self.dalpha_A3 and s in self.dmu_D for s in states)

    def to_dict(self) -> dict[str, Any]:
        return {"positions_A": np.asarray(self.positions_A).tolist(),
                "charges_e": {k: np.asarray(v).tolist() for k, v in self.charges_e.items()},
                "transition_e": None if self.transition_e is None else np.asarray(self.transition_e).tolist(),
                "dalpha_A3": {k: np.asarray(v).tolist() for k, v in self.dalpha_A3.items()},
                "dmu_D": {k: np.asarray(v).tolist() for k, v in self.dmu_D.items()},
                "frame": int(self.frame), "molecule": int(self.molecule)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "ConformerCharges":
        arr = (lambda x: {k: np.asarray(v, float) for k, v in (x or {}).items()})
        t = d.get("transition_e")
        return cls(positions_A=np.asarray(d["positions_A"], float), charges_e=arr(d["charges_e"]),
                   transition_e=None if t is None else np.asarray(t, float), dalpha_A3=arr(d.get("dalpha_A3")),
                   dmu_D=arr(d.get("dmu_D")), frame=int(d.get("frame", -1)), molecule=int(d.get("molecule", -1)))


@dataclass
class StateChargeSet:
    """Charges of S0, S1, T1, cation and anion per molecular species.

    Every mapping below is keyed by the species name (the ``species`` column
    of a film's molecules table, which is the residue name); each species has
    its own charges, references and responses. ``resname`` in the attribute
    descriptions is that species name.

    Attributes
    ----------
    charges_e : dict resname -> dict state -> ndarray (n_atoms_of_type,)
        In the molecule's atom order (as in the film), e.
    transition_e : dict resname -> ndarray (n,) or None
        S0->S1 transition charges (e), when fitted.
    fits : dict resname -> dict
        The full QM fit of the first reference copy as plain JSON data (the
        fields of :class:`~clusterlab.qm.statecharges.StateCharges`:
        ``symbols``, ``method``, ``energy_eV`` (vacuum energies relative to
        S0), ``rrms``, ``converged``, ...), when the set was fitted; empty for
        :meth:`from_arrays`.
    reference : dict resname -> dict
        Where the (first) reference copy came from: ``{"frame", "molecule"}``.
    method : str
        ``"xc/basis"`` of the fits, or a label.
    conformers : dict resname -> list of ConformerCharges
        Reference copies of the molecule type's conformer families (see
        :mod:`clusterlab.electrostatics.conformers`); every copy in the film
        takes the charges (and polarizability changes) of the reference it
        superposes best onto. Empty for a resname: its ``charges_e`` serve
        every copy. ``charges_e`` and ``transition_e`` always hold the first
        reference's numbers.
    stark_method : dict
        The engine method of the finite-field fits (``Method.to_dict()`` plus
        the field strengths ``steps_V_A``), if any.

    Examples
    --------
    >>> s = StateChargeSet.from_arrays({"WAT": {"S0": [-0.8, 0.4, 0.4],
    ...                                          "cation": [0.2, 0.4, 0.4]}})
    >>> s.difference("WAT", "cation").tolist()
    [1.0, 0.0, 0.0]
    >>> StateChargeSet.from_json(s.to_json()).difference("WAT", "cation").tolist()
    [1.0, 0.0, 0.0]
    """

    charges_e: dict[str, dict[str, FloatArray]]
    transition_e: dict[str, FloatArray | None] = field(default_factory=dict)
    fits: dict[str, dict[str, Any]] = field(default_factory=dict)
    reference: dict[str, dict[str, int]] = field(default_factory=dict)
    method: str = "given"
    conformers: dict[str, list[ConformerCharges]] = field(default_factory=dict)
    stark_method: dict[str, Any] = field(default_factory=dict)

    # -------------------------------------------------------------- building
    @classmethod
    def from_conformers(cls, conformers: Mapping[str, Sequence[ConformerCharges]], *,
                        method: str = "given") -> "StateChargeSet":
        """A set from reference copies ``{resname: [ConformerCharges, ...]}``.

        Raises
        ------
        InputError
            As :meth:`from_arrays`; references of one resname with different
            atom counts or state lists.
        """
        first = {r: dict(c[0].charges_e) for r, c in conformers.items() if len(c)}
        out = cls.from_arrays(first, transition={r: c[0].transition_e for r, c in conformers.items() if len(c)},
                              method=method)
        for res, refs in conformers.items():
            refs = list(refs)
            n = {len(c.positions_A) for c in refs} | {len(q) for c in refs for q in c.charges_e.values()}
            if len(n) != 1:
                raise InputError(f"conformer references of {res!r} have different atom counts {sorted(n)}.")
            st = {tuple(sorted(c.charges_e)) for c in refs}
            if len(st) != 1:
                raise InputError(f"conformer references of {res!r} have different states {sorted(st)}.")
            out.conformers[str(res)] = refs
            out.reference[str(res)] = {"frame": refs[0].frame, "molecule": refs[0].molecule}
        return out

    @classmethod
    def from_arrays(cls, charges: Mapping[str, Mapping[str, npt.ArrayLike]], *,
                    transition: Mapping[str, npt.ArrayLike] | None = None,
                    method: str = "given") -> "StateChargeSet":
        """A set from plain arrays ``{resname: {state: charges}}`` (S0 required).

        Raises
        ------
        InputError
            Unknown states, missing S0, or vectors of different lengths.
        """
        out: dict[str, dict[str, FloatArray]] = {}
        for res, by_state in charges.items():
            bad = [s for s in by_state if s not in KNOWN_STATES]
            if bad:
                raise InputError(f"unknown state(s) {bad} for {res!r}; valid states are {list(KNOWN_STATES)}.")
            if "S0" not in by_state:
                raise InputError(f"residue {res!r} has no S0 charges; every state is relative to S0.")
            vecs = {s: np.asarray(v, dtype=np.float64).ravel() for s, v in by_state.items()}
            n = {len(v) for v in vecs.values()}
            if len(n) != 1:
                raise InputError(f"residue {res!r}: charge vectors of different lengths {sorted(n)}.")
            out[str(res)] = vecs
        tr = {str(k): (None if v is None else np.asarray(v, float).ravel()) for k, v in (transition or {}).items()}
        return cls(charges_e=out, transition_e=tr, method=method)

    def symmetrized(self, classes: Mapping[str, npt.ArrayLike]) -> "StateChargeSet":
        """A copy with every state's charges averaged over equivalent atoms.

        One reference copy of a symmetric molecule in a thermally distorted
        geometry breaks the symmetry, and an excited-state difference density
        can follow that breaking far more than the ground state does (for the
        demo film's 2,2'-bithiophene the S1 difference charges of molecule 0
        carry 3.5 D, all from its own distortion); averaging over equivalent
        atoms keeps what every copy shares. Transition charges are left as
        they are (a transition density need not be symmetric).

        Parameters
        ----------
        classes : mapping resname -> array (n,) int
            Equivalence labels per atom of every resname of the set, e.g. the
            topological classes of
            :func:`~clusterlab.electrostatics.conformers.equivalence_classes`
            (:func:`clusterlab.study.chargefits.film_equivalence_classes`
            computes them from a film's bonds).

        Raises
        ------
        InputError
            A resname without labels, or labels of the wrong length.
        """
        out = copy.deepcopy(self)
        for res in out.resnames:
            if res not in classes:
                raise InputError(f"no equivalence classes for {res!r}; classes= has {sorted(classes)}.")
            lab = np.asarray(classes[res], dtype=np.int64)
            n = len(next(iter(out.charges_e[res].values())))
            if len(lab) != n:
                raise InputError(f"{len(lab)} equivalence labels for {res!r}, which has {n} atoms.")
            avg = (lambda q: (np.bincount(lab, weights=q) / np.bincount(lab))[lab])
            out.charges_e[res] = {k: avg(v) for k, v in out.charges_e[res].items()}
            for c in out.conformers.get(res, []):
                c.charges_e = {k: avg(v) for k, v in c.charges_e.items()}
        return out

    # --------------------------------------------------------------- access
    @property
    def resnames(self) -> list[str]:
        """The species of the set, sorted (the keys of ``charges_e``)."""
        return sorted(self.charges_e)

    @property
    def species(self) -> list[str]:
        """The species of the set, sorted: the same as :attr:`resnames`."""
        return self.resnames

    def states_of(self, resname: str) -> tuple[str, ...]:
        return tuple(self.charges_e[resname])

    def has_response(self, states: Iterable[str]) -> bool:
        """Whether every conformer reference carries Δμ and Δα of every one of ``states``
        (False for a set without references)."""
        states = list(states)
        refs = [c for cs in self.conformers.values() for c in cs]
        return bool(refs) and all(c.has_response(states) for c in refs)

    def difference(self, resname: str, state: str) -> FloatArray:
        """``q_state - q_S0`` (e) of one molecule type, in atom order.

        Raises
        ------
        InputError
            Unknown residue name or state.
        """
        if resname not in self.charges_e:
            raise InputError(f"no charges for residue {resname!r}; the set has {self.resnames}.")
        by = self.charges_e[resname]
        if state not in by:
            raise InputError(f"residue {resname!r} has no {state!r} charges; it has {list(by)}.")
        return by[state] - by["S0"]

    def to_frame(self) -> pd.DataFrame:
        """Tidy table ``resname, atom, state, charge_e`` (transition charges as state "S0->S1")."""
        rows = []
        for res in self.resnames:
            for st, q in self.charges_e[res].items():
                rows += [(res, a, st, float(v)) for a, v in enumerate(q)]
            t = self.transition_e.get(res)
            if t is not None:
                rows += [(res, a, "S0->S1", float(v)) for a, v in enumerate(t)]
        return pd.DataFrame(rows, columns=["resname", "atom", "state", "charge_e"])

    def summary(self) -> dict[str, Any]:
        """Flat description: method, residue names, and per residue its states,
        conformer references and fitted field responses."""
        out: dict[str, Any] = {"method": self.method, "resnames": ",".join(self.resnames)}
        for res in self.resnames:
            refs = self.conformers.get(res, [])
            out[f"{res}_states"] = ",".join(self.states_of(res))
            out[f"{res}_n_conformers"] = len(refs)
            out[f"{res}_field_response"] = ",".join(s for s in ("S1", "T1") if refs and
                                                    all(c.has_response([s]) for c in refs))
        return out

    # ----------------------------------------------------------------- JSON
    def to_json(self) -> str:
        """JSON text; :meth:`from_json` rebuilds the set (fits included)."""
        return json.dumps({
            "kind": "clusterlab.StateChargeSet", "version": 1, "method": self.method,
            "charges_e": {r: {s: q.tolist() for s, q in d.items()} for r, d in self.charges_e.items()},
            "transition_e": {r: (None if t is None else np.asarray(t).tolist()) for r, t in self.transition_e.items()},
            "reference": self.reference,
            "fits": {r: (dict(f) if isinstance(f, Mapping) else json.loads(f.to_json())) for r, f in self.fits.items()},
            "conformers": {r: [c.to_dict() for c in refs] for r, refs in self.conformers.items()},
            "stark_method": self.stark_method,
        })

    @classmethod
    def from_json(cls, text: str) -> "StateChargeSet":
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not a state-charge set.
        """
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(f"not JSON text: {exc}") from exc
        if not isinstance(d, dict) or d.get("kind") != "clusterlab.StateChargeSet":
            raise InputError("this JSON is not a state-charge set (kind 'clusterlab.StateChargeSet').")
        out = cls.from_arrays(d["charges_e"], transition=d.get("transition_e") or {}, method=d.get("method", "given"))
        out.reference = {r: {k: int(v) for k, v in ref.items()} for r, ref in d.get("reference", {}).items()}
        out.fits = {r: dict(f) for r, f in (d.get("fits") or {}).items()}
        out.conformers = {r: [ConformerCharges.from_dict(c) for c in refs]
                          for r, refs in (d.get("conformers") or {}).items()}
        out.stark_method = dict(d.get("stark_method") or {})
        return out

    def save(self, path: str) -> None:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(self.to_json())

    @classmethod
    def load(cls, path: str) -> "StateChargeSet":
        with open(path, encoding="utf-8") as fh:
            return cls.from_json(fh.read())
