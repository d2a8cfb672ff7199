"""State-charge sets fitted on a film's reference copies, and what the fits cost.

* :func:`fit_state_charges`: ESP charges of S0, S1, T1, cation and anion (and
  S0->S1 transition charges) on reference copies taken whole from the film,
  one per conformer family (farthest-point sampling in superposed RMSD,
  :func:`~clusterlab.electrostatics.conformers.pick_references`), with
  :func:`~clusterlab.qm.statecharges.state_charges`;
* :func:`add_field_response`: the dipole and polarizability changes of the
  neutral excitations of every reference, by finite fields with the QM engine
  (:func:`~clusterlab.qm.finitefield.differential_polarizability`);
* :func:`film_equivalence_classes`: topologically equivalent atoms of every
  molecule type (for :meth:`StateChargeSet.symmetrized`);
* :func:`conformer_spread`: refits a few copies at their own geometries and
  reports how far their first-order shifts move (the error of reusing the
  references' charges for every conformation).

The QM settings of every fit come from one :class:`clusterlab.Method`.

Units: Å, e, V, eV.
"""

from __future__ import annotations

import copy
import json
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Mapping, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..charges import MoleculeTypeCharges
from ..electrostatics.chargeset import KNOWN_STATES, ConformerCharges, StateChargeSet
from ..electrostatics.conformers import bonds_by_distance, equivalence_classes, pick_references
from ..electrostatics.pairsum import environment_potential
from ..errors import InputError
from ..progress import progress_bar
from ..qm.finitefield import differential_polarizability
from ..qm.method import Method, require_method
from ..qm.statecharges import state_charges
from ..runner import default_workers, worker_pool
from .filmmap import SHIFT_STATES, check_radius_A, check_rule, frame_families, molecule_net_charge
from .jsonio import json_of_kind, table_from_dict, table_to_dict

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

IntArray = npt.NDArray[np.int64]

#: QM settings that come from the Method alone, never from fit options.
ENGINE_SETTINGS = ("grid_level", "density_fit", "conv_tol", "max_cycle")

__all__ = ["fit_state_charges", "add_field_response", "film_equivalence_classes", "ground_charge_source",
           "conformer_spread", "ConformerSpread"]


def _check_fit_options(fit_kw: Mapping[str, Any]) -> None:
    bad = [k for k in fit_kw if k in ENGINE_SETTINGS]
    if bad:
        raise InputError(f"{bad} are QM settings: they come from the Method (method.replace(...)), "
                         "not from fit options.")


def _wanted_species(film: "Film", species: Sequence[str] | None, resnames: Sequence[str] | None) -> list[str]:
    """The species a fit covers (default: all of the film's), each checked to
    exist and to have one composition."""
    if species is not None and resnames is not None:
        raise InputError("give species= or its former name resnames=, not both.")
    asked = species if species is not None else resnames
    wanted = list(film.species.index) if asked is None else film.check_species(
        [asked] if isinstance(asked, str) else list(asked))
    for sp in wanted:
        film.species_formula(sp)
    return [str(sp) for sp in wanted]


def _type_molecule(film: "Film", res: str, molecule: int = -1) -> int:
    """``molecule`` when it is a copy (>= 0), else the first molecule of species ``res``."""
    if molecule >= 0:
        return int(molecule)
    return int(film.select(species=film.check_species(res))[0])


