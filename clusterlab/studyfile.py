"""Study files: a TOML description of a whole study, validated key by key.

Example (every key optional except ``film.topology``)::

    [film]
    topology = "demo_traj/bithiophene_film.psf"
    trajectory = "demo_traj/bithiophene_film.xtc"

    [method]
    preset = "draft"          # then any Method field, e.g. basis = "6-31g"

    [scan]
    molecule = 0              # or species = "GST": its molecule nearest the box centre
    radii = [6.0, 9.0, 12.0]
    periodic_limit = true
    polarizable_radius = 8.0  # optional: a second scan with Thole dipoles within 8 Å

    [sample]
    molecules = "all"         # or ids "0-99", species "species:GST", a selection "resname GST", a list [0, 5]
    species = "GST"           # optional: only molecules of these species (a name or a list)
    n = 12
    frames = "0-19:5"         # or a list [0, 10]; ranges include both ends
    radius = 12.0             # or "converged": the radius the scan judged converged

    [doped]                   # host:guest films: ΔEST against a donor-acceptor torsion
    torsion = "GST: C12 C13 N3 C20"   # species, colon, four atom names (a list for several species)

    [runner]
    kind = "processes"

    [output]
    store = "study.sqlite"
    report = "report"

Every setting can be overridden on the command line by ``--section-key value``
(e.g. ``--sample-n 20``); see ``clusterlab run --help``.
"""

from __future__ import annotations

import copy
import os
import re
import sys
from dataclasses import dataclass
from typing import Any

from .errors import InputError, StudyFileError
from .ranges import SPECIES_GRAMMAR, is_id_text, parse_frames, parse_ids, parse_radii, parse_species

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


@dataclass(frozen=True)
class Setting:
    """One study-file key: its type(s), default and meaning."""

    types: tuple[type, ...]
    default: Any
    help: str
    choices: tuple[Any, ...] | None = None


def _num(*extra: type) -> tuple[type, ...]:
    return (int, float, *extra)


