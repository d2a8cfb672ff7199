"""Film loading: an MDAnalysis Universe seen as molecules with charges.

:func:`load_film` reads any topology/trajectory pair MDAnalysis reads.
Molecules are the Universe's bonded **fragments** when the topology has
bonds, otherwise its **residues** (one molecule per residue); where the two
disagree a :class:`~clusterlab.errors.MoleculeBoundaryWarning` names the
residues. A topology without atom or residue names (a LAMMPS data file, for
one) gets them from the elements: atoms are named by element and number
within their residue (``C1``, ``H3``), and each molecule's residue name is its
Hill formula (``C8H6S2``).
"""

from __future__ import annotations

import hashlib
import logging
import os
import re
import warnings
from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property
from typing import Any, Sequence

import MDAnalysis as mda
import numpy as np
import numpy.typing as npt
import pandas as pd

from .carve import MoleculeIndex, select_images
from .charges import ChargeSource, as_charge_source, species_without_charges
from .cluster import Cluster
from .errors import CarvingError, ChargeError, FilmError, InputError, MoleculeBoundaryWarning
from .geometry import box_vectors, half_box_width_A, make_whole, minimum_image, perpendicular_widths, wrap_molecules
from .ranges import parse_species

_log = logging.getLogger(__name__)

FloatArray = npt.NDArray[np.float64]

#: element symbols MDAnalysis knows masses for (title case)
try:
    from MDAnalysis.guesser.tables import masses as _MASSES
except ImportError:  # pragma: no cover - older MDAnalysis
    from MDAnalysis.topology.tables import masses as _MASSES

_KNOWN = {k.title(): v for k, v in _MASSES.items() if re.fullmatch(r"[A-Za-z]{1,2}", k)}
_KNOWN.pop("Du", None)

#: net molecular charges must be integers within this tolerance (e)
CHARGE_INTEGER_TOL = 1e-3

#: the most environment point charges one carve may hold (about 80 bytes each
#: while carving: positions, images, charges, symbols); a larger radius is refused
MAX_CLUSTER_CHARGES = 20_000_000


def _hash_file(path: str, h: "hashlib._Hash") -> None:
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)


def _element_from_mass(mass: float) -> str | None:
    if not np.isfinite(mass) or mass <= 0:
        return None
    sym, ref = min(_KNOWN.items(), key=lambda kv: abs(kv[1] - mass))
    return sym if abs(ref - mass) < 0.6 else None


def hill_formula(symbols: Sequence[str]) -> str:
    """Hill formula of a set of element symbols: C, then H, then the rest
    alphabetically (all alphabetically when there is no carbon); a count of
    one is not written.

    >>> hill_formula(["S", "C", "H", "C", "H"])
    'C2H2S'
    >>> hill_formula(["O", "H", "H"])
    'H2O'
    """
    els, cnt = np.unique(np.asarray(symbols, dtype=str), return_counts=True)
    d = dict(zip(els.tolist(), cnt.tolist()))
    lead = [k for k in ("C", "H") if k in d] if "C" in d else []
    order = lead + sorted(k for k in d if k not in lead)
    return "".join(f"{k}{d[k] if d[k] > 1 else ''}" for k in order)


def _text_attr(atoms: Any, attr: str) -> npt.NDArray[np.str_] | None:
    """A per-atom text attribute (``names``, ``resnames``, ``types``) as str,
    or None when the topology does not have it or has only empty values."""
    if not hasattr(atoms, attr):
        return None
    values = np.char.strip(np.asarray(getattr(atoms, attr)).astype(str))
    return values if bool(np.any(values != "")) else None


def _guess_from_name(name: str) -> str | None:
    from MDAnalysis.guesser.default_guesser import DefaultGuesser

    try:
        sym = DefaultGuesser(None).guess_atom_element(name)
    except Exception:  # noqa: BLE001 - guesser raises various things
        return None
    sym = str(sym).title()
    return sym if sym in _KNOWN else None


class GuessedElementsWarning(UserWarning):
    """Warned, in one line, when a topology does not give the elements of
    its atoms and they are guessed from atom names or masses. The line
    gives the count and the rule; every guessed atom is in
    :attr:`Film.guessed_elements`, and one line per residue name, atom name
    and element goes to the ``clusterlab.film`` logger at DEBUG level."""


def guessed_elements_line(table: pd.DataFrame, n_atoms: int, topology: str) -> str:
    """The one line that says how many elements were guessed, and by which rule.

    ``table`` is :attr:`Film.guessed_elements` (``guessed_from``: ``name`` or
    ``mass``)."""
    how = table["guessed_from"].value_counts()
    parts = []
    if how.get("name", 0):
        parts.append(f"{int(how['name'])} from the atom name (where a mass is given it agrees)")
    if how.get("mass", 0):
        parts.append(f"{int(how['mass'])} from the mass (the name gave no element, or another one)")
    return (f"{topology}: elements guessed for {len(table)} of {n_atoms} atoms, " + " and ".join(parts)
            + "; per atom in Film.guessed_elements, per atom name at DEBUG level of the 'clusterlab.film' logger")


class MixedSpeciesWarning(UserWarning):
    """Warned when one residue holds molecules (bonded fragments) of
    different compositions: they all carry the residue's species name."""


@dataclass(frozen=True)
class FrameGeometry:
    """One frame with whole molecules whose centroids lie in the primary cell."""

    frame: int
    positions_A: FloatArray
    centroids_A: FloatArray
    box: FloatArray | None