def fit_state_charges(film: "Film", method: Method, *, species: Sequence[str] | None = None,
                      resnames: Sequence[str] | None = None, frame: int = 0,
                      molecules: Mapping[str, int] | None = None,
                      states: Sequence[str] = KNOWN_STATES, transition: bool = True,
                      n_conformers: int = 1, conformer_frames: Sequence[int] | None = None,
                      min_conformer_rmsd_A: float = 0.25, conformer_medoids: bool = True,
                      symmetrize: bool = False, progress: bool = True, **fit_kw: Any) -> StateChargeSet:
    """Fit state charges on reference copies of each molecular species.

    The set is keyed by species (the ``species`` column of ``film.molecules``):
    each species gets its own references, charges and (later) field responses.

    Parameters
    ----------
    film : Film
    method : clusterlab.Method
        QM method of every fit (TDA for S1/T1, ΔSCF for the ions).
    species : sequence of str, optional
        Species to fit (default: every species of the film).
    resnames : sequence of str, optional
        The former name of ``species`` (species are residue names); give one of the two.
    frame : int
        Frame the (first) reference copies are taken from (whole, own geometry).
    molecules : mapping species -> molecule id, optional
        Which copy is the first reference (default: the first molecule of each species).
    states, transition, **fit_kw
        Passed to :func:`~clusterlab.qm.statecharges.state_charges`
        (fit-point options such as ``grid``, ``points_A``, ``restraint``; the
        molecule's net charge from the film's charges, when known). QM
        settings (grid level, density fitting, SCF thresholds) come from
        ``method`` only.
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
    symmetrize : bool
        Average the fitted charges over topologically equivalent atoms
        (:meth:`StateChargeSet.symmetrized` with :func:`film_equivalence_classes`).
    progress : bool
        A progress bar over the reference fits.

    Returns
    -------
    StateChargeSet
        With the first reference's full fit of each type in ``fits``.

    Raises
    ------
    InputError
        ``method`` not a Method, a QM setting among ``fit_kw``, a species the
        film does not have (the message lists the species), both ``species``
        and ``resnames``, or ``n_conformers < 1``.
    FilmError
        A species whose molecules have several compositions.
    """
    require_method(method, "fit_state_charges")
    _check_fit_options(fit_kw)
    wanted = _wanted_species(film, species, resnames)
    if int(n_conformers) < 1:
        raise InputError(f"n_conformers must be at least 1; got {n_conformers!r}.")
    if "S0" not in states:
        states = ("S0", *states)
    frames = [int(frame)] if conformer_frames is None else [int(f) for f in conformer_frames]
    if int(frame) not in frames:
        frames = [int(frame), *frames]
    geos = {f: film.frame_geometry(f, periodic=film.has_box) for f in frames}
    fits: dict[str, dict[str, Any]] = {}
    confs: dict[str, list[ConformerCharges]] = {}
    names = np.asarray(film.molecule_species)
    plan = []  # (species, references, net charge): known before any fit, so the bar has a total
    for res in wanted:
        ids = np.flatnonzero(names == res)
        mol0 = int(molecules[res]) if molecules and res in molecules else int(ids[0])
        if molecules and res in molecules and names[film.check_molecule(mol0)] != res:
            raise InputError(f"molecules={{{res!r}: {mol0}}}: molecule {mol0} is of species {names[mol0]!r}, "
                             f"not {res!r}.")
        picks = [(int(frame), mol0)]
        if int(n_conformers) > 1:
            cand = [(f, int(m)) for f in frames for m in ids]
            copies = np.stack([geos[f].positions_A[film.molecule_atoms(m)] for f, m in cand])
            first = cand.index((int(frame), mol0))
            chosen = pick_references(copies, int(n_conformers), first=first, min_rmsd_A=min_conformer_rmsd_A,
                                     medoids=conformer_medoids)
            picks = [cand[k] for k in chosen]
        plan.append((res, picks, molecule_net_charge(film, mol0)))
    bar = progress_bar(sum(len(picks) for _, picks, _ in plan), desc="state-charge fits", enabled=progress,
                       unit="reference")
    for res, picks, charge in plan:
        confs[res] = []
        for f, mol in picks:
            atoms = film.molecule_atoms(mol)
            pos = geos[f].positions_A[atoms]
            sc = state_charges(list(film.symbols[atoms]), pos, method, states=tuple(states),
                               transition=transition, charge=charge, **fit_kw)
            confs[res].append(ConformerCharges(
                positions_A=pos, charges_e={k: np.asarray(v, float) for k, v in sc.charges_e.items()},
                transition_e=sc.transition_charges_e, frame=int(geos[f].frame), molecule=int(mol)))
            fits.setdefault(res, json.loads(sc.to_json()))
            bar.update(1)
    bar.close()
    label = next(iter(fits.values()))["method"] if fits else f"{method.xc}/{method.basis}"
    out = StateChargeSet.from_conformers(confs, method=label)
    out.fits = fits
    if symmetrize:
        out = out.symmetrized(film_equivalence_classes(film, out.resnames))
    return out