#: the schema: section -> key -> Setting
SCHEMA: dict[str, dict[str, Setting]] = {
    "film": {
        "topology": Setting((str,), None, "topology file (any format MDAnalysis reads); required"),
        "trajectory": Setting((str, list), None, "trajectory file or list of files (optional)"),
        "charges": Setting((str,), None, "CSV charge table (resname,name,charge) instead of topology charges"),
    },
    "method": {
        "preset": Setting((str,), "draft", "method preset to start from (see `clusterlab presets`)"),
        "xc": Setting((str,), None, "exchange-correlation functional (overrides the preset)"),
        "basis": Setting((str,), None, "basis set (overrides the preset)"),
        "excited": Setting((str,), None, "excited-state model", ("tda", "tddft", "stda", "stda-refined")),
        "n_singlets": Setting((int,), None, "number of singlet states"),
        "n_triplets": Setting((int,), None, "number of triplet states"),
        "charged_states": Setting((bool,), None, "also compute IP/EA by ΔSCF"),
        "density_fit": Setting((bool,), None, "density fitting on/off"),
        "grid_level": Setting((int,), None, "DFT integration grid level of the SCF (0-9)"),
        "charge_smearing_A": Setting(_num(), None, "Gaussian width of the environment charges (Å; 0 = point charges)"),
        "threads": Setting((int,), None, "OpenMP threads per calculation"),
    },
    "scan": {
        "molecule": Setting((int,), None, "molecule id of a radius scan (omit the section to skip the scan)"),
        "species": Setting((str,), None, "species of the scanned molecule: without 'molecule', the molecule of "
                                         "this species nearest the box centre"),
        "radii": Setting((list, str), [6.0, 9.0, 12.0, 15.0], "cut radii of the scan (Å): a list or a text "
                                                             "such as '6-15:3' (ends included)"),
        "frame": Setting((int,), 0, "frame of the scan"),
        "rule": Setting((str,), "atom", "carving rule", ("atom", "centroid")),
        "qm_shell": Setting(_num(), 0.0, "QM shell (Å): whole neighbours this close join the QM region"),
        "periodic_limit": Setting((bool,), False, "end the scan with the periodic (Ewald) embedding"),
        "polarizable_radius": Setting(_num(), None, "also scan the same molecule and radii with a polarizable "
                                                    "inner layer: Thole dipoles on the molecules within this "
                                                    "radius (Å; environment 'polarizable'), beside the study "
                                                    "method's fixed-charge scan that keeps the periodic limit"),
        "tol_eV": Setting(_num(), 0.010, "convergence tolerance (eV)"),
    },
    "sample": {
        "molecules": Setting((str, list), "all", "'all', ids such as '0-99, 120' (ends included), species such "
                                                 "as 'species:GST', an MDAnalysis selection string, or a list of ids"),
        "species": Setting((str, list), None, "only molecules of these species (a name or a list of names), e.g. "
                                              "'GST' for a guest-only sample of a doped film"),
        "n": Setting((int,), None, "random sub-sample size (omit for all selected)"),
        "seed": Setting((int,), 0, "random seed of the sub-sample"),
        "frames": Setting((int, list, str), None, "frame, list of frames or a text such as '0-19:5' (ends "
                                                  "included; -1 is the last frame); omit for all"),
        "radius": Setting(_num(list, str), 12.0, "cut radius (Å), or a list or text such as '6-12:3' for the "
                                                 "growth of the statistics, or 'converged': the radius the "
                                                 "[scan] judged converged (its largest radius if none)"),
        "rule": Setting((str,), "atom", "carving rule", ("atom", "centroid")),
        "quantities": Setting((list,), ["S1_eV", "T1_eV", "S1_shift_eV"], "columns to report statistics for"),
    },
    "model": {
        "radius": Setting(_num(), 15.0, "cut radius of the film-wide electrostatic model (Å)"),
        "frames": Setting((int, list, str), None, "frames of the film-wide model: a list or a text such as "
                                                  "'0-19:5' (omit for all)"),
        "polarization": Setting((bool,), False, "add Thole induced-dipole polarization (charged states)"),
        "polarize_molecules": Setting((list, str), None, "molecule ids to polarize, a list or a text such as "
                                                         "'0-9' (default all; seconds each)"),
        "polarizable_radius": Setting(_num(), None, "only environment molecules this close (Å, carving's rule) "
                                                    "carry induced dipoles (default: all within the radius)"),
        "polarization_scale": Setting(_num(), 1.0, "explicit calibration factor on the polarization energies "
                                                   "(1 = none; README: parity against polarizable QM)"),
        "reference_molecule": Setting((int,), 0, "molecule whose geometry the state charges are fitted on"),
        "species": Setting((str, list), None, "species to fit state charges for, each on its own reference "
                                              "(default: every species of the film)"),
        "charges_method": Setting((str,), None, "'xc/basis' of the state-charge fit and finite fields (the study "
                                                "method with this xc and basis; default: the study method)"),
        "n_conformers": Setting((int,), 1, "conformer references per molecule type (one QM fit each)"),
        "response": Setting((bool,), False, "S1 from the finite-field response -Δμ·F - ½F·Δα·F (25 QM runs "
                                            "per reference) instead of first-order charges"),
    },
    "export": {
        "cutoff_A": Setting(_num(), 8.0, "neighbour-pair cutoff (Å)"),
        "criterion": Setting((str,), "centroid", "pair distance criterion", ("centroid", "atom")),
        "folder": Setting((str,), "export", "export folder (inside the report folder when relative)"),
    },
    "doped": {
        "torsion": Setting((str, list), None, "donor-acceptor torsion of a species for ΔEST against the torsion: "
                                              "'SPECIES: A B C D' with four atom names of the molecule (e.g. "
                                              "'GST: C12 C13 N3 C20'), or a list of such texts, one per species"),
        "neighbour_cutoff_A": Setting(_num(), None, "host-neighbour distance of the triplet confinement (Å, "
                                                    "centroids; default 9, capped below half the box width)"),
    },
    "runner": {
        "kind": Setting((str,), "processes", "runner", ("serial", "processes", "dask")),
        "workers": Setting((int,), None, "worker processes (default: one per core)"),
        "threads_per_worker": Setting((int,), None, "OpenMP threads per worker (default 1)"),
        "scheduler": Setting((str,), None, "Dask scheduler address (runner kind 'dask')"),
    },
    "output": {
        "store": Setting((str,), "study.sqlite", "result store (SQLite file, one per study)"),
        "report": Setting((str,), "report", "report folder (plots as PNG, summary.md)"),
    },
}


