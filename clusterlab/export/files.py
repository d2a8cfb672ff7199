"""The files of a transport export: Parquet and CSV tables and a JSON sidecar.

An export folder holds ``sites.parquet``/``sites.csv`` (the site table),
``pairs.parquet``/``pairs.csv`` (the pair table, rates included) and
``export.json``: the format name and version, the unit, meaning and dtype
of every column (:func:`~clusterlab.export.sites.column_info`), the sign
conventions, software versions, what the models leave out and the
provenance of :func:`export_metadata` (film, method, radii, models, rates).
The tables are plain files, readable without clusterlab; the layout is
described in the README. :func:`write_export` writes a folder,
:func:`read_export` reads it back.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, Mapping, NamedTuple, Sequence

import pandas as pd

from ..errors import InputError
from ..versions import software_versions
from .sites import SIGN_CONVENTIONS, column_info

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

__all__ = [
    "EXPORT_FORMAT",
    "EXPORT_FORMAT_VERSION",
    "FILE_NAMES",
    "ExportTables",
    "export_metadata",
    "write_export",
    "read_export",
]

#: value of the sidecar's ``format`` key
EXPORT_FORMAT = "clusterlab-transport-tables"
#: value of the sidecar's ``format_version`` key (bumped on incompatible changes)
EXPORT_FORMAT_VERSION = 1
#: file names inside an export folder
FILE_NAMES = {
    "sites_parquet": "sites.parquet", "sites_csv": "sites.csv",
    "pairs_parquet": "pairs.parquet", "pairs_csv": "pairs.csv",
    "sidecar": "export.json",
}


class ExportTables(NamedTuple):
    """What :func:`read_export` returns: ``sites, pairs, metadata``."""

    sites: pd.DataFrame
    pairs: pd.DataFrame
    metadata: dict[str, Any]


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "tolist"):
        return _jsonable(obj.tolist())
    if hasattr(obj, "to_dict") and callable(obj.to_dict):
        return _jsonable(obj.to_dict())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None if math.isnan(obj) else ("inf" if obj > 0 else "-inf")
    if isinstance(obj, (str, int, float, bool)) or obj is None:
        return obj
    return str(obj)


def _columns_doc(df: pd.DataFrame) -> dict[str, dict[str, str]]:
    out = {}
    for c in df.columns:
        unit, meaning = column_info(str(c))
        out[str(c)] = {"unit": unit, "meaning": meaning, "dtype": str(df[c].dtype)}
    return out


_LIMITATIONS = [
    "QM site energies: one embedded cluster per site with fixed point charges of the environment; no "
    "environment polarization unless the QM method is polarizable (induced dipoles on the molecules within the "
    "inner radius only: source tags 'qm:R=<outer>A:polarizable=<inner>A:...', <Q>_polarization_qm_eV columns; "
    "never in the periodic limit) or the electrostatic model's polarization term is used (ions only).",
    "Electrostatic model: first-order electrostatics of state-difference charges fitted on one reference copy "
    "per species (no refit per conformation); neutral excitations are not polarized; no intramolecular "
    "(conformational) change of the vacuum energy unless vacuum values come from QM per site.",
    "Excitonic couplings: Coulomb coupling of S0->S1 transition charges (no exchange or overlap terms, no "
    "charge-transfer mixing); point-dipole values are valid only for distances much larger than the molecules.",
    "Transfer integrals: one frontier orbital per molecule (projective dimer method), sign set by arbitrary "
    "orbital phases; only |J| enters the rates.",
    "Rates: classical Marcus (no high-frequency mode tunnelling) or Miller-Abrahams; one carrier at a time, "
    "no carrier-carrier interaction, no dynamic disorder beyond the frames given.",
]


def export_metadata(
    film: "Film",
    *,
    sites: pd.DataFrame | None = None,
    pairs: pd.DataFrame | None = None,
    method: Any = None,
    frames: Sequence[int] | None = None,
    cutoff_A: float | None = None,
    criterion: str | None = None,
    refractive_index: float | None = None,
    extra: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The provenance part of a sidecar: film, method, radii, models, rates.

    Parameters
    ----------
    film : Film
    sites, pairs : DataFrame, optional
        Tables whose ``attrs`` (sources, verdict, rates) are recorded.
    method : Method or dict, optional
        The QM method (its dict and key are written).
    frames : sequence of int, optional
        Frames of the export (default: those of ``sites``).
    cutoff_A, criterion, refractive_index : optional
        Pair-table settings.
    extra : mapping, optional
        Free user entries, written under ``"user"``.

    Returns
    -------
    dict
        JSON-able; pass it to :func:`write_export` as ``metadata``.
        ``radius_A`` holds ``qm`` (the QM radii, outer radii of a polarizable
        method), ``qm_polarizable`` (the inner radii; only for a polarizable
        QM method) and ``model``; ``models`` the sources, a polarizable QM
        one with ``environment``, ``radius_A`` and ``polarizable_radius_A``.
    """
    if frames is None:
        frames = sorted({int(f) for f in sites["frame"]}) if sites is not None and "frame" in sites else []
    boxes = {}
    for f in frames:
        b = film.box(int(f))
        boxes[str(int(f))] = None if b is None else [float(x) for x in b]
    meth = None
    if method is not None:
        if hasattr(method, "to_dict") and hasattr(method, "key"):
            meth = {"dict": method.to_dict(), "key": method.key()}
        elif isinstance(method, Mapping):
            meth = {"dict": dict(method), "key": None}
    keys = []
    if sites is not None and "qm_method_key" in sites:
        keys = sorted({str(k) for k in sites["qm_method_key"].dropna() if str(k)})
    if meth is None and keys:
        meth = {"dict": None, "key": keys[0] if len(keys) == 1 else keys}
    sources = list(sites.attrs.get("sources", [])) if sites is not None else []
    radius: dict[str, Any] = {}
    if sites is not None and "qm_radius_A" in sites:
        r = sorted({float(x) for x in sites["qm_radius_A"].dropna()})
        radius["qm"] = r
    if sites is not None and "qm_polarizable_radius_A" in sites:  # polarizable QM only
        radius["qm_polarizable"] = sorted({float(x) for x in sites["qm_polarizable_radius_A"].dropna()})
    for s in sources:
        if s.get("kind") == "electrostatic-model":
            radius["model"] = s.get("radius_A")
    meta: dict[str, Any] = {
        "method": meth,
        "radius_A": radius,
        "models": sources,
        "verdict": sites.attrs.get("verdict") if sites is not None else None,
        "film": {
            "topology": film.topology_path, "trajectory": list(film.trajectory_paths),
            "film_id": film.film_id, "n_molecules": int(film.n_molecules), "n_frames": int(film.n_frames),
            "molecule_kind": film.molecule_kind, "frames": [int(f) for f in frames], "box_per_frame": boxes,
            "box_convention": "[lx, ly, lz, alpha, beta, gamma] in Å and degrees (a along x, b in the xy plane)",
            "charges": film.charge_source.describe() if hasattr(film.charge_source, "describe") else None,
        },
        "pairs": {"cutoff_A": cutoff_A, "criterion": criterion, "refractive_index": refractive_index},
        "rates": dict(pairs.attrs.get("rates", {})) if pairs is not None else {},
        "user": dict(extra or {}),
    }
    return _jsonable(meta)


