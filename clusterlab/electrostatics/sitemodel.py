"""Film-wide electrostatic site-energy model: every molecule of every frame.

The model
---------
For state X of molecule i (X in S1, T1, cation, anion) the **environment
shift** is the first-order electrostatic energy of the change of the
molecule's charge distribution on going from S0 to X, in the potential of the
environment's ground-state charges:

.. math:: \\Delta E_X(i) = \\sum_{a\\in i} (q^X_a - q^{S0}_a)\\, V_{env}(\\mathbf r_a),
   \\qquad V_{env}(\\mathbf r_a) = k_e \\sum_{(j,\\mathbf T)\\in env(i)}\\sum_{b\\in j}
   \\frac{q_b}{|\\mathbf r_a-\\mathbf r_b-\\mathbf T|}

with ``k_e`` = :data:`clusterlab.units.COULOMB_EV_A`. For the ions the shift
is the electrostatic energy of the extra (or missing) charge in the
environment: ``cation_shift_eV`` is the environment part of
E(cation) - E(neutral), i.e. the shift of the ionization energy;
``anion_shift_eV`` that of E(anion) - E(neutral), i.e. minus the shift of the
electron affinity (the columns ``IP_shift_eV`` and ``EA_shift_eV`` repeat
them with the sign convention of :mod:`clusterlab.qm.engine`).

Radius semantics are those of :meth:`clusterlab.Film.carve` (see
:mod:`clusterlab.carve`): whole molecule images join env(i) when any of
their atoms is within ``radius`` of any atom of i (``rule="atom"``) or when
their centroid is within ``radius`` of i's centroid (``rule="centroid"``).
Radii beyond half the box are **handled**, as carving does: every periodic
image that qualifies joins once, images of molecule i itself included.

Charges
-------
State charges come from a :class:`StateChargeSet`: per residue name, ESP
charges of S0, S1, T1, cation and anion (and S0->S1 transition charges),
fitted by :func:`clusterlab.electrostatics.statecharges.state_charges` on
reference copies of the molecule taken whole from the film. The environment's
ground-state charges are the film's charge source (``environment="film"``,
e.g. topology charges; what carving puts into clusters) or the fitted S0
charges (``environment="fitted"``).

Conformations
-------------
Charges are mapped onto every copy of a molecule type by atom correspondence
(atom order within the molecule); charges are scalars and need no rotation.
Conformational change is handled in three ways, none of them a refit per
geometry:

* **conformer families** (``StateChargeSet.from_film(..., n_conformers=k)``):
  reference copies chosen by farthest-point sampling in superposed RMSD; each
  copy in each frame takes the numbers of the reference it superposes best
  onto (:mod:`clusterlab.electrostatics.conformers`; columns ``conformer``,
  ``conformer_rmsd_A``). For the demo film's bithiophene: a syn-like and an
  anti-like reference.
* **symmetrized charges** (:meth:`StateChargeSet.symmetrized`): averaged over
  topologically equivalent atoms, which removes the part of a difference
  density that follows one copy's own thermal distortion.
* **an error estimate** (:func:`conformer_spread`): refits a few copies at
  their own geometries and reports how far their shifts move.

Second order (``model="charges+stark"`` and ``model="field"``)
----------------------------------------------------------------
A fixed set of difference charges gives only the first-order energy. In a
field F an excitation energy also changes by ``-1/2 F·Δα·F`` (Δα = alpha_X -
alpha_S0), which for a bright pi->pi* state of a conjugated molecule can
dominate: measured on the demo film (``bench/diagnose_s1.py``) the part of the
embedded-QM S1 shift that is even in the environment charges has three times
the spread of the odd part. The polarizability changes come from finite fields
with the QM engine itself (:mod:`clusterlab.electrostatics.stark`), per
conformer reference, turned into each copy's orientation by the superposition;
F is the uniform field that best reproduces the environment potential over the
molecule's atoms (least squares). ``"field"`` replaces the charges of the
neutral excitations by their whole finite-field response, ``-Δμ·F - 1/2
F·Δα·F``: its Δμ is an energy derivative (a relaxed dipole change), where
difference charges from unrelaxed TDA densities overstate it (2-4x on the demo
film). Both leave out the field's variation across the molecule beyond its
uniform part (and, for ``"field"``, every multipole above the dipole) and any
change of Δα with the copy's own distortion beyond its family.

Polarization (``model="charges+polarization"``)
-----------------------------------------------
For the charged states the environment's atoms carry Thole-damped induced
dipoles (:mod:`clusterlab.electrostatics.thole`; van Duijnen & Swart, J. Phys.
Chem. A 102, 2399 (1998); Thole, Chem. Phys. 59, 341 (1981)) that respond to
the field of the difference charges ``q_X - q_S0`` of the central molecule;
``P_X_eV = -1/2 sum mu . E`` is the polarization energy (negative). Left
out: the response of the environment to its own permanent charges and the
cross term of the S0-induced dipoles with the difference field (both are
part of what fixed-charge models put into their charges), polarization of
the central molecule (it is in the QM charges), and periodic images of the
induced dipoles. Neutral excitations (S1, T1) are **not** polarized here:
their difference charges carry no net charge and the effect is small
(common practice: tens of meV against about 1 eV for ions). Each
polarization solve is a linear system over all environment atoms of one
molecule, so this model costs about a second per molecule; use
``molecules=`` to pick a sample.

Vectorisation
-------------
Per frame, :func:`clusterlab.electrostatics.pairsum.environment_potential`:
one KD-tree search over centroids and their periodic replicas gives the
unordered candidate pairs; for each molecule, one BLAS matrix product of
augmented coordinates gives the squared distances to all its partners' atoms,
block minima decide membership, and ``1/r`` with two matrix-vector products
gives the potential in both directions. The sum is exact (agreement with a
direct per-molecule sum to about 1e-13 relative). One Python iteration per
molecule and frame, none per pair or atom; ``threads=`` splits the molecules.

Units: Å, e, V (= eV/e), eV.
"""

from __future__ import annotations

import json
import warnings
from collections import deque
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Iterable, Iterator, Mapping, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import ChargeError, InputError
from ..units import COULOMB_EV_A, DEBYE_E_A
from .pairsum import EnvironmentPairs, environment_potential
from ..qm.statecharges import KNOWN_STATES, StateCharges, state_charges  # noqa: layer (temporary)
from .stark import stark_energy_eV
from .thole import atomic_polarizabilities, solve_induced_dipoles

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

SHIFT_STATES = ("S1", "T1", "cation", "anion")
CHARGED_STATES = ("cation", "anion")
MODELS = ("charges", "charges+stark", "field", "charges+polarization", "charges+stark+polarization",
          "field+polarization")
NEUTRAL_STATES = ("S1", "T1")
RULES = ("atom", "centroid")
#: largest 3n of a dense induced-dipole system (larger ones use the pair-list solver)
_DENSE_MAX = 5400