def defaults() -> dict[str, dict[str, Any]]:
    return {sec: {k: copy.deepcopy(s.default) for k, s in keys.items()} for sec, keys in SCHEMA.items()}


def _check_value(section: str, key: str, value: Any, where: str) -> Any:
    s = SCHEMA[section][key]
    if value is None:
        return None
    ok = isinstance(value, s.types) and not (isinstance(value, bool) and bool not in s.types)
    if not ok and float in s.types and isinstance(value, int) and not isinstance(value, bool):
        ok = True
    if not ok:
        names = " or ".join(t.__name__ for t in s.types)
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} has the wrong type; expected {names} "
                             f"({s.help}).")
    if s.choices is not None and value not in s.choices:
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} is not valid; use one of "
                             f"{', '.join(map(repr, s.choices))}.")
    if key in ("radii",) and isinstance(value, list) and (
            not value or not all(isinstance(r, (int, float)) and r > 0 for r in value)):
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} must be a non-empty list of positive radii (Å).")
    if (section, key) in _POSITIVE_INTS and value < 1:
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} must be a positive integer ({s.help}).")
    if key == "quantities":
        _check_quantity_names(value, where)
    if key == "charges_method":
        try:
            xc_basis(value)
        except StudyFileError as exc:
            raise StudyFileError(f"{where}: [{section}] {key} = {value!r}: {exc}") from None
    if key == "polarizable_radius" and not value > 0:
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} must be a positive radius (Å).")
    if key == "radius" and isinstance(value, list) and not all(isinstance(r, (int, float)) and r > 0 for r in value):
        raise StudyFileError(f"{where}: [{section}] {key} = {value!r} must hold positive radii (Å).")
    try:
        return _read_ranges(section, key, value)
    except InputError as exc:
        raise StudyFileError(f"{where}: [{section}] {key}: {exc}") from exc


#: integer keys that must be >= 1 (0 workers is not "all cores": omit the key for that)
_POSITIVE_INTS = {("runner", "workers"), ("runner", "threads_per_worker"), ("sample", "n"),
                  ("model", "n_conformers"), ("method", "threads")}

#: a reported quantity: a state's energy, shift, vacuum energy or oscillator strength, or dEST
_QUANTITY = re.compile(r"^(?:(?P<state>[ST])(?P<n>[1-9][0-9]*)_(?:eV|shift_eV|vacuum_eV|followed_shift_eV|osc)"
                       r"|(?:IP|EA)_(?:eV|shift_eV|vacuum_eV)|dEST_eV)$")


def _check_quantity_names(value: list, where: str) -> None:
    bad = [q for q in value if not (isinstance(q, str) and _QUANTITY.match(q))]
    if bad or not value:
        raise StudyFileError(f"{where}: [sample] quantities = {value!r}: {bad[0] if bad else 'an empty list'!r} "
                             "is not a site-energy column; use e.g. 'S1_eV', 'T1_shift_eV', 'S2_vacuum_eV', "
                             "'IP_eV', 'EA_shift_eV' or 'dEST_eV'.")


def _check_quantity_states(study: dict[str, Any], where: str) -> None:
    """Each Sn / Tn quantity must be a state the study's method computes."""
    method = method_from_study(study)
    n_of = {"S": method.n_singlets, "T": method.n_triplets}
    for q in study["sample"]["quantities"]:
        m = _QUANTITY.match(q)
        if m and m["state"] and int(m["n"]) > n_of[m["state"]]:
            raise StudyFileError(f"{where}: [sample] quantities holds {q!r}, but the method computes "
                                 f"{n_of[m['state']]} {'singlet' if m['state'] == 'S' else 'triplet'} state(s) "
                                 f"({method.describe()}); raise [method] n_{'singlets' if m['state'] == 'S' else 'triplets'} "
                                 "or drop it.")
        if q[:2] in ("IP", "EA") and not method.charged_states:
            raise StudyFileError(f"{where}: [sample] quantities holds {q!r}, but the method computes no charged "
                                 "states; set [method] charged_states = true or drop it.")