class Film:
    """A molecular film: Universe + molecules + charges.

    Do not build directly; use :func:`load_film`.

    Attributes
    ----------
    universe : MDAnalysis.Universe
    molecules : pandas.DataFrame
        One row per molecule: ``molecule`` (0-based id), ``resname``,
        ``resid``, ``n_atoms``, ``charge`` (net, e; NaN when no charges are
        available), ``formula`` (Hill order), ``species`` (str: the molecular
        species, today the residue name; see :attr:`species`).
    molecule_species : ndarray of str, (n_molecules,)
        The ``species`` column as an array.
    molecule_kind : {"fragments", "residues"}
        How molecules were defined.
    symbols : ndarray of str, (n_atoms,)
        Element symbol of every atom.
    guessed_elements : pandas.DataFrame
        Atoms whose element was guessed (from name or mass), with the reason.
    """

    def __init__(self, universe: mda.Universe, topology_path: str, trajectory_paths: list[str],
                 charge_source: ChargeSource, *, cache_frames: int = 2):
        self.universe = universe
        self.topology_path = topology_path
        self.trajectory_paths = trajectory_paths
        self.charge_source = charge_source
        self._frame_cache: OrderedDict[int, FrameGeometry] = OrderedDict()
        self._cache_frames = cache_frames
        self._charges: FloatArray | None = None
        self._charge_error: ChargeError | None = None

        atoms = universe.atoms
        has_bonds = hasattr(atoms, "bonds") and len(atoms.bonds) > 0
        #: (n_bonds, 2) atom indices, read once (MDAnalysis builds bond groups slowly)
        self._bond_index = (np.asarray(atoms.bonds.indices, dtype=np.int64) if has_bonds
                            else np.zeros((0, 2), dtype=np.int64))
        if has_bonds:
            groups = list(atoms.fragments)
            self.molecule_kind = "fragments"
            mol_of_atom = np.empty(len(atoms), dtype=np.int64)
            # order fragments by their lowest atom index so ids are stable
            groups.sort(key=lambda g: int(g.indices.min()))
            for i, g in enumerate(groups):
                mol_of_atom[g.indices] = i
        else:
            self.molecule_kind = "residues"
            mol_of_atom = np.asarray(atoms.resindices, dtype=np.int64)
        self.molecule_of_atom = mol_of_atom
        self.index = MoleculeIndex.from_molecule_of_atom(mol_of_atom)
        first = self.index.atoms[self.index.offsets[:-1]]
        self.symbols, self.guessed_elements = self._resolve_elements()
        #: residue name of each molecule (of its first atom; its Hill formula
        #: when the topology has no residue names)
        self.molecule_resnames = (
            np.array([hill_formula(self.symbols[self.index.of(i)]) for i in range(self.n_molecules)], dtype=str)
            if self._name_unnamed() else np.asarray(atoms.resnames).astype(str)[first])
        #: species of each molecule: its residue name (the Hill formula when
        #: the topology has no residue names)
        self.molecule_species = self.molecule_resnames.copy()
        self.molecules = self._molecule_table()
        self._warn_mixed_residues()
        if has_bonds:
            self._warn_boundaries()

    # ------------------------------------------------------------ basic facts
    @property
    def n_atoms(self) -> int:
        return len(self.universe.atoms)

    @property
    def n_frames(self) -> int:
        return len(self.universe.trajectory)

    @property
    def n_molecules(self) -> int:
        return self.index.n_molecules

    @property
    def bonds(self) -> npt.NDArray[np.int64]:
        """Bonded atom pairs, shape (n_bonds, 2), 0-based atom indices (empty
        (0, 2) when the topology has no bonds). A read-only view."""
        view = self._bond_index.view()
        view.flags.writeable = False
        return view

    @property
    def has_box(self) -> bool:
        dims = self.universe.dimensions
        return dims is not None and bool(np.all(np.asarray(dims[:3]) > 0))

    def molecule_atoms(self, molecule: int) -> npt.NDArray[np.int64]:
        """Atom indices (0-based, ascending) of one molecule."""
        self.check_molecule(molecule)
        return self.index.of(int(molecule))

    def check_molecule(self, molecule: Any) -> int:
        """``molecule`` as an int after checking it is a valid molecule id.

        Raises
        ------
        CarvingError
            Not an integer, or outside ``0..n_molecules-1``.
        """
        if isinstance(molecule, (bool, np.bool_)) or not isinstance(molecule, (int, np.integer)):
            raise CarvingError(f"molecule must be an integer id; got {molecule!r}.")
        if not (0 <= int(molecule) < self.n_molecules):
            raise CarvingError(
                f"molecule {int(molecule)} does not exist in {self.topology_path!r}; "
                f"valid ids are 0..{self.n_molecules - 1}."
            )
        return int(molecule)

    def check_frame(self, frame: Any) -> int:
        """``frame`` as a non-negative int (negative counts from the end)
        after checking it exists.

        Raises
        ------
        CarvingError
            Not an integer, or out of range.
        """
        if isinstance(frame, (bool, np.bool_)) or not isinstance(frame, (int, np.integer)):
            raise CarvingError(f"frame must be an integer; got {frame!r}.")
        f = int(frame)
        if f < 0:
            f += self.n_frames
        if not (0 <= f < self.n_frames):
            raise CarvingError(f"frame {frame} is out of range; the film has {self.n_frames} frame(s).")
        return f

    @cached_property
    def film_id(self) -> str:
        """Content hash of topology, trajectory files and the charge source."""
        h = hashlib.sha256()
        paths = [p for p in [self.topology_path, *self.trajectory_paths] if p and os.path.isfile(p)]
        if paths:
            for p in paths:
                _hash_file(p, h)
        else:  # an in-memory Universe: hash what defines it
            atoms = self.universe.atoms
            h.update("|".join(np.asarray(atoms.names).astype(str)).encode())
            h.update("|".join(np.asarray(atoms.resnames).astype(str)).encode())
            for ts in self.universe.trajectory:
                h.update(np.asarray(ts.positions, dtype="<f4").tobytes())
                if ts.dimensions is not None:
                    h.update(np.asarray(ts.dimensions, dtype="<f4").tobytes())
            self.universe.trajectory[0]
        try:  # the charges themselves, so equal charges from any source give one id
            h.update(np.round(self.charges, 6).astype("<f8").tobytes())
        except ChargeError:
            h.update(self.charge_source.fingerprint().encode())
        return h.hexdigest()[:20]

    def __repr__(self) -> str:
        return (f"<Film {os.path.basename(self.topology_path)}: {self.n_molecules} molecules "
                f"({self.molecule_kind}), {self.n_atoms} atoms, {self.n_frames} frame(s)>")

    def spec(self) -> dict[str, Any]:
        """A small JSON-able description from which :func:`film_from_spec`
        rebuilds this film in a worker process (paths + charge source)."""
        return {
            "topology": os.path.abspath(self.topology_path) if os.path.isfile(self.topology_path) else self.topology_path,
            "trajectory": [os.path.abspath(t) for t in self.trajectory_paths],
            "charges": self.charge_source.to_spec(),
            "film_id": self.film_id,
        }

    def describe(self) -> str:
        """A short human-readable summary (used by the CLI)."""
        lines = [repr(self)]
        if self.has_box:
            b = self.universe.dimensions
            lines.append("box: {:.2f} x {:.2f} x {:.2f} Å, angles {:.1f} {:.1f} {:.1f}°".format(*b))
        else:
            lines.append("box: none (only non-periodic carving is possible)")
        species = self.molecules.groupby(["species", "formula"], sort=False).size()
        for (name, formula), n in species.items():
            lines.append(f"  {n:6d} x {name} ({formula})")
        lines.append(f"charges: {self.charge_source.describe()}"
                     + ("" if self.charges_available else " - NOT AVAILABLE"))
        if len(self.guessed_elements):
            lines.append(f"elements guessed for {len(self.guessed_elements)} atom(s)")
        return "\n".join(lines)

    # ------------------------------------------------------------- elements
    def _resolve_elements(self) -> tuple[np.ndarray, pd.DataFrame]:
        atoms = self.universe.atoms
        n = len(atoms)
        syms = np.array([""] * n, dtype=object)
        if hasattr(atoms, "elements"):
            raw = np.asarray(atoms.elements).astype(str)
            for i, e in enumerate(raw):
                e2 = e.strip().title()
                if e2 in _KNOWN:
                    syms[i] = e2
        types = _text_attr(atoms, "types")
        names = _text_attr(atoms, "names")
        names = names if names is not None else (types if types is not None else np.full(n, "", dtype=str))
        types = types if types is not None else names
        resnames = _text_attr(atoms, "resnames")
        resnames = resnames if resnames is not None else np.full(n, "", dtype=str)
        masses = np.asarray(atoms.masses, dtype=float) if hasattr(atoms, "masses") else np.full(n, np.nan)
        guessed = []
        todo = np.flatnonzero(syms == "")
        cache: dict[tuple[str, str, float], tuple[str | None, str]] = {}
        for i in todo:
            key = (names[i], types[i], round(float(masses[i]), 2) if np.isfinite(masses[i]) else -1.0)
            if key not in cache:
                sym, how = None, ""
                by_mass = _element_from_mass(masses[i])
                by_name = _guess_from_name(names[i]) or _guess_from_name(types[i])
                if by_name and (by_mass is None or by_mass == by_name):
                    sym, how = by_name, "name"
                elif by_mass:
                    sym, how = by_mass, "mass"
                cache[key] = (sym, how)
            sym, how = cache[key]
            if sym is None:
                continue
            syms[i] = sym
            guessed.append((int(i), names[i], str(resnames[i]), sym, how))
        unknown = np.flatnonzero(syms == "")
        if unknown.size:
            ex = ", ".join(f"atom {i} (name {names[i]!r}, resname {resnames[i]!r})" for i in unknown[:5])
            raise FilmError(
                f"Cannot determine the element of {unknown.size} atom(s) in {self.topology_path!r}: "
                f"{ex}. Give the topology element or mass columns, or standard atom names."
            )
        table = pd.DataFrame(guessed, columns=["atom", "name", "resname", "element", "guessed_from"])
        if len(table):
            warnings.warn(guessed_elements_line(table, n, self.topology_path), GuessedElementsWarning, stacklevel=4)
            groups = table.groupby(["resname", "name", "element", "guessed_from"]).size()
            for (r, nm, e, how), k in groups.items():
                _log.debug("%s: %s:%s -> %s (by %s, %d atoms)", self.topology_path, r, nm, e, how, k)
        return syms.astype(str), table

    def _name_unnamed(self) -> bool:
        """Give a topology without atom or residue names names made from its
        elements (LAMMPS data files have neither): atoms their element and
        number within the residue (``O1``, ``H1``, ``H2``), residues the Hill
        formula of their atoms, so that a molecule's ``resname`` (and the
        species derived from it) is its composition, ``C8H6S2``. Charge tables
        (resname, name, charge) and selections (``resname H2O``) then work as
        for any other topology. Names the topology has are kept. Returns
        whether residue names were made."""
        u = self.universe
        atoms = u.atoms
        if _text_attr(atoms, "names") is None:
            resindex = np.asarray(atoms.resindices)
            names = np.empty(len(atoms), dtype=object)
            seen: dict[tuple[int, str], int] = {}
            for i, (r, sym) in enumerate(zip(resindex.tolist(), self.symbols.tolist())):
                seen[(r, sym)] = k = seen.get((r, sym), 0) + 1
                names[i] = f"{sym}{k}"
            if hasattr(atoms, "names"):
                atoms.names = names
            else:
                u.add_TopologyAttr("names", names)
        if _text_attr(atoms, "resnames") is None:
            resindex = np.asarray(atoms.resindices)
            order = np.argsort(resindex, kind="stable")
            bounds = np.searchsorted(resindex[order], np.arange(len(u.residues) + 1))
            formulas = np.array([hill_formula(self.symbols[order[a:b]]) for a, b in zip(bounds[:-1], bounds[1:])],
                                dtype=object)
            if hasattr(atoms, "resnames"):
                u.residues.resnames = formulas
            else:
                u.add_TopologyAttr("resnames", formulas)
            return True
        return False

    def _warn_boundaries(self) -> None:
        """Warn where bonded fragments (the molecules) and residues disagree:
        a residue of several fragments (a missing bond, or residues numbered
        per chain instead of per molecule) or a fragment over several residues
        (a stray bond fusing two molecules, or a polymer written residue by
        residue). A topology with a single residue says nothing about
        molecules and is not warned about."""
        resindex = np.asarray(self.universe.atoms.resindices, dtype=np.int64)
        if len(self.universe.residues) < 2:
            return
        pairs = np.unique(np.stack([resindex, self.molecule_of_atom], axis=1), axis=0)
        res_ids, n_frag = np.unique(pairs[:, 0], return_counts=True)
        mol_ids, n_res = np.unique(pairs[:, 1], return_counts=True)
        split = res_ids[n_frag > 1]
        fused = mol_ids[n_res > 1]
        if not split.size and not fused.size:
            return
        residues = self.universe.residues
        label = lambda r: f"{residues[r].resname} {residues[r].resid}"  # noqa: E731
        parts = []
        if split.size:
            ex = "; ".join(f"residue {label(r)} is {int((pairs[:, 0] == r).sum())} fragments (molecules "
                           f"{pairs[pairs[:, 0] == r, 1].tolist()[:6]})" for r in split[:5])
            parts.append(f"{split.size} residue(s) made of several bonded fragments: {ex}"
                         + (" ..." if split.size > 5 else ""))
        if fused.size:
            ex = "; ".join(f"molecule {m} spans residues "
                           + ", ".join(label(r) for r in pairs[pairs[:, 1] == m, 0][:6]) for m in fused[:5])
            parts.append(f"{fused.size} bonded fragment(s) spread over several residues: {ex}"
                         + (" ..." if fused.size > 5 else ""))
        warnings.warn(
            f"{self.topology_path}: bonds and residues disagree; molecules are the bonded fragments. "
            + ". ".join(parts) + ". Check the bonds and the residue numbering if these should be one molecule "
            "per residue.", MoleculeBoundaryWarning, stacklevel=4)

    # ----------------------------------------------------------- molecules
    def _molecule_table(self) -> pd.DataFrame:
        atoms = self.universe.atoms
        n_mol = self.n_molecules
        first = self.index.atoms[self.index.offsets[:-1]]
        resnames = self.molecule_resnames
        resids = (np.asarray(atoms.resids) if hasattr(atoms, "resids") else np.asarray(atoms.resindices) + 1)[first]
        formulas = [hill_formula(self.symbols[self.index.of(i)]) for i in range(n_mol)]
        try:  # raw source charges, so non-integer molecules show up in the table
            q = np.asarray(self.charge_source.atom_charges(self), dtype=np.float64)
            net = np.bincount(self.molecule_of_atom, weights=q, minlength=n_mol)
        except ChargeError:
            net = np.full(n_mol, np.nan)
        return pd.DataFrame({
            "molecule": np.arange(n_mol), "resname": resnames, "resid": resids,
            "n_atoms": self.index.sizes(), "charge": net, "formula": formulas,
            "species": self.molecule_species,
        })

    # ------------------------------------------------------------- species
    @property
    def species(self) -> pd.Series:
        """Molecule count of each species, in the order species first appear
        among the molecules (index: species name, str).

        >>> film.species  # doctest: +SKIP
        HST    240
        GST     16
        Name: n_molecules, dtype: int64
        """
        names = pd.Series(self.molecule_species, dtype=object)
        counts = names.value_counts(sort=False)
        order = list(dict.fromkeys(names.tolist()))
        out = counts.reindex(order).astype(np.int64)
        out.index.name = "species"
        out.name = "n_molecules"
        return out

    def _species_list(self) -> str:
        return ", ".join(f"{k} ({n})" for k, n in self.species.items())

    def check_species(self, species: Any) -> list[str]:
        """``species`` (a name or a list of names) as a list of names the film has.

        Raises
        ------
        InputError
            Not text, empty, or a name no molecule carries; the message lists
            the species present with their counts.
        """
        names = [species] if isinstance(species, str) else species
        if not isinstance(names, (list, tuple, np.ndarray, pd.Index, pd.Series)) or not len(names) or \
                not all(isinstance(n, (str, np.str_)) and n.strip() for n in names):
            raise InputError(f"species={species!r} must be a species name or a list of names; the film "
                             f"{self.topology_path!r} has {self._species_list()}.")
        present = set(self.molecule_species.tolist())
        out = list(dict.fromkeys(str(n).strip() for n in names))
        missing = [n for n in out if n not in present]
        if missing:
            raise InputError(f"the film {self.topology_path!r} has no molecules named "
                             f"{', '.join(map(repr, missing))} (no molecule of that species); its species are "
                             f"{self._species_list()}.")
        return out

    def species_formula(self, species: str) -> str:
        """The one composition (Hill formula) of the molecules of ``species``.

        Per-species model parameters (state charges, responses) describe one
        composition; this is where that is checked.

        Raises
        ------
        InputError
            An unknown species (:meth:`check_species`).
        FilmError
            Molecules of the species with different compositions (the message
            names the compositions and a residue of each).
        """
        name = self.check_species(species)[0]
        rows = self.molecules[self.molecules["species"] == name]
        forms = rows.groupby("formula", sort=False)["resid"].agg(["size", "first"])
        if len(forms) > 1:
            parts = ", ".join(f"{f} x{int(r['size'])} (e.g. residue {r['first']})" for f, r in forms.iterrows())
            raise FilmError(f"species {name!r} of {self.topology_path!r} holds molecules of {len(forms)} "
                            f"compositions: {parts}. One set of per-species parameters cannot describe them; "
                            "give the molecules distinct residue names (species).")
        return str(forms.index[0])

    def _warn_mixed_residues(self) -> None:
        """Warn about residues whose molecules (bonded fragments) have different
        compositions: the film stays usable (carving and QM work per molecule
        and atom), but all of them carry the residue's one species name."""
        if self.molecule_kind != "fragments" or self.n_molecules < 2:
            return
        first = self.index.atoms[self.index.offsets[:-1]]
        resindex = np.asarray(self.universe.atoms.resindices)[first]
        table = pd.DataFrame({"res": resindex, "formula": self.molecules["formula"].to_numpy(),
                              "resname": self.molecule_resnames, "resid": self.molecules["resid"].to_numpy()})
        n_forms = table.groupby("res")["formula"].nunique()
        mixed = n_forms[n_forms > 1].index
        if not len(mixed):
            return
        ex = []
        for r in mixed[:5]:
            g = table[table.res == r]
            forms = ", ".join(f"{f} x{n}" for f, n in g["formula"].value_counts(sort=False).items())
            ex.append(f"residue {g.resname.iloc[0]} {g.resid.iloc[0]} ({forms})")
        warnings.warn(
            f"{self.topology_path}: {len(mixed)} residue(s) hold molecules of different compositions (mixed "
            f"species in one residue): {'; '.join(ex)}{' ...' if len(mixed) > 5 else ''}. They all get the "
            "residue name as species, so per-species statistics lump them, and per-species charge fits "
            "refuse them; give each composition its own residue name.",
            MixedSpeciesWarning, stacklevel=4)

    def select(self, selection: str | Sequence[int] | None = None, *,
               species: str | Sequence[str] | None = None) -> npt.NDArray[np.int64]:
        """Molecule ids (ascending for text selections) of a selection.

        Parameters
        ----------
        selection : str, sequence of int or None
            A species text ``"species:GST"`` or ``"species:HST,GST"`` (see
            :func:`clusterlab.ranges.parse_species`), an MDAnalysis selection
            string (e.g. ``"resname HST"``; a molecule is selected when any of
            its atoms is), an explicit list of ids, or None / ``"all"`` (all).
        species : str or sequence of str, optional
            Only molecules of these species (combined with ``selection``:
            the molecules in both).

        Raises
        ------
        InputError
            A species no molecule carries (the message lists the species
            present); :class:`~clusterlab.errors.CarvingError` for a bad
            selection string, a selection that matches nothing, or bad ids.
        """
        if species is not None:
            ids = self.select(selection)
            keep = np.isin(self.molecule_species[ids], self.check_species(species))
            if not keep.any():
                raise InputError(f"selection {selection!r} holds no molecule of species {species!r}; "
                                 f"the film has {self._species_list()}.")
            return ids[keep]
        if selection is None or (isinstance(selection, str) and selection.strip() == "all"):
            return np.arange(self.n_molecules)
        names = parse_species(selection) if isinstance(selection, str) else None
        if names is not None:
            return np.flatnonzero(np.isin(self.molecule_species, self.check_species(names))).astype(np.int64)
        if isinstance(selection, str):
            try:
                ag = self.universe.select_atoms(selection)
            except Exception as exc:  # noqa: BLE001 - MDAnalysis raises SelectionError and others
                raise CarvingError(f"selection {selection!r} is invalid: {exc}") from exc
            ids = np.unique(self.molecule_of_atom[ag.indices])
            if ids.size == 0:
                raise CarvingError(f"selection {selection!r} matches no atoms in {self.topology_path!r}; "
                                   f"the film has species {self._species_list()}.")
            return ids
        if isinstance(selection, (int, np.integer)):
            raise CarvingError(f"selection {selection!r} must be a selection string, a list of molecule ids or None.")
        ids = np.asarray([self.check_molecule(i) for i in selection], dtype=np.int64)
        if ids.size == 0:
            raise CarvingError(f"selection {list(selection)!r} is empty; give at least one molecule id "
                               f"(0..{self.n_molecules - 1}) or None for all.")
        return ids

    # --------------------------------------------------------------- charges
    @property
    def charges_available(self) -> bool:
        try:
            self.charges
        except ChargeError:
            return False
        return True

    @property
    def charges(self) -> FloatArray:
        """Partial charge of every atom (e), from the film's charge source.

        Raises
        ------
        ChargeError
            If the source has no charges, or a molecule's net charge is not an
            integer within 1e-3 e.
        """
        if self._charges is not None:
            return self._charges
        if self._charge_error is not None:
            raise self._charge_error
        try:
            q = np.asarray(self.charge_source.atom_charges(self), dtype=np.float64)
            if q.shape != (self.n_atoms,):
                raise ChargeError(f"charge source gave {q.shape} charges for {self.n_atoms} atoms.")
            nonfinite = np.flatnonzero(~np.isfinite(q))
            if nonfinite.size:
                names = np.asarray(self.universe.atoms.names).astype(str)
                ex = ", ".join(f"atom {i} ({names[i]}) {q[i]!r}" for i in nonfinite[:5])
                raise ChargeError(f"{species_without_charges(self, nonfinite)}"
                                  f"{nonfinite.size} atom charge(s) of {self.topology_path!r} are not finite "
                                  f"({self.charge_source.describe()}): {ex}.")
            net = np.bincount(self.molecule_of_atom, weights=q, minlength=self.n_molecules)
            bad = np.flatnonzero(np.abs(net - np.round(net)) > CHARGE_INTEGER_TOL)
            if bad.size:
                ex = ", ".join(f"molecule {i} ({self.universe.atoms[self.index.of(i)[0]].resname}) "
                               f"net {net[i]:+.4f} e" for i in bad[:5])
                raise ChargeError(
                    f"{bad.size} molecule(s) of {self.topology_path!r} have a net charge that is not an "
                    f"integer within {CHARGE_INTEGER_TOL} e ({self.charge_source.describe()}): {ex}. "
                    "Check the charges or how molecules are defined (bonds vs residues)."
                )
        except ChargeError as exc:
            self._charge_error = exc
            raise
        self._charges = q
        return q

    def set_charges(self, charges: Any) -> None:
        """Replace the charge source (mapping, CSV path, or a ChargeSource)."""
        self.charge_source = as_charge_source(charges)
        self._charges = None
        self._charge_error = None
        self.__dict__.pop("film_id", None)
        self.molecules = self._molecule_table()

    # ---------------------------------------------------------------- frames
    def box(self, frame: int = 0) -> FloatArray | None:
        """Box ``[lx, ly, lz, alpha, beta, gamma]`` of a frame, or None."""
        self.universe.trajectory[self.check_frame(frame)]
        return None if not self.has_box else np.asarray(self.universe.dimensions, dtype=np.float64).copy()

    def _check_finite(self, frame: int, pos: FloatArray) -> None:
        """Non-finite coordinates would silently empty every cluster of the
        frame (no distance is below a radius): refuse them by name."""
        bad = ~np.isfinite(pos).all(axis=1)
        if bad.any():
            atoms = np.flatnonzero(bad)
            mols = np.unique(self.molecule_of_atom[atoms])
            raise FilmError(
                f"frame {frame} of {self.trajectory_paths or self.topology_path!r} has non-finite coordinates "
                f"(NaN or inf) for {atoms.size} atom(s): atoms {atoms[:10].tolist()}"
                f"{' ...' if atoms.size > 10 else ''} in molecule(s) {mols[:10].tolist()}"
                f"{' ...' if mols.size > 10 else ''}. Fix or drop this frame."
            )

    def frame_geometry(self, frame: int = 0, *, periodic: bool = True) -> FrameGeometry:
        """Whole molecules of one frame with centroids in the primary cell (cached)."""
        f = self.check_frame(frame)
        key = f if periodic else -1 - f
        if key in self._frame_cache:
            self._frame_cache.move_to_end(key)
            return self._frame_cache[key]
        try:
            ts = self.universe.trajectory[f]
        except (OSError, EOFError, ValueError) as exc:  # a file changed or cut after loading
            raise FilmError(f"frame {f} of {self.trajectory_paths or self.topology_path!r} cannot be read: "
                            f"{exc}. Was the file changed after it was loaded?") from exc
        pos = np.asarray(ts.positions, dtype=np.float64).copy()
        self._check_finite(f, pos)
        box = None
        if periodic:
            if not self.has_box:
                raise CarvingError(
                    f"The film {self.topology_path!r} (frame {f}) has no periodic box, so periodic "
                    "carving is impossible. Pass periodic=False to carve without periodic images "
                    "(molecules are then taken as they are in the file)."
                )
            box = np.asarray(ts.dimensions, dtype=np.float64).copy()
            whole = make_whole(pos, self.molecule_of_atom, box)
            whole = self._repair_whole(whole, box)
            pos, cent = wrap_molecules(whole, self.molecule_of_atom, self.n_molecules, box)
        else:
            from .geometry import molecule_centroids

            cent = molecule_centroids(pos, self.molecule_of_atom, self.n_molecules)
        geo = FrameGeometry(frame=f, positions_A=pos, centroids_A=cent, box=box)
        self._frame_cache[key] = geo
        while len(self._frame_cache) > self._cache_frames:
            self._frame_cache.popitem(last=False)
        return geo

    def _repair_whole(self, whole: FloatArray, box: FloatArray) -> FloatArray:
        """Molecules larger than half the box defeat the reference-atom
        make-whole; walk their bond graph instead (MDAnalysis ``make_whole``)."""
        widths = perpendicular_widths(box_vectors(box))
        b = self._bond_index
        if len(b) == 0:
            return whole
        vec = whole[b[:, 1]] - whole[b[:, 0]]
        bad_bonds = np.linalg.norm(vec, axis=1) > 0.5 * widths.min() - 1e-6
        if not bad_bonds.any():
            return whole
        from MDAnalysis.lib.mdamath import make_whole as mda_make_whole

        fixed = whole.copy()
        for mol in np.unique(self.molecule_of_atom[b[bad_bonds, 0]]):
            ag = self.universe.atoms[self.index.of(int(mol))]
            saved = ag.positions.copy()
            ag.positions = fixed[ag.indices]
            mda_make_whole(ag)
            fixed[ag.indices] = ag.positions
            ag.positions = saved
        return fixed

    # ----------------------------------------------------------------- carve
    def carve(
        self,
        molecule: int,
        radius: float,
        *,
        frame: int = 0,
        qm_shell: float = 0.0,
        rule: str = "atom",
        periodic: bool = True,
        polarizable_radius: float | None = None,
    ) -> Cluster:
        """Carve a cluster around ``molecule``.

        Parameters
        ----------
        molecule : int
            Central molecule id (row of :attr:`molecules`).
        radius : float, Å
            Cut radius (see ``rule``). Radii beyond half the box are allowed:
            every periodic image inside is included once, images of the
            central molecule included.
        frame : int
        qm_shell : float, Å
            Whole neighbour molecules whose closest atom is within this
            distance of the central molecule join the QM region.
        rule : {"atom", "centroid"}
        periodic : bool
            False carves without periodic images (the only choice for films
            without a box).
        polarizable_radius : float, Å, optional
            Inner radius of a two-layer environment: environment molecules
            within it (same ``rule``, whole molecules) are marked
            polarizable (``Cluster.env_polarizable``), those beyond stay
            fixed charges. At most ``radius``. None: no polarizable layer.

        Returns
        -------
        Cluster

        Raises
        ------
        CarvingError
            Bad molecule, frame, radius or rule, or a periodic carve of a
            film with no box.
        ChargeError
            No charges available or non-integer molecular charges.
        """
        mol = self.check_molecule(molecule)
        try:
            radius = float(radius)
        except (TypeError, ValueError) as exc:
            raise CarvingError(f"radius must be a number of Å; got {radius!r}.") from exc
        if isinstance(qm_shell, (bool, np.bool_)) or not isinstance(qm_shell, (int, float, np.integer, np.floating)):
            raise CarvingError(f"qm_shell must be a number of Å (0 for the central molecule alone); got {qm_shell!r}.")
        if not isinstance(periodic, (bool, np.bool_)):
            raise CarvingError(f"periodic must be True or False; got {periodic!r}.")
        self._check_cluster_size(radius, frame, periodic=bool(periodic))
        pol_r = 0.0 if polarizable_radius is None else check_polarizable_radius(polarizable_radius, radius)
        geo = self.frame_geometry(frame, periodic=periodic)
        charges = self.charges
        sel = select_images(geo.positions_A, geo.centroids_A, self.index, mol, radius,
                            box=geo.box, rule=rule, qm_shell_A=float(qm_shell))
        c_atoms = self.index.of(mol)
        qa, qp, qm_mol, _ = self._gather(geo, sel.molecules[sel.in_qm], sel.images[sel.in_qm])
        ea, ep, em, ei = self._gather(geo, sel.molecules[~sel.in_qm], sel.images[~sel.in_qm])
        qm_atoms = np.r_[c_atoms, qa]
        qm_pos = np.vstack([geo.positions_A[c_atoms], qp])
        qm_atom_mol = np.r_[np.full(len(c_atoms), mol), qm_mol]
        qm_charge_f = float(charges[qm_atoms].sum())
        env = ~sel.in_qm
        dist = sel.atom_distance_A[env] if rule == "atom" else sel.centroid_distance_A[env]
        pol_images = dist <= pol_r if polarizable_radius is not None else np.zeros(int(env.sum()), bool)
        env_pol = np.repeat(pol_images, self.index.sizes()[sel.molecules[env]])
        return Cluster(
            qm_symbols=list(self.symbols[qm_atoms]),
            qm_positions=qm_pos,
            env_positions=ep,
            env_charges=charges[ea],
            qm_molecules=(mol, *[int(m) for m in sel.molecules[sel.in_qm]]),
            qm_atom_molecules=qm_atom_mol,
            env_molecules=em,
            env_images=ei,
            env_symbols=list(self.symbols[ea]),
            qm_charge=int(round(qm_charge_f)),
            frame=geo.frame,
            radius_A=radius,
            rule=rule,
            center=mol,
            box=geo.box,
            film_id=self.film_id,
            film_path=os.path.abspath(self.topology_path),
            env_polarizable=env_pol,
            polarizable_radius_A=pol_r,
        )

    def _check_cluster_size(self, radius_A: float, frame: Any, *, periodic: bool) -> None:
        """Refuse a periodic carve whose radius would allocate more than
        :data:`MAX_CLUSTER_CHARGES` point charges, naming the memory it would need."""
        if not (periodic and self.has_box and np.isfinite(radius_A) and radius_A > 0):
            return
        box = self.box(self.check_frame(frame))
        h = box_vectors(box)
        volume = abs(float(np.linalg.det(h)))
        reach = radius_A + float(perpendicular_widths(h).max())  # molecules reaching in from outside
        n_est = self.n_atoms * (4.0 / 3.0) * np.pi * reach ** 3 / volume
        if n_est > MAX_CLUSTER_CHARGES:
            gib = n_est * 80 / 2 ** 30
            raise CarvingError(
                f"radius {radius_A:g} Å would carve about {n_est:.2g} point charges from "
                f"{n_est / self.n_atoms:.2g} periodic copies of the box (about {gib:.3g} GiB while carving); "
                f"the limit is {MAX_CLUSTER_CHARGES:.0e} charges. Use a smaller radius, or the periodic "
                "(Ewald) embedding for the infinite-film limit.")

    def _gather(self, geo: FrameGeometry, mols: np.ndarray, imgs: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Atoms of molecule images: ``(atom indices, positions, molecule per atom, image per atom)``."""
        if len(mols) == 0:
            return (np.zeros(0, np.int64), np.zeros((0, 3)), np.zeros(0, np.int64), np.zeros((0, 3), np.int64))
        h = box_vectors(geo.box) if geo.box is not None else np.zeros((3, 3))
        sizes = self.index.sizes()[mols]
        starts = self.index.offsets[mols]
        within = np.arange(sizes.sum()) - np.repeat(np.cumsum(sizes) - sizes, sizes)
        atoms = self.index.atoms[np.repeat(starts, sizes) + within]
        img = np.repeat(imgs, sizes, axis=0)
        return atoms, geo.positions_A[atoms] + img @ h, np.repeat(mols, sizes), img

    def cell_cluster(self, molecule: int, *, frame: int = 0) -> Cluster:
        """The central molecule as QM region and every other molecule of the
        box once, whole, at the periodic image whose centroid is nearest the
        central centroid: the input of the periodic (Ewald) embedding, where
        the box itself is then repeated to infinity."""
        mol = self.check_molecule(molecule)
        geo = self.frame_geometry(frame, periodic=True)
        charges = self.charges
        h = box_vectors(geo.box)
        f = (geo.centroids_A - geo.centroids_A[mol]) @ np.linalg.inv(h)
        others = np.array([i for i in range(self.n_molecules) if i != mol], dtype=np.int64)
        imgs = -np.round(f[others]).astype(np.int64)
        ea, ep, em, ei = self._gather(geo, others, imgs)
        c_atoms = self.index.of(mol)
        return Cluster(
            qm_symbols=list(self.symbols[c_atoms]), qm_positions=geo.positions_A[c_atoms],
            env_positions=ep, env_charges=charges[ea], qm_molecules=(mol,),
            qm_atom_molecules=np.full(len(c_atoms), mol), env_molecules=em, env_images=ei,
            env_symbols=list(self.symbols[ea]), qm_charge=int(round(float(charges[c_atoms].sum()))),
            frame=geo.frame, radius_A=float("inf"), rule="cell", center=mol, box=geo.box,
            film_id=self.film_id, film_path=os.path.abspath(self.topology_path),
        )

    def radius_warnings(self, radius: float, frame: int = 0) -> list[str]:
        """Plain-language warnings about a cut radius (beyond half the box...)."""
        out = []
        if self.has_box:
            half = half_box_width_A(self.box(frame))
            if radius > half:
                out.append(f"radius {radius:g} Å exceeds half the smallest box width ({half:.1f} Å): "
                           "periodic images of molecules (and of the central molecule) are included.")
        return out

    def minimum_image(self, vectors_A: FloatArray, frame: int = 0) -> FloatArray:
        """Minimum-image version of difference vectors in this frame's box."""
        return minimum_image(vectors_A, self.box(frame))


#: films of this process by film id, so serial/threaded workers reuse the
#: caller's Film (also in-memory ones) and process workers load each film once
_FILM_CACHE: "OrderedDict[str, Film]" = OrderedDict()
_FILM_CACHE_SIZE = 4


def check_polarizable_radius(polarizable_radius: Any, radius_A: float) -> float:
    """The inner (polarizable) radius of a two-layer carve as a float in Å.

    Raises
    ------
    CarvingError
        Not a number, or not between 0 and the cut radius ``radius_A``.
    """
    try:
        r = float(polarizable_radius)
    except (TypeError, ValueError) as exc:
        raise CarvingError(f"polarizable_radius must be a number of Å; got {polarizable_radius!r}.") from exc
    if not (np.isfinite(r) and 0 <= r <= radius_A):
        raise CarvingError(f"polarizable_radius={polarizable_radius!r} Å must lie between 0 and the cut radius "
                           f"({radius_A:g} Å): the polarizable layer is the inner part of the cluster.")
    return r


def remember_film(film: Film) -> None:
    """Make ``film`` findable by :func:`film_from_spec` in this process."""
    _FILM_CACHE[film.film_id] = film
    _FILM_CACHE.move_to_end(film.film_id)
    while len(_FILM_CACHE) > _FILM_CACHE_SIZE:
        _FILM_CACHE.popitem(last=False)


def film_from_spec(spec: dict[str, Any]) -> Film:
    """Rebuild (or reuse, in this process) the film a :meth:`Film.spec` describes.

    Raises
    ------
    FilmError
        If the files changed since the spec was made (content id differs).
    """
    from .charges import charge_source_from_spec

    fid = spec.get("film_id")
    if fid and fid in _FILM_CACHE:
        return _FILM_CACHE[fid]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(spec["topology"], spec.get("trajectory") or None,
                         charges=charge_source_from_spec(spec.get("charges", {"kind": "topology"})))
    if fid and film.film_id != fid:
        raise FilmError(
            f"The film files {spec['topology']!r} changed since the study started "
            f"(content id {film.film_id} != {fid}); results would not match their keys."
        )
    remember_film(film)
    return film


def film_from_universe(universe: mda.Universe, *, charges: Any = None, name: str = "<memory>") -> Film:
    """Wrap an existing MDAnalysis Universe (e.g. one built in memory) as a Film.

    The Film keeps a reference to the Universe: moving its frame moves yours.
    """
    if len(universe.atoms) == 0:
        raise FilmError(f"{name!r} contains no atoms.")
    top = getattr(universe, "filename", None) or name
    trajs = [universe.trajectory.filename] if getattr(universe.trajectory, "filename", None) else []
    return Film(universe, str(top), [str(t) for t in trajs], as_charge_source(charges))


def _atom_count(path: str, fmt: str | None = None) -> int | None:
    try:
        return len(mda.Universe(path).atoms)
    except Exception:  # noqa: BLE001
        return None


def load_film(
    topology: str | os.PathLike[str],
    trajectory: str | os.PathLike[str] | Sequence[str | os.PathLike[str]] | None = None,
    *,
    charges: Any = None,
    **universe_kwargs: Any,
) -> Film:
    """Load a film from any topology/trajectory pair MDAnalysis reads.

    Parameters
    ----------
    topology : path
        GRO, PDB, PSF, TPR, PQR, MOL2, PRMTOP, LAMMPS data, ...
    trajectory : path or list of paths, optional
        XTC, TRR, DCD, LAMMPS dump, ...; None uses the coordinates in the topology.
    charges : None, mapping, CSV path or ChargeSource
        None takes the topology's charges. See :mod:`clusterlab.charges`.
    **universe_kwargs
        Passed to :class:`MDAnalysis.Universe` (e.g. ``format=``, ``topology_format=``).

    Raises
    ------
    FilmError
        Missing files, atom-count mismatch between topology and trajectory,
        unreadable files, unknown elements.

    Examples
    --------
    >>> film = load_film("demo_traj/bithiophene_film.psf", "demo_traj/bithiophene_film.xtc")  # doctest: +SKIP
    >>> cluster = film.carve(0, radius=12.0)  # doctest: +SKIP
    """
    top = os.fspath(topology)
    trajs: list[str] = []
    if trajectory is not None:
        trajs = [os.fspath(trajectory)] if isinstance(trajectory, (str, os.PathLike)) else [os.fspath(t) for t in trajectory]
    for p in [top, *trajs]:
        if not os.path.exists(p):
            raise FilmError(f"File not found: {p!r}.")
        if os.path.isfile(p) and os.path.getsize(p) == 0:
            raise FilmError(f"{p!r} is empty (0 bytes); give a {'topology' if p == top else 'trajectory'} "
                            "file with atoms in it (an interrupted copy or write?).")
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*(guess|Guess|No coordinate reader|Reader has no dt).*")
        try:
            u = mda.Universe(top, *trajs, **universe_kwargs)
        except Exception as exc:  # noqa: BLE001 - MDAnalysis raises many kinds
            msg = str(exc)
            if trajs and ("atoms" in msg.lower() and ("match" in msg.lower() or "number" in msg.lower() or "differ" in msg.lower())):
                n_top = _atom_count(top)
                raise FilmError(
                    f"Topology {top!r} and trajectory {', '.join(map(repr, trajs))} have different numbers of "
                    f"atoms (topology: {n_top if n_top is not None else '?'}). MDAnalysis said: {msg}"
                ) from exc
            if trajs and re.search(r"XDR|XTC|TRR|DCD|endoffile|read error", msg):
                raise FilmError(f"trajectory {', '.join(map(repr, trajs))} cannot be read from its first frames "
                                f"(truncated, damaged or not in the format its name says?): {msg}") from exc
            raise FilmError(f"MDAnalysis cannot read {top!r}{' with ' + ', '.join(trajs) if trajs else ''}: {msg}") from exc
    if len(u.atoms) == 0:
        raise FilmError(f"{top!r} contains no atoms.")
    if trajs:
        _check_last_frames(u, trajs)
    return Film(u, top, trajs, as_charge_source(charges))


def _check_last_frames(universe: mda.Universe, trajs: list[str]) -> None:
    """Read the last frame of every trajectory file once, at load.

    A trajectory cut short (a copy or a run interrupted while writing) keeps
    the header of its last frame, so MDAnalysis counts that frame, but reading
    it fails with a bare decoder message much later, inside a study. Frames
    are written whole and in order, so a cut leaves only the last frame
    unreadable: say so now, with the number of frames that can be read.

    Raises
    ------
    FilmError
        Naming the file, the frame that cannot be read and the readable count.
    """
    traj = universe.trajectory
    readers = getattr(traj, "readers", None) or [traj]
    for path, reader in zip(trajs, readers):
        n = len(reader)
        if n == 0:
            raise FilmError(f"trajectory {path!r} holds no frame.")
        try:
            reader[n - 1]
        except Exception as exc:  # noqa: BLE001 - the readers raise OSError, EOFError, ValueError
            readable = n - 1
            raise FilmError(
                f"trajectory {path!r} is truncated: frame {n - 1} (the last of {n}) cannot be read ({exc}); "
                f"the {readable} frame(s) before it are readable. Copy the file again, or write its first "
                f"{readable} frame(s) to a new file and load that one."
            ) from exc
    traj[0]