__all__ = [
    "StateChargeSet",
    "film_site_energies",
    "conformer_spread",
    "environment_pairs",
    "SHIFT_STATES",
]


# ----------------------------------------------------------------------------
# state charges per molecule type
# ----------------------------------------------------------------------------
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
        ``alpha_X - alpha_S0`` (Å³) of the neutral excitations, from
        :func:`clusterlab.electrostatics.stark.differential_polarizability`
        (empty when not fitted).
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
    """Charges of S0, S1, T1, cation and anion per residue name.

    Attributes
    ----------
    charges_e : dict resname -> dict state -> ndarray (n_atoms_of_type,)
        In the molecule's atom order (as in the film), e.
    transition_e : dict resname -> ndarray (n,) or None
        S0->S1 transition charges (e), when fitted.
    fits : dict resname -> StateCharges
        The full fits (geometry, method, dipoles, misfit, convergence), when
        the set was made by :meth:`from_film`; empty for :meth:`from_arrays`.
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
    fits: dict[str, StateCharges] = field(default_factory=dict)
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

    @classmethod
    def from_film(cls, film: "Film", method_like: Any, *, resnames: Sequence[str] | None = None,
                  frame: int = 0, molecules: Mapping[str, int] | None = None,
                  states: Sequence[str] = KNOWN_STATES, transition: bool = True,
                  n_conformers: int = 1, conformer_frames: Sequence[int] | None = None,
                  min_conformer_rmsd_A: float = 0.25, conformer_medoids: bool = True,
                  stark_method: Any = None, symmetrize: bool = False, progress: bool = True,
                  **fit_kw: Any) -> "StateChargeSet":
        """Fit state charges on reference copies of each molecule type.

        Parameters
        ----------
        film : Film
        method_like : "xc/basis" string or an object with ``.xc``/``.basis``
        resnames : sequence of str, optional
            Molecule types to fit (default: all residue names of the film).
        frame : int
            Frame the (first) reference copies are taken from (whole, own geometry).
        molecules : mapping resname -> molecule id, optional
            Which copy is the first reference (default: the first molecule of each type).
        states, transition, **fit_kw
            Passed to :func:`~clusterlab.electrostatics.statecharges.state_charges`
            (the molecule's net charge from the film's charges, when known).
        n_conformers : int
            Conformer families per molecule type. Beyond the first reference,
            the copies (of ``conformer_frames``) farthest in superposed RMSD from
            the references chosen so far are fitted too (farthest-point
            sampling, :func:`~clusterlab.electrostatics.conformers.pick_references`),
            until ``n_conformers`` or until no copy is farther than
            ``min_conformer_rmsd_A``; with ``conformer_medoids`` every reference
            then moves to the medoid of its family (a typical copy rather than
            an extreme one; the first reference may move too). Each costs one
            more QM fit.
        conformer_frames : sequence of int, optional
            Frames whose copies are candidates (default: ``[frame]``).
        stark_method : clusterlab.Method, optional
            Also fit the polarizability changes of S1/T1 of every reference by
            finite fields (25 engine calculations each, see
            :func:`~clusterlab.electrostatics.stark.differential_polarizability`);
            needed by ``model="charges+stark"``.
        symmetrize : bool
            Average the fitted charges over topologically equivalent atoms
            (:meth:`symmetrized`).
        progress : bool
            Progress bars over the reference fits and the finite fields.

        Raises
        ------
        InputError
            A resname the film does not have, or ``n_conformers < 1``.
        """
        from ..progress import progress_bar
        from .conformers import pick_references

        names = np.asarray(film.molecule_resnames)
        wanted = list(dict.fromkeys(names.tolist())) if resnames is None else [str(r) for r in resnames]
        if int(n_conformers) < 1:
            raise InputError(f"n_conformers must be at least 1; got {n_conformers!r}.")
        if "S0" not in states:
            states = ("S0", *states)
        frames = [int(frame)] if conformer_frames is None else [int(f) for f in conformer_frames]
        if int(frame) not in frames:
            frames = [int(frame), *frames]
        geos = {f: film.frame_geometry(f, periodic=film.has_box) for f in frames}
        fits: dict[str, StateCharges] = {}
        confs: dict[str, list[ConformerCharges]] = {}
        bar = progress_bar(None, desc="state-charge fits", enabled=progress, unit="reference")
        for res in wanted:
            ids = np.flatnonzero(names == res)
            if ids.size == 0:
                raise InputError(f"the film has no molecules named {res!r}; it has {sorted(set(names))}.")
            mol0 = int(molecules[res]) if molecules and res in molecules else int(ids[0])
            picks = [(int(frame), mol0)]
            if int(n_conformers) > 1:
                cand = [(f, int(m)) for f in frames for m in ids]
                copies = np.stack([geos[f].positions_A[film.molecule_atoms(m)] for f, m in cand])
                first = cand.index((int(frame), mol0))
                chosen = pick_references(copies, int(n_conformers), first=first, min_rmsd_A=min_conformer_rmsd_A,
                                         medoids=conformer_medoids)
                picks = [cand[k] for k in chosen]
            net = film.molecules["charge"].iloc[mol0]
            charge = int(round(float(net))) if np.isfinite(net) else 0
            confs[res] = []
            for f, mol in picks:
                atoms = film.molecule_atoms(mol)
                pos = geos[f].positions_A[atoms]
                sc = state_charges(list(film.symbols[atoms]), pos, method_like, states=tuple(states),
                                   transition=transition, charge=charge, **fit_kw)
                confs[res].append(ConformerCharges(
                    positions_A=pos, charges_e={k: np.asarray(v, float) for k, v in sc.charges_e.items()},
                    transition_e=sc.transition_charges_e, frame=int(geos[f].frame), molecule=int(mol)))
                fits.setdefault(res, sc)
                bar.update(1)
        bar.close()
        method = next(iter(fits.values())).method if fits else str(method_like)
        out = cls.from_conformers(confs, method=method)
        out.fits = fits
        if symmetrize:
            out = out.symmetrized(film=film)
        if stark_method is not None:
            out = out.with_stark(stark_method, states=[s for s in ("S1", "T1") if s in states], charge=None,
                                 film=film, progress=progress)
        return out

    def with_stark(self, method: Any, *, states: Sequence[str] = ("S1", "T1"), charge: int | None = 0,
                   film: "Film | None" = None, steps_V_A: Sequence[float] = (0.1, 0.2),
                   refit: bool = True, progress: bool = True,
                   on_reference: Callable[["StateChargeSet"], Any] | None = None) -> "StateChargeSet":
        """A copy of the set with the polarizability changes of ``states`` fitted
        on every conformer reference by finite fields with the engine ``method``
        (:func:`~clusterlab.electrostatics.stark.differential_polarizability`).

        ``charge`` is the molecules' net charge (None: from ``film``'s charges).
        ``refit=False`` keeps references that already carry every state.
        ``progress`` shows a bar over the engine calculations.
        ``on_reference`` is called with the partly fitted copy after each
        reference (checkpoints: with ``refit=False`` a later call skips the
        references that were done).

        Raises
        ------
        InputError
            A resname without reference geometries (sets made by :meth:`from_arrays`).
        """
        import copy

        from ..progress import progress_bar
        from ..qm.finitefield import differential_polarizability

        out = copy.deepcopy(self)
        todo = sum(1 for refs in out.conformers.values() for ref in refs if refit or not ref.has_response(states))
        bar = progress_bar(todo * (1 + 12 * len(steps_V_A)), desc="finite fields", enabled=progress, unit="calc")
        for res in out.resnames:
            refs = out.conformers.get(res)
            if not refs:
                raise InputError(f"residue {res!r} has no reference geometry; build the set with from_film "
                                 "or from_conformers to fit polarizability changes.")
            q = charge
            if q is None:
                if film is None or refs[0].molecule < 0:
                    q = 0
                else:
                    net = film.molecules["charge"].iloc[refs[0].molecule]
                    q = int(round(float(net))) if np.isfinite(net) else 0
            syms = None
            if film is not None and refs[0].molecule >= 0:
                syms = list(film.symbols[film.molecule_atoms(refs[0].molecule)])
            elif res in out.fits:
                syms = list(out.fits[res].symbols)
            if syms is None:
                raise InputError(f"element symbols of {res!r} are unknown; pass film=.")
            for ref in refs:
                if not refit and ref.has_response(states):
                    continue
                fit = differential_polarizability(syms, ref.positions_A, method, states=states, charge=int(q),
                                                  steps_V_A=steps_V_A, on_field=lambda: bar.update(1))
                ref.dalpha_A3.update(fit.dalpha_A3)
                ref.dmu_D.update(fit.dmu_D)
                if on_reference is not None:
                    on_reference(out)
        bar.close()
        out.stark_method = {**(method.to_dict() if hasattr(method, "to_dict") else {"method": str(method)}),
                            "steps_V_A": [float(x) for x in steps_V_A]}
        return out

    def symmetrized(self, classes: Mapping[str, npt.ArrayLike] | None = None, *,
                    film: "Film | None" = None) -> "StateChargeSet":
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
        classes : mapping resname -> array (n,) int, optional
            Equivalence labels per atom; default: topological classes
            (:func:`~clusterlab.electrostatics.conformers.equivalence_classes`)
            from ``film``'s bonds (or from interatomic distances when it has none).
        film : Film, optional
            Needed when ``classes`` is not given.

        Raises
        ------
        InputError
            Neither ``classes`` nor ``film`` for a resname, or labels of the wrong length.
        """
        import copy

        out = copy.deepcopy(self)
        for res in out.resnames:
            if classes is not None and res in classes:
                lab = np.asarray(classes[res], dtype=np.int64)
            elif film is not None:
                lab = _topology_classes(film, res)
            else:
                raise InputError(f"no equivalence classes for {res!r}; pass classes= or film=.")
            n = len(next(iter(out.charges_e[res].values())))
            if len(lab) != n:
                raise InputError(f"{len(lab)} equivalence labels for {res!r}, which has {n} atoms.")
            avg = (lambda q: (np.bincount(lab, weights=q) / np.bincount(lab))[lab])
            out.charges_e[res] = {k: avg(v) for k, v in out.charges_e[res].items()}
            for c in out.conformers.get(res, []):
                c.charges_e = {k: avg(v) for k, v in c.charges_e.items()}
        out.method = self.method
        return out

    # --------------------------------------------------------------- access
    @property
    def resnames(self) -> list[str]:
        return sorted(self.charges_e)

    def states_of(self, resname: str) -> tuple[str, ...]:
        return tuple(self.charges_e[resname])

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

    def ground_source(self, fallback: Any = None):
        """The fitted S0 charges as a :class:`~clusterlab.charges.MoleculeTypeCharges`
        source (for carving or for ``environment="fitted"``)."""
        from ..charges import MoleculeTypeCharges

        return MoleculeTypeCharges({r: v["S0"] for r, v in self.charges_e.items()},
                                   fallback=fallback, label=f"S0 ESP ({self.method})")

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

    # ----------------------------------------------------------------- JSON
    def to_json(self) -> str:
        """JSON text; :meth:`from_json` rebuilds the set (fits included)."""
        return json.dumps({
            "kind": "clusterlab.StateChargeSet", "version": 1, "method": self.method,
            "charges_e": {r: {s: q.tolist() for s, q in d.items()} for r, d in self.charges_e.items()},
            "transition_e": {r: (None if t is None else np.asarray(t).tolist()) for r, t in self.transition_e.items()},
            "reference": self.reference,
            "fits": {r: json.loads(f.to_json()) for r, f in self.fits.items()},
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
        out.fits = {r: StateCharges.from_json(json.dumps(f)) for r, f in d.get("fits", {}).items()}
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


# ----------------------------------------------------------------------------
# environment pairs of one frame
# ----------------------------------------------------------------------------
def _topology_classes(film: "Film", res: str) -> IntArray:
    """Topological equivalence classes of the first molecule named ``res``."""
    from .conformers import bonds_by_distance, equivalence_classes

    ids = np.flatnonzero(np.asarray(film.molecule_resnames) == res)
    if ids.size == 0:
        raise InputError(f"the film has no molecules named {res!r}.")
    atoms = film.molecule_atoms(int(ids[0]))
    syms = list(film.symbols[atoms])
    b = film.bonds
    if b is not None and len(b):
        local = -np.ones(film.n_atoms, np.int64)
        local[atoms] = np.arange(len(atoms))
        bb = local[b]
        bonds = bb[(bb >= 0).all(axis=1)]
    else:
        bonds = bonds_by_distance(syms, film.frame_geometry(0).positions_A[atoms])
    return equivalence_classes(syms, bonds)


def environment_pairs(film: "Film", radius: float, *, frame: int = 0, rule: str = "atom") -> EnvironmentPairs:
    """Which molecule images form each molecule's environment in one frame
    (the same choice as :meth:`~clusterlab.Film.carve`), for all molecules at once."""
    geo = film.frame_geometry(frame, periodic=film.has_box)
    res = environment_potential(geo.positions_A, np.zeros(film.n_atoms), film.index.atoms, film.index.offsets,
                                geo.centroids_A, geo.box, _check_radius(radius), rule=_check_rule(rule))
    return res.pairs


def _check_radius(radius: Any) -> float:
    try:
        r = float(radius)
    except (TypeError, ValueError) as exc:
        raise InputError(f"radius must be a number of Å; got {radius!r}.") from exc
    if not np.isfinite(r) or r <= 0:
        raise InputError(f"radius must be a finite positive number of Å; got {radius!r}.")
    return r


def _check_rule(rule: str) -> str:
    if rule not in RULES:
        raise InputError(f"{rule!r} is an invalid rule. Use 'atom' or 'centroid'.")
    return rule


# ----------------------------------------------------------------------------
# the film-wide driver
# ----------------------------------------------------------------------------
def _difference_arrays(film: "Film", charges: StateChargeSet, states: Sequence[str]
                       ) -> tuple[dict[str, FloatArray], npt.NDArray[np.bool_]]:
    """Per-atom ``q_X - q_S0`` for every state, and which molecules are covered."""
    names = np.asarray(film.molecule_resnames)
    covered = np.isin(names, list(charges.charges_e))
    out = {s: np.full(film.n_atoms, np.nan) for s in states}
    for res in charges.resnames:
        ids = np.flatnonzero(names == res)
        if ids.size == 0:
            continue
        sizes = film.index.sizes()[ids]
        for s in states:
            dq = charges.difference(res, s)
            if np.any(sizes != len(dq)):
                bad = ids[sizes != len(dq)][0]
                raise ChargeError(f"charges for {res!r} have {len(dq)} atoms, but molecule {bad} has "
                                  f"{film.index.sizes()[bad]}; the set does not fit this film.")
            atoms = film.index.atoms[(film.index.offsets[ids][:, None] + np.arange(len(dq))).ravel()]
            out[s][atoms] = np.tile(dq, len(ids))
    return out, covered


@dataclass(frozen=True)
class _FrameFamilies:
    """Conformer-family assignment of one frame."""

    family: IntArray          # (n_mol,) index of the reference, -1 for types without references
    rotation: FloatArray      # (n_mol, 3, 3) reference frame -> copy
    rmsd_A: FloatArray        # (n_mol,)


def _assign_families(film: "Film", charges: StateChargeSet, positions_A: FloatArray) -> _FrameFamilies:
    from .conformers import assign_conformers

    names = np.asarray(film.molecule_resnames)
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
    return _FrameFamilies(fam, rot, rms)


def _family_overrides(film: "Film", charges: StateChargeSet, fams: _FrameFamilies, states: Sequence[str],
                      dq: dict[str, FloatArray], q_env: FloatArray | None) -> None:
    """Put each copy's family charges into the per-atom arrays (in place)."""
    names = np.asarray(film.molecule_resnames)
    for res, refs in charges.conformers.items():
        ids = np.flatnonzero(names == res)
        if ids.size == 0 or len(refs) < 2:
            continue                                  # one reference: the static arrays hold it already
        n = len(refs[0].positions_A)
        atoms = film.index.atoms[(film.index.offsets[ids][:, None] + np.arange(n)).ravel()]
        f = fams.family[ids]
        for s in states:
            table = np.stack([c.charges_e[s] - c.charges_e["S0"] for c in refs])
            dq[s][atoms] = table[f].ravel()
        if q_env is not None:
            q_env[atoms] = np.stack([c.charges_e["S0"] for c in refs])[f].ravel()


def _uniform_field(positions_A: FloatArray, potential_V: FloatArray, index: Any,
                   min_spread_A: float = 0.1) -> FloatArray:
    """Uniform field (V/Å) that best reproduces the potential over each molecule's atoms.

    Least squares ``V_a ≈ V_0 - F·(r_a - r_mean)``; directions in which the
    molecule's atoms spread less than ``min_spread_A`` (rms) get no field
    component (a planar molecule gives no out-of-plane gradient).
    """
    sizes = index.sizes()
    n_mol, m = len(sizes), int(sizes.max(initial=1))
    rows = np.repeat(np.arange(n_mol), sizes)
    slot = np.arange(len(index.atoms)) - index.offsets[:-1][rows]
    x = np.zeros((n_mol, m, 3))
    v = np.zeros((n_mol, m))
    x[rows, slot] = positions_A[index.atoms]
    v[rows, slot] = potential_V[index.atoms]
    mask = np.zeros((n_mol, m))
    mask[rows, slot] = 1.0
    cnt = sizes[:, None].astype(float)
    x = (x - (x.sum(axis=1) / cnt)[:, None, :]) * mask[..., None]
    v = (v - (v.sum(axis=1, keepdims=True) / cnt)) * mask
    u, sv, vt = np.linalg.svd(x, full_matrices=False)             # x = u diag(sv) vt
    keep = sv > min_spread_A * np.sqrt(cnt)
    inv = np.where(keep, 1.0 / np.where(keep, sv, 1.0), 0.0)
    grad = np.einsum("nji,nj,nkj,nk->ni", vt, inv, u, v)           # pinv(x) @ v
    return -grad


def _reference_tensors(film: "Film", charges: StateChargeSet, fams: "_FrameFamilies | None",
                       pick: Callable[[Any], FloatArray]) -> Iterator[tuple[IntArray, FloatArray, FloatArray]]:
    """Per molecule type: the molecules of that type, ``pick(reference)`` of each
    molecule's conformer reference (stacked) and the rotation of each molecule from
    its reference's frame into the film."""
    names = np.asarray(film.molecule_resnames)
    for res, refs in charges.conformers.items():
        ids = np.flatnonzero(names == res)
        if ids.size == 0:
            continue
        fam = np.maximum(fams.family[ids], 0) if fams is not None else np.zeros(ids.size, int)
        r = fams.rotation[ids] if fams is not None else np.tile(np.eye(3), (ids.size, 1, 1))
        yield ids, np.stack([pick(c) for c in refs])[fam], r


def _dipole_term(film: "Film", charges: StateChargeSet, fams: "_FrameFamilies | None", state: str,
                 fld: FloatArray) -> FloatArray:
    """``-Δμ·F`` (eV) of every molecule, Δμ of its conformer reference turned into its orientation."""
    out = np.full(film.n_molecules, np.nan)
    for ids, dmu, r in _reference_tensors(film, charges, fams, lambda c: c.dmu_D[state]):
        out[ids] = -np.einsum("ni,nij,nj->n", fld[ids], r, dmu * DEBYE_E_A)
    return out


def _env_charges(film: "Film", charges: StateChargeSet, environment: str) -> FloatArray:
    if environment == "film":
        return np.asarray(film.charges, dtype=np.float64)
    if environment == "fitted":
        base = np.array(film.charges, dtype=np.float64) if film.charges_available else np.full(film.n_atoms, np.nan)
        names = np.asarray(film.molecule_resnames)
        for res in charges.resnames:
            q0 = charges.charges_e[res]["S0"]
            for k in np.flatnonzero(names == res):
                base[film.index.of(int(k))] = q0
        if np.isnan(base).any():
            raise ChargeError("environment='fitted' covers only the fitted residue names and the film "
                              "has no charges for the others.")
        return base
    raise InputError(f"{environment!r} is an invalid environment. Use 'film' or 'fitted'.")


def _polarize(geo: Any, film: "Film", mol: int, pairs: EnvironmentPairs, sel: IntArray,
              dq: dict[str, FloatArray], alpha_all: FloatArray, cutoff_A: float | None,
              tol_eA: float) -> dict[str, tuple[float, bool]]:
    """Thole polarization energies of the environment of one molecule."""
    idx = film.index
    c_atoms = idx.of(mol)
    env_m = pairs.env[sel]
    sizes = idx.sizes()[env_m]
    starts = idx.offsets[env_m]
    within = np.arange(sizes.sum()) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    atoms = idx.atoms[np.repeat(starts, sizes) + within]
    sites = geo.positions_A[atoms] + np.repeat(pairs.shift_A[sel], sizes, axis=0)
    alpha = alpha_all[atoms]
    src = geo.positions_A[c_atoms]
    d = sites[:, None, :] - src[None, :, :]
    r3 = np.linalg.norm(d, axis=2) ** 3
    fields = {st: COULOMB_EV_A * np.einsum("sa,sax->sx", dqa[c_atoms][None, :] / r3, d) for st, dqa in dq.items()}
    if cutoff_A is None and 3 * len(sites) <= _DENSE_MAX:
        return _block_cg(sites, alpha, fields, tol_eA)
    out = {}
    for st, e in fields.items():
        pol = solve_induced_dipoles(sites, alpha, e, method="cg", tol_eA=tol_eA, cutoff_A=cutoff_A,
                                    max_iter=1000)
        out[st] = (pol.energy_eV, pol.converged)
    return out


def _block_cg(sites: FloatArray, alpha: FloatArray, fields: dict[str, FloatArray], tol_eA: float,
              max_iter: int = 500) -> dict[str, tuple[float, bool]]:
    """Induced dipoles for several fields at once: conjugate gradients on the
    symmetric system (1 - s T s) y = s E0, s = alpha^1/2, mu = s y, with the
    dense Thole tensor of :func:`~clusterlab.electrostatics.thole.dipole_tensor_matrix`
    (the same equations as :func:`~clusterlab.electrostatics.thole.solve_induced_dipoles`)."""
    from .thole import dipole_tensor_matrix

    names = list(fields)
    s = np.repeat(np.sqrt(alpha), 3)
    a = -(s[:, None] * dipole_tensor_matrix(sites, alpha) * s[None, :])
    a[np.diag_indices_from(a)] += 1.0
    e0 = np.stack([fields[k].ravel() / COULOMB_EV_A for k in names], axis=1)     # (3n, k), e/Å^2
    b = s[:, None] * e0
    y = b.copy()
    r = b - a @ y
    p = r.copy()
    rs = np.einsum("ik,ik->k", r, r)
    done = np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
    for _ in range(max_iter):
        if done.all():
            break
        ap = a @ p
        pap = np.einsum("ik,ik->k", p, ap)
        step = np.where(done | (pap <= 0), 0.0, rs / np.where(pap > 0, pap, 1.0))
        y += step * p
        r -= step * ap
        rs_new = np.einsum("ik,ik->k", r, r)
        done |= np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
        done |= pap <= 0
        p = r + np.where(rs > 0, rs_new / np.where(rs > 0, rs, 1.0), 0.0) * p
        rs = rs_new
    mu = s[:, None] * y
    resid = np.max(np.abs(s[:, None] * (b - a @ y)), axis=0)
    energy = -0.5 * np.einsum("ik,ik->k", mu, e0) * COULOMB_EV_A
    return {k: (float(energy[n]), bool(resid[n] < tol_eA and np.all(np.isfinite(mu[:, n]))))
            for n, k in enumerate(names)}


def film_site_energies(
    film: "Film",
    states: Sequence[str] = SHIFT_STATES,
    *,
    radius: float,
    frames: Iterable[int] | None = None,
    model: str = "charges",
    charges: StateChargeSet,
    periodic_limit: bool = False,
    rule: str = "atom",
    progress: bool = True,
    molecules: Sequence[int] | None = None,
    environment: str = "film",
    polarization_cutoff_A: float | None = None,
    polarization_tol_eA: float = 1e-6,
    ewald_accuracy: float = 1e-6,
    threads: int = 1,
    response_states: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Electrostatic environment shifts of every molecule of every frame.

    Parameters
    ----------
    film : Film
    states : sequence of {"S1", "T1", "cation", "anion"}
    radius : float, Å
        Environment radius with the semantics of :meth:`Film.carve`; radii
        beyond half the box include every qualifying periodic image once.
    frames : iterable of int, optional
        Default: all frames.
    model : {"charges", "charges+stark", "charges+polarization", "charges+stark+polarization"}
        ``"stark"`` adds the second-order (quadratic Stark) term of the
        neutral excitations, ``-1/2 F·Δα_X·F``, with F the uniform field
        that best reproduces the environment potential over the molecule's
        atoms and Δα_X the polarizability change of the molecule's conformer
        reference, turned into the copy's orientation (the set must carry
        Δα: :meth:`StateChargeSet.with_stark`). ``S1_shift_eV`` /
        ``T1_shift_eV`` are then first plus second order, with the parts in
        ``<state>_first_order_eV`` and ``<state>_stark_eV`` and ``|F|`` in
        ``field_V_A``. ``"field"``: the neutral excitations from their
        finite-field response alone, ``-Δμ_X·F - 1/2 F·Δα_X·F`` (Δμ from the
        same fit: an energy derivative, i.e. the *relaxed* dipole change,
        where difference charges carry the unrelaxed one; the ions keep
        their charges); ``<state>_first_order_eV`` then holds ``-Δμ·F``.
        ``"polarization"``: the charged states also get Thole
        polarization energies ``P_cation_eV``, ``P_anion_eV`` (negative) and
        totals (see the module docstring; about a second per molecule).
    charges : StateChargeSet
        State charges per residue name; molecules of other residue names get NaN.
    periodic_limit : bool
        Also give ``<state>_shift_periodic_eV``: the same sum with the full
        periodic (tinfoil Ewald) potential of all other molecules and images,
        via :func:`clusterlab.electrostatics.ewald.ewald_potential` (slow:
        seconds per frame; needs a box and a neutral cell).
    rule : {"atom", "centroid"}
    progress : bool
        Show a progress bar over frames.
    molecules : sequence of int, optional
        Only these molecules (default: all).
    environment : {"film", "fitted"}
        Ground-state charges of the environment: the film's charge source
        (what carving uses) or the fitted S0 charges of the set.
    polarization_cutoff_A : float, optional
        Leave out induced dipole-dipole couplings beyond this distance
        (default: all pairs in the environment).
    polarization_tol_eA : float
        Convergence threshold of the induced dipoles (e·Å).
    ewald_accuracy : float
        Relative accuracy of the periodic limit.
    threads : int
        Threads for the pair sums of each frame (numpy/BLAS release the GIL);
        1 runs everything in the calling thread.
    response_states : sequence of {"S1", "T1"}, optional
        With ``model="field"``: the neutral excitations that use the
        finite-field response (default: all asked for); the others keep
        their first-order charges. On the demo film the response is what
        S1 needs while T1 follows QM better with its charges (README).

    Returns
    -------
    pandas.DataFrame
        One row per (frame, molecule): ``frame, molecule, resname, x_A, y_A,
        z_A`` (centroid, primary cell), ``n_env_molecules`` (environment
        molecule images), ``<state>_shift_eV`` per state, ``IP_shift_eV``
        / ``EA_shift_eV`` when the ions are asked for (engine sign
        convention: EA = E(neutral) - E(anion)), with conformer references
        ``conformer`` (index of the reference each copy took) and
        ``conformer_rmsd_A``, with the Stark term the columns named under
        ``model``, and with polarization ``P_cation_eV, P_anion_eV,
        cation_total_eV, anion_total_eV, P_converged`` (IP/EA then include
        polarization).

    Raises
    ------
    InputError
        Bad states, model, rule, radius or environment.
    ChargeError
        Charges that do not fit the film's molecules, or no film charges.

    Examples
    --------
    >>> table = film_site_energies(film, radius=15.0, charges=charge_set)  # doctest: +SKIP
    >>> table.groupby("frame")["cation_shift_eV"].std()  # doctest: +SKIP
    """
    from ..progress import progress_bar

    states = tuple(states)
    bad = [s for s in states if s not in SHIFT_STATES]
    if bad or not states:
        raise InputError(f"states {list(states)!r} are invalid; choose from {list(SHIFT_STATES)}.")
    if model not in MODELS:
        raise InputError(f"{model!r} is an invalid model. Use one of {', '.join(map(repr, MODELS))}.")
    if not isinstance(charges, StateChargeSet):
        raise InputError(f"charges= must be a StateChargeSet; got {type(charges).__name__}.")
    radius = _check_radius(radius)
    rule = _check_rule(rule)
    for res in charges.resnames:
        miss = [s for s in states if s not in charges.charges_e[res]]
        if miss:
            raise InputError(f"the charge set has no {miss} charges for {res!r}; it has {charges.states_of(res)}.")
    frame_list = list(range(film.n_frames)) if frames is None else [film.check_frame(f) for f in frames]
    mol_sel = np.arange(film.n_molecules) if molecules is None else np.unique(film.select(list(molecules)))
    want = np.zeros(film.n_molecules, bool)
    want[mol_sel] = True
    if periodic_limit and not film.has_box:
        raise InputError("periodic_limit=True needs a film with a periodic box.")
    dq, covered = _difference_arrays(film, charges, states)
    dq0 = {s: np.nan_to_num(v) for s, v in dq.items()}
    q_env0 = _env_charges(film, charges, environment)
    polar = "polarization" in model
    field_model = model.startswith("field")
    stark_states = [s for s in states if s in NEUTRAL_STATES] if ("stark" in model or field_model) else []
    if field_model and response_states is not None:
        bad = [s for s in response_states if s not in NEUTRAL_STATES]
        if bad:
            raise InputError(f"response_states {bad} are invalid; use 'S1' and/or 'T1'.")
        stark_states = [s for s in stark_states if s in response_states]
    for res in charges.resnames:
        refs = charges.conformers.get(res, [])
        miss = [s for s in stark_states if not refs or any(s not in c.dalpha_A3 or (field_model and s not in c.dmu_D)
                                                              for c in refs)]
        if miss:
            raise InputError(f"model={model!r} needs polarizability (and, for 'field', dipole) changes of {miss} for "
                             f"{res!r}; fit them with StateChargeSet.with_stark(method) or "
                             "from_film(..., stark_method=method).")
    families = bool(charges.conformers)
    pol_states = [s for s in states if s in CHARGED_STATES] if polar else []
    alpha_all = atomic_polarizabilities(list(film.symbols)) if pol_states else None
    names = np.asarray(film.molecule_resnames)

    rows: list[dict[str, Any]] = []

    def frame_inputs(f: int) -> tuple[Any, Any, dict[str, FloatArray], FloatArray]:
        geo = film.frame_geometry(f, periodic=film.has_box)
        q_env, dq_f = q_env0, dq0
        fams = None
        if families:
            fams = _assign_families(film, charges, geo.positions_A)
            dq_f = {s: v.copy() for s, v in dq0.items()}
            q_env = q_env0.copy() if environment == "fitted" else None
            _family_overrides(film, charges, fams, states, dq_f, q_env)
            q_env = q_env0 if q_env is None else q_env
        return geo, fams, dq_f, q_env

    def potential(geo: Any, q_env: FloatArray, n_threads: int) -> Any:
        return environment_potential(geo.positions_A, q_env, film.index.atoms, film.index.offsets,
                                     geo.centroids_A, geo.box, radius, rule=rule,
                                     want=None if molecules is None else want, threads=n_threads)

    def finish(geo: Any, fams: Any, dq_f: dict[str, FloatArray], q_env: FloatArray, env: Any) -> None:
        pot = env.potential_V
        pairs = env.pairs
        row: dict[str, Any] = {
            "frame": np.full(len(mol_sel), geo.frame), "molecule": mol_sel, "resname": names[mol_sel],
            "x_A": geo.centroids_A[mol_sel, 0], "y_A": geo.centroids_A[mol_sel, 1],
            "z_A": geo.centroids_A[mol_sel, 2],
            "n_env_molecules": np.bincount(pairs.center, minlength=film.n_molecules)[mol_sel],
        }
        if fams is not None:
            row["conformer"] = fams.family[mol_sel]
            row["conformer_rmsd_A"] = fams.rmsd_A[mol_sel]
        for s in states:
            val = np.bincount(film.molecule_of_atom, weights=dq_f[s] * pot, minlength=film.n_molecules)[mol_sel]
            row[f"{s}_shift_eV"] = np.where(covered[mol_sel], val, np.nan)
        if stark_states:
            fld = _uniform_field(geo.positions_A, pot, film.index)
            row["field_V_A"] = np.linalg.norm(fld, axis=1)[mol_sel]
            for s in stark_states:
                e2 = np.full(film.n_molecules, np.nan)
                for ids, da, r in _reference_tensors(film, charges, fams, lambda c, s=s: c.dalpha_A3[s]):
                    e2[ids] = stark_energy_eV(np.einsum("nij,njk,nlk->nil", r, da, r), fld[ids])
                first = row[f"{s}_shift_eV"]
                if field_model:
                    first = np.where(covered[mol_sel], _dipole_term(film, charges, fams, s, fld)[mol_sel], np.nan)
                row[f"{s}_first_order_eV"] = first
                row[f"{s}_stark_eV"] = e2[mol_sel]
                row[f"{s}_shift_eV"] = first + e2[mol_sel]
        if periodic_limit:
            from .ewald import ewald_potential

            phi = ewald_potential(geo.positions_A, geo.positions_A, q_env, geo.box,
                                  point_groups=film.molecule_of_atom, charge_groups=film.molecule_of_atom,
                                  accuracy=ewald_accuracy)
            for s in states:
                v = np.bincount(film.molecule_of_atom, weights=dq_f[s] * phi,
                                minlength=film.n_molecules)[mol_sel]
                row[f"{s}_shift_periodic_eV"] = np.where(covered[mol_sel], v, np.nan)
        if pol_states:
            order = np.argsort(pairs.center, kind="stable")
            bounds = np.searchsorted(pairs.center[order], np.arange(film.n_molecules + 1))
            p_vals = {s: np.full(len(mol_sel), np.nan) for s in pol_states}
            p_ok = np.ones(len(mol_sel), bool)
            for k, mol in enumerate(mol_sel):
                if not covered[mol]:
                    continue
                sel = order[bounds[mol]:bounds[mol + 1]]
                res = _polarize(geo, film, int(mol), pairs, sel, {s: dq_f[s] for s in pol_states}, alpha_all,
                                polarization_cutoff_A, polarization_tol_eA)
                for s, (e, ok) in res.items():
                    p_vals[s][k] = e
                    p_ok[k] &= ok
            for s in pol_states:
                row[f"P_{s}_eV"] = p_vals[s]
                row[f"{s}_total_eV"] = row[f"{s}_shift_eV"] + p_vals[s]
            row["P_converged"] = p_ok
        tot = "_total_eV" if pol_states else "_shift_eV"
        if "cation" in states:
            row["IP_shift_eV"] = row[f"cation{tot}"]
        if "anion" in states:
            row["EA_shift_eV"] = -row[f"anion{tot}"]
        rows.append(row)
        if bar is not None:
            bar.update(1)

    # threads > 1 over several frames: each thread sums whole frames (frames are read and
    # finished in order in this thread, at most `threads` frames ahead); one frame: the
    # threads share its molecules
    n_threads = max(1, int(threads))
    pool = None
    bar = progress_bar(len(frame_list), desc="site energies", enabled=progress, unit="frame")
    try:
        if n_threads > 1 and len(frame_list) > 1:
            from concurrent.futures import ThreadPoolExecutor

            pool = ThreadPoolExecutor(max_workers=n_threads)
        pending: deque[tuple[Any, ...]] = deque()
        for f in frame_list:
            geo, fams, dq_f, q_env = frame_inputs(f)
            if pool is None:
                finish(geo, fams, dq_f, q_env, potential(geo, q_env, n_threads))
                continue
            pending.append((geo, fams, dq_f, q_env, pool.submit(potential, geo, q_env, 1)))
            if len(pending) > n_threads:
                *args, fut = pending.popleft()
                finish(*args, fut.result())
        while pending:
            *args, fut = pending.popleft()
            finish(*args, fut.result())
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
        if bar is not None:
            bar.close()
    if not rows:
        raise InputError("frames= selects no frame; give at least one frame index.")
    # one table at the end: per-frame DataFrames cost more than the pair sums of a small film
    out = pd.DataFrame({k: np.concatenate([r[k] for r in rows]) for k in rows[0]})
    if pol_states and not out["P_converged"].all():
        warnings.warn(f"induced dipoles did not converge for {(~out['P_converged']).sum()} molecule(s); "
                      "see the P_converged column.", stacklevel=2)
    out.attrs.update({"radius_A": radius, "rule": rule, "model": model, "environment": environment,
                      "charges_method": charges.method, "film_id": film.film_id})
    return out


# ----------------------------------------------------------------------------
# conformational error estimate
# ----------------------------------------------------------------------------
def conformer_spread(
    film: "Film",
    charges: StateChargeSet,
    method_like: Any,
    *,
    radius: float,
    resname: str | None = None,
    n_copies: int = 4,
    frame: int = 0,
    states: Sequence[str] = SHIFT_STATES,
    rule: str = "atom",
    seed: int = 0,
    molecules: Sequence[int] | None = None,
    **fit_kw: Any,
) -> pd.DataFrame:
    """Error of reusing reference charges for every conformation, by refitting copies.

    The model gives each copy the charges of its conformer reference (or of
    the one reference). This refits the state charges of ``n_copies`` copies
    of ``resname`` at their own geometries (same method and fit options as
    passed here) and evaluates the first-order shift of each copy with its own
    difference charges in the same environment potential; the difference is
    what the transfer costs.

    Parameters
    ----------
    film, charges : Film, StateChargeSet
    method_like : method description for
        :func:`~clusterlab.electrostatics.statecharges.state_charges`
    radius, rule : carving semantics of the environment
    resname : str, optional
        Molecule type (default: the set's first).
    n_copies, seed : random copies to refit (``numpy.random.default_rng(seed)``)
    frame : int
    states : sequence of states
    molecules : sequence of int, optional
        Copies to refit instead of a random choice.
    **fit_kw
        Passed to ``state_charges`` (grid, grid_level, density_fit, ...).

    Returns
    -------
    pandas.DataFrame
        One row per (molecule, state): ``frame, molecule, state, conformer,
        conformer_rmsd_A, shift_model_eV, shift_refit_eV, error_eV`` (model -
        refit). ``df.attrs["rms_error_eV"]`` holds the RMS per state, the
        estimate to quote next to the model's shifts.

    Raises
    ------
    InputError
        Unknown residue name or a bad state.
    """
    res = resname if resname is not None else charges.resnames[0]
    names = np.asarray(film.molecule_resnames)
    ids = np.flatnonzero(names == res)
    if ids.size == 0 or res not in charges.charges_e:
        raise InputError(f"residue {res!r} is not in both the film and the charge set.")
    states = tuple(states)
    bad = [s for s in states if s not in SHIFT_STATES or s not in charges.charges_e[res]]
    if bad:
        raise InputError(f"states {bad} are not shift states of the set for {res!r}; it has {charges.states_of(res)}.")
    if molecules is None:
        rng = np.random.default_rng(seed)
        picks = np.sort(rng.choice(ids, size=min(n_copies, ids.size), replace=False))
    else:
        picks = np.asarray(molecules, dtype=np.int64)
    radius = _check_radius(radius)
    geo = film.frame_geometry(frame, periodic=film.has_box)
    want = np.zeros(film.n_molecules, bool)
    want[picks] = True
    q_env = np.asarray(film.charges, dtype=np.float64)
    pot = environment_potential(geo.positions_A, q_env, film.index.atoms, film.index.offsets, geo.centroids_A,
                                geo.box, radius, rule=_check_rule(rule), want=want).potential_V
    fams = _assign_families(film, charges, geo.positions_A) if charges.conformers else None
    rows = []
    for mol in picks:
        atoms = film.molecule_atoms(int(mol))
        net = film.molecules["charge"].iloc[int(mol)]
        sc = state_charges(list(film.symbols[atoms]), geo.positions_A[atoms], method_like,
                           states=("S0", *states), transition=False,
                           charge=int(round(float(net))) if np.isfinite(net) else 0, **fit_kw)
        fam = int(fams.family[mol]) if fams is not None else 0
        ref = charges.conformers[res][fam].charges_e if fams is not None and fam >= 0 else charges.charges_e[res]
        rms = float(fams.rmsd_A[mol]) if fams is not None else float("nan")
        v = pot[atoms]
        for s in states:
            model = float((ref[s] - ref["S0"]) @ v)
            refit = float(sc.difference(s) @ v)
            rows.append((geo.frame, int(mol), s, fam, rms, model, refit, model - refit))
    out = pd.DataFrame(rows, columns=["frame", "molecule", "state", "conformer", "conformer_rmsd_A",
                                      "shift_model_eV", "shift_refit_eV", "error_eV"])
    out.attrs["rms_error_eV"] = out.groupby("state")["error_eV"].apply(lambda e: float(np.sqrt(np.mean(e**2)))).to_dict()
    return out


def run_film_model(film: "Film", method: Any, *, radius_A: float, frames: Sequence[int] | None = None,
                   polarization: bool = False, polarize_molecules: Sequence[int] | None = None,
                   reference_molecule: int = 0, charges: StateChargeSet | None = None,
                   progress: bool = True, n_conformers: int = 1, response: bool = False,
                   symmetrize: bool = False, response_states: Sequence[str] = ("S1",),
                   store: Any = None) -> pd.DataFrame:
    """Fit state charges on reference copies (unless given) and evaluate the
    film-wide model for S1, T1, cation and anion of every molecule and frame.

    ``method`` is a :class:`~clusterlab.Method` (its grid level and density
    fitting are used) or an ``"xc/basis"`` string (then grid level 1 with
    density fitting) for the state-charge fit (TDA for S1/T1, ΔSCF for the ions).

    Polarization (Thole, charged states only) costs seconds per molecule, so
    it is computed for ``polarize_molecules`` (default: all) in the first
    frame of ``frames``; other rows have NaN polarization columns.

    ``n_conformers`` and ``symmetrize`` are passed to
    :meth:`StateChargeSet.from_film`. ``response=True`` also fits the dipole
    and polarizability changes of ``response_states`` (default S1; T1 keeps its
    charges) on every reference by finite fields with ``method`` (a
    :class:`~clusterlab.Method`, triplets left out unless T1 is asked for; 25
    engine calculations per reference) and evaluates them with
    ``model="field"`` (see :func:`film_site_energies`): on the demo film this
    is what makes the S1 shifts follow embedded QM (README).

    The fitted :class:`StateChargeSet` is kept in ``table.attrs["charges"]``
    (transition charges included, for excitonic couplings).

    With a :class:`~clusterlab.store.ResultStore` as ``store``, the fitted set
    is saved in the store's metadata once the state charges are fitted and
    again after each reference's finite fields, under a key of the film and of
    every fit setting; a later call with the same settings (a study resumed
    after a crash) starts from it, so only the reference being fitted when the
    run stopped is redone (or the state-charge fits, if it stopped in those).

    Raises
    ------
    InputError
        ``response=True`` with a method that is not a :class:`~clusterlab.Method`
        while finite fields are still to be fitted (``charges`` without the
        response of every one of ``response_states``), or response states
        other than S1 and T1.
    """
    from ..qm.method import Method

    response_states = [str(s) for s in response_states]
    bad = [s for s in response_states if s not in ("S1", "T1")]
    if response and (bad or not response_states):
        raise InputError(f"response_states {response_states!r} are invalid; the field response knows 'S1' and 'T1'.")

    def fields_missing() -> bool:
        return response and (charges is None or not all(c.has_response(response_states)
                                                          for refs in charges.conformers.values() for c in refs))

    save: Callable[[StateChargeSet], Any] | None = None
    if store is not None and charges is None:
        from ..store import task_key

        slot = "film_model_charges:" + task_key(
            kind="film-model-charges", film_id=film.film_id, reference_molecule=int(reference_molecule),
            method=method.to_dict() if isinstance(method, Method) else str(method), n_conformers=int(n_conformers),
            symmetrize=bool(symmetrize), response_states=response_states if response else [])

        def _save(cset: StateChargeSet) -> None:
            store.meta[slot] = cset.to_json()

        save = _save
        if slot in store.meta:
            charges = StateChargeSet.from_json(store.meta[slot])
    if fields_missing() and not isinstance(method, Method):
        raise InputError("response=True needs a clusterlab.Method (the finite fields run the QM engine); "
                         f"got {method!r}.")
    if charges is None:
        res = str(film.molecule_resnames[film.check_molecule(reference_molecule)])
        fit_kw: dict[str, Any] = {"grid_level": 1, "density_fit": True}
        if hasattr(method, "grid_level"):
            fit_kw = {"grid_level": method.grid_level, "density_fit": method.density_fit}
        charges = StateChargeSet.from_film(film, method, resnames=[res], molecules={res: reference_molecule},
                                           n_conformers=n_conformers, symmetrize=symmetrize, progress=progress,
                                           **fit_kw)
        if save is not None:
            save(charges)
    if fields_missing():
        stark_m = method.replace(n_singlets=max(method.n_singlets, 1) if "S1" in response_states else 0,
                                 n_triplets=max(method.n_triplets, 1) if "T1" in response_states else 0)
        charges = charges.with_stark(stark_m, states=response_states, film=film, charge=None, refit=False,
                                     progress=progress, on_reference=save)
        if save is not None:
            save(charges)
    states = ("S1", "T1", "cation", "anion")
    table = film_site_energies(film, states, radius=radius_A, frames=frames,
                               model="field" if response else "charges", charges=charges, progress=progress,
                               response_states=response_states if response else None)
    if polarization:
        f0 = [int(table.frame.min())]
        pol = film_site_energies(film, ("cation", "anion"), radius=radius_A, frames=f0,
                                 model="charges+polarization", charges=charges, progress=progress,
                                 molecules=polarize_molecules)
        cols = [c for c in pol.columns if c.startswith("P_") or c.endswith("_total_eV")]
        table = table.merge(pol[["frame", "molecule", *cols]], on=["frame", "molecule"], how="left")
    table.attrs["charges"] = charges
    table.attrs["radius_A"] = float(radius_A)
    return table