#: ``[sample] radius = "converged"``: the radius the study's own scan judged converged
CONVERGED = "converged"


def _read_ranges(section: str, key: str, value: Any) -> Any:
    """Radii, frames and molecule ids written in the grammar of
    :mod:`clusterlab.ranges` (or as TOML lists) as plain lists. The film is
    not loaded yet: ids and frames are bounded later, negative frames stay
    negative (counted from the end by the film) and ``"all"`` means None
    (every frame / molecule)."""
    if section == "sample" and key == "radius" and isinstance(value, str) and value.strip().lower() == CONVERGED:
        return CONVERGED
    if key == "radii" or (key == "radius" and isinstance(value, (list, str))):
        radii = parse_radii(value)
        return radii[0] if key == "radius" and isinstance(value, str) and len(radii) == 1 else radii
    if key == "frames" and isinstance(value, (list, str)):
        return None if _is_all(value) else parse_frames(value, None)
    if key == "molecules" and isinstance(value, list):
        return parse_ids(value, None).tolist()
    if key == "molecules" and is_id_text(value) and not _is_all(value):
        return parse_ids(value, None).tolist()
    if key == "molecules":
        parse_species(value)  # a species text is checked here; the film checks the names later
    if key == "species":
        names = [value] if isinstance(value, str) else value
        if not names or not all(isinstance(n, str) and n.strip() and not re.search(r"[\s,]", n.strip())
                                for n in names):
            raise InputError(f"species {value!r} must be a species name or a list of names (no spaces or "
                             f"commas inside a name). {SPECIES_GRAMMAR}")
        return value.strip() if isinstance(value, str) else [n.strip() for n in names]
    if key == "torsion":
        return parse_torsion_names(value)
    if key == "neighbour_cutoff_A" and not value > 0:
        raise InputError(f"{value!r} must be a positive distance (Å).")
    if key == "polarize_molecules":
        return None if _is_all(value) else parse_ids(value, None).tolist()
    return value


#: the grammar of a torsion named by atom names, for messages
TORSION_GRAMMAR = ("write a torsion as 'SPECIES: A B C D' (the species, a colon, four different atom names of "
                   "the molecule separated by spaces), e.g. 'GST: C12 C13 N3 C20', or a list of such texts")


def parse_torsion_names(value: str | list[str]) -> dict[str, list[str]]:
    """``{species: [four atom names]}`` of a torsion text ``"GST: C12 C13 N3 C20"``
    (or a list of such texts, one species each). Whether the names exist is
    checked against the film later
    (:func:`clusterlab.study.doped.torsion_atom_indices`).

    Raises
    ------
    InputError
        Anything but a species, one colon and four different names; a species
        named twice.
    """
    texts = [value] if isinstance(value, str) else value
    if not isinstance(texts, list) or not texts:
        raise InputError(f"torsion {value!r}: {TORSION_GRAMMAR}.")
    out: dict[str, list[str]] = {}
    for text in texts:
        if not isinstance(text, str):
            raise InputError(f"torsion {text!r} is not text; {TORSION_GRAMMAR}.")
        sp, colon, rest = text.partition(":")
        names = rest.replace(",", " ").split()
        if not colon or not sp.strip() or re.search(r"\s", sp.strip()):
            raise InputError(f"torsion {text!r} does not start with a species name and a colon; {TORSION_GRAMMAR}.")
        if len(names) != 4 or len(set(names)) != 4:
            raise InputError(f"torsion {text!r} names {len(names)} atom(s){' (one twice)' if len(names) == 4 else ''}; "
                             f"{TORSION_GRAMMAR}.")
        if sp.strip() in out:
            raise InputError(f"torsion: species {sp.strip()!r} is named twice; give one torsion per species.")
        out[sp.strip()] = names
    return out


def _is_all(value: Any) -> bool:
    return isinstance(value, str) and value.strip().lower() == "all"


def xc_basis(text: str) -> tuple[str, str]:
    """``(xc, basis)`` of an ``"xc/basis"`` setting such as ``[model] charges_method``
    (``"hf/..."`` means Hartree-Fock).

    Raises
    ------
    StudyFileError
        Anything but two non-empty names around one ``/``.
    """
    xc, sep, basis = str(text).partition("/")
    if not sep or not xc.strip() or not basis.strip() or "/" in basis:
        raise StudyFileError(f"{text!r} is not a method description; use 'xc/basis', e.g. 'b3lyp/6-31g'.")
    return xc.strip(), basis.strip()