def write_export(
    folder: str | os.PathLike[str],
    sites: pd.DataFrame,
    pairs: pd.DataFrame,
    *,
    metadata: Mapping[str, Any] | None = None,
) -> dict[str, str]:
    """Write both tables as Parquet and CSV plus the ``export.json`` sidecar.

    Parameters
    ----------
    folder : path
        Created if missing; existing export files in it are replaced.
    sites, pairs : DataFrame
        Site and pair tables.
    metadata : mapping, optional
        Provenance (usually :func:`export_metadata`); ``rates`` found in
        ``pairs.attrs`` are added when missing.

    Returns
    -------
    dict of str to str
        Absolute paths: ``sites_parquet, sites_csv, pairs_parquet, pairs_csv,
        sidecar``.

    Raises
    ------
    InputError
        If a table is not a DataFrame.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    for name, df in (("sites", sites), ("pairs", pairs)):
        if not isinstance(df, pd.DataFrame):
            raise InputError(f"{name} must be a pandas DataFrame; got {type(df).__name__}.")
    root = Path(folder)
    root.mkdir(parents=True, exist_ok=True)
    paths = {k: str((root / v).resolve()) for k, v in FILE_NAMES.items()}
    meta = dict(_jsonable(dict(metadata or {})))
    if not meta.get("rates") and pairs.attrs.get("rates"):
        meta["rates"] = _jsonable(pairs.attrs["rates"])
    sidecar = {
        "format": EXPORT_FORMAT,
        "format_version": EXPORT_FORMAT_VERSION,
        "written_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "files": {
            "sites": {"parquet": FILE_NAMES["sites_parquet"], "csv": FILE_NAMES["sites_csv"], "rows": int(len(sites))},
            "pairs": {"parquet": FILE_NAMES["pairs_parquet"], "csv": FILE_NAMES["pairs_csv"], "rows": int(len(pairs))},
        },
        "columns": {"sites": _columns_doc(sites), "pairs": _columns_doc(pairs)},
        "sign_conventions": SIGN_CONVENTIONS,
        "software": software_versions(),
        "limitations": _LIMITATIONS,
        **{k: v for k, v in meta.items() if k not in ("format", "format_version", "files", "columns")},
    }
    for name, df in (("sites", sites), ("pairs", pairs)):
        plain = pd.DataFrame(df).copy()
        plain.attrs = {}
        table = pa.Table.from_pandas(plain, preserve_index=False)
        table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                               b"clusterlab.export.format": EXPORT_FORMAT.encode(),
                                               b"clusterlab.export.version": str(EXPORT_FORMAT_VERSION).encode()})
        pq.write_table(table, paths[f"{name}_parquet"])
        plain.to_csv(paths[f"{name}_csv"], index=False)
    with open(paths["sidecar"], "w", encoding="utf-8") as fh:
        json.dump(sidecar, fh, indent=2, sort_keys=False, ensure_ascii=False)
        fh.write("\n")
    return paths


def read_export(folder: str | os.PathLike[str], *, prefer: Literal["parquet", "csv"] = "parquet") -> ExportTables:
    """Read an export folder back: ``(sites, pairs, metadata)``.

    Parameters
    ----------
    folder : path
    prefer : {'parquet', 'csv'}
        Which copy of the tables to read (CSV floats are written with
        Python's shortest round-trip repr; booleans get the sidecar's dtype).

    Returns
    -------
    ExportTables

    Raises
    ------
    InputError
        Missing sidecar, a sidecar of another format, or a newer format version.
    """
    root = Path(folder)
    side = root / FILE_NAMES["sidecar"]
    if not side.is_file():
        raise InputError(f"{str(root)!r} has no {FILE_NAMES['sidecar']}; it is not a clusterlab export folder.")
    with open(side, encoding="utf-8") as fh:
        meta = json.load(fh)
    if meta.get("format") != EXPORT_FORMAT:
        raise InputError(f"{str(side)!r} has format {meta.get('format')!r}, not {EXPORT_FORMAT!r}.")
    if int(meta.get("format_version", 0)) > EXPORT_FORMAT_VERSION:
        raise InputError(f"{str(side)!r} has format version {meta.get('format_version')}; this clusterlab reads "
                         f"up to {EXPORT_FORMAT_VERSION}. Update clusterlab.")
    if prefer not in ("parquet", "csv"):
        raise InputError(f"prefer={prefer!r} is not valid; use 'parquet' or 'csv'.")
    tables = []
    for name in ("sites", "pairs"):
        f = meta["files"][name][prefer]
        if prefer == "parquet":
            import pyarrow.parquet as pq

            df = pq.read_table(root / f).to_pandas()
        else:
            cols = meta.get("columns", {}).get(name, {})
            df = pd.read_csv(root / f)
            for c, info in cols.items():
                if c in df and info.get("dtype") == "bool":
                    df[c] = df[c].astype(bool)
        tables.append(df)
    return ExportTables(tables[0], tables[1], meta)