def add_field_response(charges: StateChargeSet, film: "Film", method: Method, *,
                       states: Sequence[str] = ("S1", "T1"), steps_V_A: Sequence[float] = (0.1, 0.2),
                       refit: bool = True, progress: bool = True,
                       on_reference: Callable[[StateChargeSet], Any] | None = None,
                       workers: int | None = 1) -> StateChargeSet:
    """A copy of ``charges`` with the dipole and polarizability changes of ``states``
    fitted on every conformer reference by finite fields with the engine ``method``
    (:func:`~clusterlab.qm.finitefield.differential_polarizability`; 1 + 12
    per field strength engine calculations per reference).

    Parameters
    ----------
    charges : StateChargeSet
        A set with reference geometries (from :func:`fit_state_charges` or
        :meth:`StateChargeSet.from_conformers`).
    film : Film
        Gives each molecule type's element symbols and net charge (from the
        reference copy, or the type's first molecule for references given by hand).
    method : clusterlab.Method
    states : sequence of {"S1", "T1"}
    steps_V_A : sequence of float, V/Å
        Field strengths of the finite differences.
    refit : bool
        False keeps references that already carry every one of ``states``.
    progress : bool
        A progress bar over the engine calculations.
    on_reference : callable, optional
        Called with the partly fitted copy after each reference (checkpoints:
        with ``refit=False`` a later call skips the references that were done).
    workers : int or None
        Worker processes that fit references side by side (one reference each,
        ``method.threads`` threads; the field calculations of one reference
        stay in one process, where each starts from the previous field's
        density). Default 1: in this process. None: one per usable core. The
        numbers do not depend on it.

    Returns
    -------
    StateChargeSet

    Raises
    ------
    InputError
        ``method`` not a Method, a resname without reference geometries
        (sets made by :meth:`StateChargeSet.from_arrays`), or references whose
        atom count differs from the film's molecules of that name.
    """
    require_method(method, "add_field_response")
    out = copy.deepcopy(charges)
    per_ref = 1 + 12 * len(steps_V_A)
    jobs = []  # (reference, symbols, positions, net charge), checked before anything runs
    for res in out.resnames:
        refs = out.conformers.get(res)
        if not refs:
            raise InputError(f"residue {res!r} has no reference geometry; build the set with fit_state_charges "
                             "or StateChargeSet.from_conformers to fit polarizability changes.")
        mol = _type_molecule(film, res, refs[0].molecule)
        syms = list(film.symbols[film.molecule_atoms(mol)])
        if len(syms) != len(refs[0].positions_A):
            raise InputError(f"references of {res!r} have {len(refs[0].positions_A)} atoms, but molecule {mol} of "
                             f"the film has {len(syms)}; the set does not fit this film.")
        q = molecule_net_charge(film, mol)
        jobs += [(ref, syms, ref.positions_A, q) for ref in refs if refit or not ref.has_response(states)]
    n_proc = min(len(jobs), default_workers() if workers is None else int(workers))
    if n_proc < 1 and jobs:
        raise InputError(f"workers={workers!r} must be at least 1 (or None: one per core).")
    bar = progress_bar(len(jobs) * per_ref, desc="finite fields", enabled=progress, unit="calc")

    def _done(ref: ConformerCharges, fit: Any) -> None:
        ref.dalpha_A3.update(fit.dalpha_A3)
        ref.dmu_D.update(fit.dmu_D)
        if on_reference is not None:
            on_reference(out)

    if n_proc <= 1:
        for ref, syms, pos, q in jobs:
            _done(ref, differential_polarizability(syms, pos, method, states=states, charge=q,
                                                   steps_V_A=steps_V_A, on_field=lambda: bar.update(1)))
    else:
        import concurrent.futures as cf

        with worker_pool(n_proc, method.threads or max(1, default_workers() // n_proc)) as pool:
            futures = {pool.submit(differential_polarizability, syms, pos, method, states=list(states),
                                   charge=q, steps_V_A=list(steps_V_A)): ref for ref, syms, pos, q in jobs}
            for fut in cf.as_completed(futures):
                _done(futures[fut], fut.result())
                bar.update(per_ref)
    bar.close()
    out.stark_method = {**method.to_dict(), "steps_V_A": [float(x) for x in steps_V_A]}
    return out


def film_equivalence_classes(film: "Film", resnames: Sequence[str] | None = None, *,
                             species: Sequence[str] | None = None) -> dict[str, IntArray]:
    """Topological equivalence classes of the atoms of each species
    (:func:`~clusterlab.electrostatics.conformers.equivalence_classes` of its
    first molecule), from the film's bonds, or from interatomic distances in
    frame 0 when the film has none. ``resnames`` is the former name of ``species``.

    Raises
    ------
    InputError
        A species the film does not have.
    FilmError
        A species whose molecules have several compositions.
    """
    names = np.asarray(film.molecule_species)
    wanted = _wanted_species(film, species, resnames)
    b = film.bonds
    out = {}
    for res in wanted:
        ids = np.flatnonzero(names == res)
        atoms = film.molecule_atoms(int(ids[0]))
        syms = list(film.symbols[atoms])
        if b is not None and len(b):
            local = -np.ones(film.n_atoms, np.int64)
            local[atoms] = np.arange(len(atoms))
            bb = local[b]
            bonds = bb[(bb >= 0).all(axis=1)]
        else:
            bonds = bonds_by_distance(syms, film.frame_geometry(0).positions_A[atoms])
        out[res] = equivalence_classes(syms, bonds)
    return out


def ground_charge_source(charges: StateChargeSet, fallback: Any = None) -> MoleculeTypeCharges:
    """The fitted S0 charges of a set as a :class:`~clusterlab.charges.MoleculeTypeCharges`
    source (for carving, or as the film's charges)."""
    return MoleculeTypeCharges({r: v["S0"] for r, v in charges.charges_e.items()},
                               fallback=fallback, label=f"S0 ESP ({charges.method})")


# ----------------------------------------------------------------------------
# conformational error estimate
# ----------------------------------------------------------------------------
@dataclass
class ConformerSpread:
    """Refit check of the conformer references (see :func:`conformer_spread`).

    Attributes
    ----------
    table : pandas.DataFrame
        One row per (molecule, state): ``frame, molecule, state, conformer,
        conformer_rmsd_A, shift_model_eV, shift_refit_eV, error_eV`` (model -
        refit).
    rms_error_eV : dict state -> float
        RMS of ``error_eV`` per state: the estimate to quote next to the
        model's shifts.
    radius_A : float
    resname : str
    method : dict
        ``Method.to_dict()`` of the refits.
    """

    table: pd.DataFrame
    rms_error_eV: dict[str, float]
    radius_A: float
    resname: str
    method: dict[str, Any] = field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        return self.table.copy()

    def summary(self) -> dict[str, Any]:
        out: dict[str, Any] = {"radius_A": self.radius_A, "resname": self.resname,
                               "n_copies": int(self.table["molecule"].nunique())}
        out.update({f"{s}_rms_error_eV": v for s, v in self.rms_error_eV.items()})
        return out

    def to_json(self) -> str:
        return json.dumps({"kind": "clusterlab.ConformerSpread", "version": 1, "radius_A": self.radius_A,
                           "resname": self.resname, "method": self.method, "rms_error_eV": self.rms_error_eV,
                           "table": table_to_dict(self.table)})

    @classmethod
    def from_json(cls, text: str) -> "ConformerSpread":
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not a conformer spread.
        """
        d = json_of_kind(text, "clusterlab.ConformerSpread", "a conformer spread")
        return cls(table=table_from_dict(d["table"]), rms_error_eV=dict(d["rms_error_eV"]),
                   radius_A=float(d["radius_A"]), resname=str(d["resname"]), method=dict(d["method"]))


def conformer_spread(
    film: "Film",
    charges: StateChargeSet,
    method: Method,
    *,
    radius_A: float,
    resname: str | None = None,
    n_copies: int = 4,
    frame: int = 0,
    states: Sequence[str] = SHIFT_STATES,
    rule: str = "atom",
    seed: int = 0,
    molecules: Sequence[int] | None = None,
    **fit_kw: Any,
) -> ConformerSpread:
    """Error of reusing reference charges for every conformation, by refitting copies.

    The film model gives each copy the charges of its conformer reference (or
    of the one reference). This refits the state charges of ``n_copies``
    copies of ``resname`` at their own geometries (same method and fit
    options as passed here) and evaluates the first-order shift of each copy
    with its own difference charges in the same environment potential; the
    difference is what the transfer costs.

    Parameters
    ----------
    film, charges : Film, StateChargeSet
    method : clusterlab.Method
        QM method of the refits.
    radius_A, rule : carving semantics of the environment
    resname : str, optional
        Molecule type (default: the set's first).
    n_copies, seed : random copies to refit (``numpy.random.default_rng(seed)``)
    frame : int
    states : sequence of states
    molecules : sequence of int, optional
        Copies to refit instead of a random choice.
    **fit_kw
        Fit-point options passed to ``state_charges`` (as :func:`fit_state_charges`).

    Returns
    -------
    ConformerSpread

    Raises
    ------
    InputError
        ``method`` not a Method, unknown residue name or a bad state.
    """
    require_method(method, "conformer_spread")
    _check_fit_options(fit_kw)
    res = resname if resname is not None else charges.resnames[0]
    names = np.asarray(film.molecule_species)
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
    radius_A = check_radius_A(radius_A)
    geo = film.frame_geometry(frame, periodic=film.has_box)
    want = np.zeros(film.n_molecules, bool)
    want[picks] = True
    q_env = np.asarray(film.charges, dtype=np.float64)
    pot = environment_potential(geo.positions_A, q_env, film.index.atoms, film.index.offsets, geo.centroids_A,
                                geo.box, radius_A, rule=check_rule(rule), want=want).potential_V
    fams = frame_families(film, charges, geo.positions_A) if charges.conformers else None
    rows = []
    for mol in picks:
        atoms = film.molecule_atoms(int(mol))
        sc = state_charges(list(film.symbols[atoms]), geo.positions_A[atoms], method,
                           states=("S0", *states), transition=False, charge=molecule_net_charge(film, int(mol)),
                           **fit_kw)
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
    rms_err = {str(s): float(np.sqrt(np.mean(e**2))) for s, e in out.groupby("state")["error_eV"]}
    return ConformerSpread(table=out, rms_error_eV=rms_err, radius_A=radius_A, resname=str(res),
                           method=method.to_dict())