def validate(data: dict[str, Any], where: str = "study") -> dict[str, dict[str, Any]]:
    """Check a parsed study against :data:`SCHEMA`; return it with defaults filled in.

    Raises
    ------
    StudyFileError
        Unknown section or key, wrong type or value, missing film topology.
    """
    out = defaults()
    present: set[str] = set()
    for section, body in data.items():
        if section not in SCHEMA:
            raise StudyFileError(f"{where}: unknown section [{section}]; valid sections are "
                                 f"{', '.join('[' + s + ']' for s in SCHEMA)}.")
        if not isinstance(body, dict):
            raise StudyFileError(f"{where}: [{section}] must be a table of keys, got {body!r}.")
        present.add(section)
        for key, value in body.items():
            if key not in SCHEMA[section]:
                raise StudyFileError(f"{where}: unknown key {key!r} in [{section}]; valid keys are "
                                     f"{', '.join(SCHEMA[section])}.")
            out[section][key] = _check_value(section, key, value, where)
    if not out["film"]["topology"]:
        raise StudyFileError(f"{where}: [film] topology is required (the film's topology file).")
    if "sample" in present:
        _check_quantity_states(out, where)
        if out["sample"]["radius"] == CONVERGED and not ("scan" in present and (
                out["scan"]["molecule"] is not None or out["scan"]["species"])):
            raise StudyFileError(f"{where}: [sample] radius = 'converged' takes the radius from the study's radius "
                                 "scan, but there is none; add a [scan] section with a molecule or species, or "
                                 "give the radius in Å.")
    out["_present"] = sorted(present)  # type: ignore[assignment]
    return out


def load_study(path: str | os.PathLike[str],
               overrides: dict[tuple[str, str], Any] | None = None) -> dict[str, dict[str, Any]]:
    """Read and validate a TOML study file, after applying ``overrides``
    (``{(section, key): value}``, e.g. from command-line flags). Relative
    film paths are taken relative to the study file's folder.

    Raises
    ------
    StudyFileError
        Missing or invalid file, or any key that :func:`validate` rejects.
    """
    p = os.fspath(path)
    try:
        with open(p, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError as exc:
        raise StudyFileError(f"Study file {p!r} not found.") from exc
    except tomllib.TOMLDecodeError as exc:
        raise StudyFileError(f"Study file {p!r} is not valid TOML: {exc}") from exc
    for (section, key), value in (overrides or {}).items():
        data.setdefault(section, {})[key] = value
    study = validate(data, where=p)
    base = os.path.dirname(os.path.abspath(p))

    def rel(x: str) -> str:
        return x if os.path.isabs(x) else os.path.normpath(os.path.join(base, x))

    f = study["film"]
    f["topology"] = rel(f["topology"])
    if isinstance(f["trajectory"], str):
        f["trajectory"] = rel(f["trajectory"])
    elif isinstance(f["trajectory"], list):
        f["trajectory"] = [rel(t) for t in f["trajectory"]]
    if f["charges"]:
        f["charges"] = rel(f["charges"])
    return study


def parse_override(section: str, key: str, text: str) -> Any:
    """Turn a command-line string into the type the schema wants (TOML syntax
    for lists and booleans: ``--scan-radii "[6, 9, 12]"``, ``--scan-periodic_limit true``)."""
    s = SCHEMA[section][key]
    if str in s.types and not text.strip().startswith("["):
        return text
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        if str in s.types:
            return text
        raise StudyFileError(f"--{section}-{key} {text!r}: cannot read it as {'/'.join(t.__name__ for t in s.types)}.")


def method_from_study(study: dict[str, dict[str, Any]]):
    """The :class:`~clusterlab.Method` a study asks for."""
    from .qm.method import Method

    m = dict(study["method"])
    preset = m.pop("preset") or "draft"
    over = {k: v for k, v in m.items() if v is not None}
    try:
        return Method.preset(preset, **over)
    except Exception as exc:  # noqa: BLE001 - re-raised with the key named
        raise StudyFileError(f"[method]: {exc}") from exc
