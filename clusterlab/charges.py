"""Pluggable sources of atomic partial charges for the point-charge environment.

A charge source turns a film into one charge per atom (e). Built in:

- :class:`TopologyCharges` — the charges the topology file carries (PSF, TPR,
  PQR, MOL2, PRMTOP, LAMMPS data...).
- :class:`TableCharges` — a table the user passes: per atom name, per
  (residue name, atom name), or per residue name as a list in atom order;
  from a mapping or a CSV file.
- :class:`MoleculeTypeCharges` — one charge vector per residue name in the
  molecule's atom order (what a QM electrostatic-potential fit produces, see
  :mod:`clusterlab.electrostatics`), mapped onto every copy by atom order.

Write your own by subclassing :class:`ChargeSource` and implementing
``atom_charges(film)`` and ``fingerprint()``.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from .errors import ChargeError

if TYPE_CHECKING:  # pragma: no cover
    from .film import Film

FloatArray = npt.NDArray[np.float64]


class ChargeSource:
    """Base class: gives one partial charge (e) per atom of a film."""

    name = "abstract"

    def atom_charges(self, film: "Film") -> FloatArray:  # pragma: no cover - interface
        """Charges of all atoms, shape (n_atoms,), e.

        Raises
        ------
        ChargeError
            If some atom gets no charge.
        """
        raise NotImplementedError

    def fingerprint(self) -> str:  # pragma: no cover - interface
        """Stable text that changes whenever the charges would change."""
        raise NotImplementedError

    def describe(self) -> str:
        return self.name

    def to_spec(self) -> dict[str, Any]:
        """A small JSON-able description from which :func:`charge_source_from_spec`
        rebuilds the source in another process (workers rebuild films from files)."""
        raise ChargeError(
            f"The charge source {self.describe()!r} cannot be sent to worker processes; "
            "use the serial runner, or a topology / table / per-molecule-type source."
        )


class TopologyCharges(ChargeSource):
    """Charges read from the topology file."""

    name = "topology"

    def atom_charges(self, film: "Film") -> FloatArray:
        u = film.universe
        if not hasattr(u.atoms, "charges"):
            raise ChargeError(
                f"The topology {film.topology_path!r} carries no partial charges "
                f"(format {os.path.splitext(film.topology_path)[1] or '?'}). Pass charges= to "
                "load_film (a mapping or a CSV table: resname,name,charge), or use a topology "
                "format with charges (PSF, TPR, PQR, MOL2, PRMTOP, LAMMPS data)."
            )
        q = np.asarray(u.atoms.charges, dtype=np.float64)
        return q

    def fingerprint(self) -> str:
        return "topology"

    def to_spec(self) -> dict[str, Any]:
        return {"kind": "topology"}


def _read_charge_csv(path: str) -> list[dict[str, str]]:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
    except OSError as exc:
        raise ChargeError(f"Cannot read charge table {path!r}: {exc}") from exc
    if not rows:
        raise ChargeError(f"Charge table {path!r} has no rows.")
    cols = set(rows[0])
    if "charge" not in cols or "name" not in cols:
        raise ChargeError(
            f"Charge table {path!r} must have columns 'name' and 'charge' (and optionally "
            f"'resname'); it has {sorted(cols)}."
        )
    return rows


def species_without_charges(film: "Film", missing_atoms: npt.ArrayLike) -> str:
    """A sentence naming the species none of whose molecules got a charge
    (every atom among ``missing_atoms``), or "" when there is none: a
    charge table written for the host alone, say, in a doped film."""
    miss = np.zeros(film.n_atoms, bool)
    miss[np.asarray(missing_atoms, dtype=np.int64)] = True
    mol_all = np.bincount(film.molecule_of_atom, weights=~miss, minlength=film.n_molecules) == 0
    species = np.asarray(film.molecule_species)
    empty = [str(sp) for sp in dict.fromkeys(species.tolist()) if mol_all[species == sp].all()]
    if not empty:
        return ""
    n = {sp: int((species == sp).sum()) for sp in empty}
    return ("No charges at all for species " + ", ".join(f"{sp!r} ({n[sp]} molecule(s))" for sp in empty)
            + ". ")


def _fill_by_molecule_type(film: "Film", table: Mapping[str, FloatArray], q: FloatArray, what: str) -> None:
    """Write per-residue-name charge vectors (molecule atom order) into ``q``."""
    for mol_id, resname in enumerate(film.molecule_resnames):
        vec = table.get(resname)
        if vec is None:
            continue
        idx = film.index.of(mol_id)
        if len(vec) != len(idx):
            raise ChargeError(
                f"{what} give {len(vec)} charges for residue {resname!r}, but molecule "
                f"{mol_id} has {len(idx)} atoms."
            )
        q[idx] = vec


class TableCharges(ChargeSource):
    """Charges from a user table.

    Parameters
    ----------
    table : mapping or str
        One of

        - ``{"OW": -0.834, "HW1": 0.417, ...}`` keyed by atom name;
        - ``{("SOL", "OW"): -0.834, ...}`` keyed by (residue name, atom name);
        - ``{"SOL": [-0.834, 0.417, 0.417]}`` keyed by residue name, one charge
          per atom in the molecule's atom order;
        - a path to a CSV file with columns ``name,charge`` or
          ``resname,name,charge``.
        (Residue-keyed entries win over plain atom-name entries.)
    """

    name = "table"

    def __init__(self, table: Mapping[Any, Any] | str | os.PathLike[str]):
        self.source = str(table) if isinstance(table, (str, os.PathLike)) else "mapping"
        self.by_name: dict[str, float] = {}
        self.by_res_name: dict[tuple[str, str], float] = {}
        self.by_res_order: dict[str, FloatArray] = {}
        if isinstance(table, (str, os.PathLike)):
            for i, row in enumerate(_read_charge_csv(str(table)), start=2):
                try:
                    q = float(row["charge"])
                except ValueError as exc:
                    raise ChargeError(
                        f"Charge table {self.source!r} line {i}: charge {row['charge']!r} is not a number."
                    ) from exc
                res = (row.get("resname") or "").strip()
                name = row["name"].strip()
                if res:
                    self.by_res_name[(res, name)] = q
                else:
                    self.by_name[name] = q
        elif isinstance(table, Mapping):
            for key, val in table.items():
                if isinstance(key, tuple):
                    if len(key) != 2:
                        raise ChargeError(f"Charge key {key!r} must be (resname, atom name).")
                    self.by_res_name[(str(key[0]), str(key[1]))] = float(val)
                elif isinstance(val, (list, tuple, np.ndarray)):
                    self.by_res_order[str(key)] = np.asarray(val, dtype=np.float64)
                else:
                    self.by_name[str(key)] = float(val)
        else:
            raise ChargeError(
                f"charges= must be a mapping or a CSV path; got {type(table).__name__}."
            )

    def atom_charges(self, film: "Film") -> FloatArray:
        atoms = film.universe.atoms
        names = np.asarray(atoms.names).astype(str)
        resnames = np.asarray(atoms.resnames).astype(str)
        q = np.full(len(atoms), np.nan)
        if self.by_name:
            lut = self.by_name
            vals = np.array([lut.get(n, np.nan) for n in np.unique(names)])
            uniq, inv = np.unique(names, return_inverse=True)
            q = np.where(np.isnan(q), vals[inv], q)
        if self.by_res_name:
            keys = np.char.add(np.char.add(resnames, "\x1f"), names)
            uniq, inv = np.unique(keys, return_inverse=True)
            vals = np.array([self.by_res_name.get(tuple(k.split("\x1f")), np.nan) for k in uniq])
            picked = vals[inv]
            q = np.where(np.isnan(picked), q, picked)
        if self.by_res_order:
            _fill_by_molecule_type(film, self.by_res_order, q, f"Charge table ({self.source})")
        missing = np.flatnonzero(np.isnan(q))
        if missing.size:
            examples = ", ".join(
                f"atom {i} ({resnames[i]}:{names[i]})" for i in missing[:5]
            )
            raise ChargeError(
                f"{species_without_charges(film, missing)}"
                f"Charge table ({self.source}) has no charge for {missing.size} atom(s) of "
                f"{film.topology_path!r}, e.g. {examples}. Add rows for these names."
            )
        return q

    def fingerprint(self) -> str:
        payload = {
            "name": sorted(self.by_name.items()),
            "resname": sorted((f"{a}:{b}", v) for (a, b), v in self.by_res_name.items()),
            "order": sorted((k, np.round(v, 8).tolist()) for k, v in self.by_res_order.items()),
        }
        return "table:" + hashlib.sha256(json.dumps(payload).encode()).hexdigest()[:16]

    def describe(self) -> str:
        return f"table ({self.source})"

    def to_spec(self) -> dict[str, Any]:
        return {
            "kind": "table", "source": self.source,
            "by_name": self.by_name,
            "by_res_name": [[r, n, q] for (r, n), q in self.by_res_name.items()],
            "by_res_order": {k: v.tolist() for k, v in self.by_res_order.items()},
        }


class MoleculeTypeCharges(ChargeSource):
    """One charge vector per residue name, in the molecule's atom order.

    Molecules of other residue names fall back to ``fallback`` (another
    source), so a fitted guest can sit in a host with topology charges.
    """

    name = "per-molecule-type"

    def __init__(self, charges_by_resname: Mapping[str, npt.ArrayLike], *,
                 fallback: ChargeSource | None = None, label: str = "fitted"):
        self.charges = {str(k): np.asarray(v, dtype=np.float64) for k, v in charges_by_resname.items()}
        self.fallback = fallback
        self.label = label

    def atom_charges(self, film: "Film") -> FloatArray:
        base = (np.full(film.n_atoms, np.nan) if self.fallback is None
                else np.array(self.fallback.atom_charges(film), dtype=float))
        _fill_by_molecule_type(film, self.charges, base, f"{self.label} charges")
        missing = np.flatnonzero(np.isnan(base))
        if missing.size:
            raise ChargeError(
                f"{species_without_charges(film, missing)}"
                f"{self.label} charges cover residue names {sorted(self.charges)}, but "
                f"{missing.size} atom(s) belong to other residues and no fallback source was given."
            )
        return base

    def fingerprint(self) -> str:
        payload = sorted((k, np.round(v, 8).tolist()) for k, v in self.charges.items())
        fb = self.fallback.fingerprint() if self.fallback else ""
        return "moltype:" + hashlib.sha256(json.dumps([payload, fb]).encode()).hexdigest()[:16]

    def describe(self) -> str:
        return f"{self.label} per molecule type ({', '.join(sorted(self.charges))})"

    def to_spec(self) -> dict[str, Any]:
        return {"kind": "per-molecule-type", "label": self.label,
                "charges": {k: v.tolist() for k, v in self.charges.items()},
                "fallback": None if self.fallback is None else self.fallback.to_spec()}


def charge_source_from_spec(spec: Mapping[str, Any]) -> ChargeSource:
    """Inverse of :meth:`ChargeSource.to_spec`."""
    kind = spec.get("kind")
    if kind == "topology":
        return TopologyCharges()
    if kind == "table":
        src = TableCharges({})
        src.source = spec.get("source", "mapping")
        src.by_name = {str(k): float(v) for k, v in spec.get("by_name", {}).items()}
        src.by_res_name = {(str(r), str(n)): float(q) for r, n, q in spec.get("by_res_name", [])}
        src.by_res_order = {str(k): np.asarray(v, float) for k, v in spec.get("by_res_order", {}).items()}
        return src
    if kind == "per-molecule-type":
        fb = spec.get("fallback")
        return MoleculeTypeCharges(spec["charges"], label=spec.get("label", "fitted"),
                                   fallback=None if fb is None else charge_source_from_spec(fb))
    raise ChargeError(f"Unknown charge source kind {kind!r} in a task spec.")


def as_charge_source(charges: Any) -> ChargeSource:
    """Turn the ``charges=`` argument of :func:`clusterlab.load_film` into a source."""
    if charges is None or charges == "topology":
        return TopologyCharges()
    if isinstance(charges, ChargeSource):
        return charges
    if isinstance(charges, (str, os.PathLike, Mapping)):
        return TableCharges(charges)
    raise ChargeError(
        f"charges={charges!r} is not understood. Use None (topology charges), a mapping, "
        "a CSV path, or a ChargeSource."
    )
