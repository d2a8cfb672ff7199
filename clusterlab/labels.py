"""How result columns read to a person: headers, display units and order.

One place for the words and units the panels' tables and the report's tables
use, so that ``dEST_vacuum_eV`` reads "ΔEST vacuum (eV)" everywhere and
environment shifts and widths read in meV (they are tens of meV: three
decimals of eV hide them). The data keep their names and eV; only the shown
copy changes (:func:`display_table`).

Examples
--------
>>> column_label("S1_shift_eV")
'S1 shift (meV)'
>>> column_label("dEST_vacuum_eV")
'ΔEST vacuum (eV)'
>>> column_label("sigma_lo_eV")
'σ 95 % low (meV)'
>>> quantity_name("S1_shift_eV")
'S1 shift'
"""

from __future__ import annotations

import math
import re
from typing import Any

import numpy as np
import pandas as pd

#: columns shown first, in this order, when present
LEADING_COLUMNS = ("molecule", "frame", "radius_A", "polarizable_radius_A")

#: the columns a shortened table keeps first (after :data:`LEADING_COLUMNS`), most telling first
PRIORITY_COLUMNS = ("species", "quantity", "carrier", "stage", "n", "S1_shift_eV", "T1_shift_eV", "dEST_eV",
                    "S1_eV", "n_charges", "S1_osc", "T1_eV", "IP_shift_eV", "EA_shift_eV", "n_env_molecules")

#: how many columns a table shows by default (:func:`display_table` ``max_columns``)
MAX_COLUMNS = 8

#: headers that the general rule below would not give
COLUMN_LABELS: dict[str, str] = {
    "molecule": "molecule",
    "frame": "frame",
    "radius_A": "radius (Å)",
    "polarizable_radius_A": "inner radius (Å)",
    "n_env_molecules": "environment molecules",
    "n_charges": "point charges",
    "n_polarizable": "polarizable molecules",
    "net_env_charge": "net environment charge (e)",
    "converged": "SCF converged",
    "P_converged": "dipoles converged",
    "wall_s": "wall time (s)",
    "cpu_s": "CPU time (s)",
    "calculations_run": "calculations run",
    "from_store": "from the store",
    "n": "n",
    "n_host": "host sites",
    "n_guest": "guest sites",
    "quantity": "quantity",
    "skewness": "skewness",
    "excess_kurtosis": "excess kurtosis",
    "normality_p": "normality p",
    "sigma_ci_method": "σ interval",
    "r": "Pearson r",
    "var_dEST_eV2": "variance of ΔEST (eV²)",
    "torsion_fraction": "torsion share",
    "conformational_fraction": "conformational share",
    "P_cation_eV": "P+ (meV)",
    "P_anion_eV": "P− (meV)",
    "sigma_torsion_eV": "σ from the torsion (meV)",
    "cation_total_eV": "cation shift, polarized (meV)",
    "anion_total_eV": "anion shift, polarized (meV)",
}

#: words for the parts of a column name (several parts may make one word: "first_order")
_WORDS = {"dEST": "ΔEST", "sigma": "σ", "lo": "low", "hi": "high",
          "first_order": "first-order part", "stark": "second-order (Stark) part", "rms": "RMS",
          "qm": "QM", "ct": "CT", "chi2": "χ²", "rmsd": "RMSD", "osc": "oscillator strength", "P": "P", "var": "variance of", "periodic": "periodic limit",
          "total": "with polarization", "error": "error", "depth": "depth", "spread": "spread"}

#: display units by name ending
_UNITS = (("_meV", "meV"), ("_eV2", "eV²"), ("_eV", "eV"), ("_deg", "°"), ("_V_A", "V/Å"), ("_A", "Å"), ("_s", "s"),
          ("_e", "e"), ("_D", "D"))

#: a unit-less column whose name starts so holds counts (shown without decimals)
_COUNT_PREFIXES = ("n_", "n", "calculations_", "from_store")


def shown_in_meV(name: str) -> bool:
    """Whether a column in eV is shown in meV: environment shifts, their parts, polarization
    energies, errors and widths (σ, the spread of a host-guest difference)."""
    s = str(name)
    if not s.endswith("_eV"):
        return False
    return (any(part in s for part in ("_shift", "_polarization", "_first_order", "_stark", "_error"))
            or s.startswith(("sigma", "spread", "rms", "P_")) or s.endswith("_total_eV"))


def _name_and_unit(name: str) -> tuple[str, str]:
    s = str(name)
    if shown_in_meV(s):
        s, unit = s[: -len("_eV")], "meV"
    else:
        unit = ""
        for end, u in _UNITS:
            if s.endswith(end):
                s, unit = s[: -len(end)], u
                break
    parts = s.split("_")
    words: list[str] = []
    i = 0
    while i < len(parts):
        pair = "_".join(parts[i:i + 2])
        if i + 1 < len(parts) and pair in _WORDS:
            words.append(_WORDS[pair])
            i += 2
            continue
        words.append(_WORDS.get(parts[i], parts[i]))
        i += 1
    text = " ".join(w for w in words if w)
    # an interval end says its level: "σ 95 % low", not a bare "σ low"
    text = re.sub(r" (low|high)$", r" 95 % \1", text)
    return text, unit


def column_label(name: str, *, confidence: float = 0.95) -> str:
    """The header of a column (with its display unit); interval ends (``*_lo``,
    ``*_hi``) name the interval's level (``confidence``)."""
    s = str(name)
    if s in COLUMN_LABELS:
        return COLUMN_LABELS[s]
    words, unit = _name_and_unit(s)
    words = words.replace("95 %", f"{100 * confidence:g} %")
    return f"{words} ({unit})" if unit else words


def quantity_name(name: str) -> str:
    """What a column holds, without its unit: 'S1_shift_eV' -> 'S1 shift', 'dEST_eV' -> 'ΔEST'
    (for plot legends, captions and the ``quantity`` cells of statistics tables, whose other
    columns carry the unit). A name that is not a column name is returned as it is."""
    s = str(name)
    if "_" not in s:
        return s
    return re.sub(r" \([^()]*\)$", "", column_label(s))


def axis_label(name: str) -> str:
    """An axis title with the unit a plot draws the column in (meV for shifts, as the tables)."""
    return column_label(name)


def _fmt(value: Any, digits: int) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "–"
    if isinstance(value, float):
        if math.isinf(value):
            return "∞"
        return f"{value:.{digits}f}"
    return str(value)


def pick_columns(columns: list[str], max_columns: int | None, *, keep: tuple[str, ...] = ()) -> list[str]:
    """The columns a table shows: :data:`LEADING_COLUMNS` first, then (when there are more than
    ``max_columns``) the most telling ones by :data:`PRIORITY_COLUMNS`, then ``keep`` (columns
    that must stay, e.g. a converged flag that is False somewhere), then the rest in their order;
    the shown ones keep the given order after the leading ones."""
    cols = [str(c) for c in columns]
    lead = [c for c in LEADING_COLUMNS if c in cols]
    rest = [c for c in cols if c not in lead]
    if max_columns is None or len(lead) + len(rest) <= max_columns:
        return lead + rest
    ranked = ([c for c in keep if c in rest] + [c for c in PRIORITY_COLUMNS if c in rest and c not in keep]
              + [c for c in rest if c not in PRIORITY_COLUMNS and c not in keep])
    chosen = set(ranked[: max(max_columns - len(lead), 0)])
    return lead + [c for c in rest if c in chosen]


def _vacuum_rows(t: pd.DataFrame) -> pd.Series:
    if "kind" in t.columns:
        return t["kind"].astype(str).eq("vacuum")
    if "radius_A" in t.columns:
        return pd.to_numeric(t["radius_A"], errors="coerce").eq(0.0)
    return pd.Series(False, index=t.index)


def _is_count(name: str, col: pd.Series) -> bool:
    """A float column of whole numbers with no unit (counts with a missing value)."""
    s = str(name)
    if any(s.endswith(end) for end, _ in _UNITS) or not s.startswith(_COUNT_PREFIXES):
        return False
    v = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)
    fin = v[np.isfinite(v)]
    return bool(np.all(fin == np.round(fin)))


def display_table(df: pd.DataFrame, *, max_columns: int | None = None, mean_in_meV: bool | None = None) -> pd.DataFrame:
    """A copy of ``df`` to show: molecule, frame and radius first, shifts and σ
    in meV (1 decimal), other energies in eV (3 decimals), human headers.

    A vacuum row (``kind == "vacuum"`` or radius 0 with no charges) reads
    "vacuum" in the radius column and leaves "SCF converged" blank, since it
    is the reference, not a judged radius; an infinite radius reads
    "periodic". Cells are strings. A ``quantity`` column's column names read
    as names (:func:`quantity_name`). Interval headers name the level of
    ``df.attrs["confidence"]`` (default 95 %).

    Parameters
    ----------
    df : pandas.DataFrame
    max_columns : int, optional
        Show at most this many columns (:func:`pick_columns`); the left-out
        ones are listed in ``out.attrs["hidden_columns"]``. An SCF flag that
        is True on every judged row is left out first (the caller says "every
        SCF converged"); one that is False somewhere always stays.
    mean_in_meV : bool, optional
        Show ``mean_eV`` (and its interval ends) in meV: default when every
        ``quantity`` is a shift or another meV column (a table of shifts).
    """
    if df is None or len(df) == 0:
        return pd.DataFrame()
    vacuum_all = _vacuum_rows(df.reset_index(drop=True))
    cols = list(df.columns)
    keep: tuple[str, ...] = ()
    if "converged" in df.columns and max_columns is not None:
        judged = df["converged"].reset_index(drop=True)[~vacuum_all]
        if judged.astype(bool).all():
            cols = [c for c in cols if c != "converged"]
        else:
            keep = ("converged",)
    shown = pick_columns(cols, max_columns, keep=keep)
    hidden = [str(c) for c in df.columns if str(c) not in shown]
    t = df[shown].reset_index(drop=True)
    vacuum = vacuum_all
    if mean_in_meV is None:
        q = t["quantity"] if "quantity" in t.columns else pd.Series([], dtype=object)
        mean_in_meV = bool(len(q)) and all(shown_in_meV(str(v)) for v in q)
    conf = float(df.attrs.get("confidence", 0.95))
    out = {}
    for c in t.columns:
        col = t[c]
        in_meV = shown_in_meV(c) or (mean_in_meV and str(c) in ("mean_eV", "mean_lo_eV", "mean_hi_eV"))
        if in_meV and pd.api.types.is_numeric_dtype(col):
            cells = [_fmt(1e3 * float(v), 1) for v in col]
        elif pd.api.types.is_float_dtype(col):
            digits = 3 if str(c).endswith("_eV") or c in ("normality_p", "skewness", "excess_kurtosis", "r") else 2
            if str(c).endswith("_A"):
                digits = 1
            if _is_count(c, col):
                digits = 0
            cells = [_fmt(float(v), digits) for v in col]
        else:
            cells = [_fmt(v, 3) for v in col]
        if c == "radius_A":
            cells = ["vacuum" if vac else ("periodic" if cell == "∞" else cell)
                     for vac, cell in zip(vacuum, cells)]
        if c == "converged":
            cells = ["" if vac else cell for vac, cell in zip(vacuum, cells)]
        if c == "quantity":
            cells = [quantity_name(cell) for cell in cells]
        header = column_label(c, confidence=conf)
        if in_meV and not shown_in_meV(c):
            header = header.replace("(eV)", "(meV)")
        out[header] = cells
    shown_df = pd.DataFrame(out)
    shown_df.attrs["hidden_columns"] = hidden
    return shown_df


def left_out_note(shown: pd.DataFrame, where: str = "in the store and the export") -> str:
    """What a shortened :func:`display_table` copy leaves out, in words ('' when nothing):
    "every SCF converged" for a dropped SCF flag, else the headers of the columns not shown."""
    hidden = shown.attrs.get("hidden_columns", [])
    notes = ["every SCF converged"] if "converged" in hidden else []
    rest = [column_label(c) for c in hidden if c != "converged"]
    if rest:
        notes.append(f"not shown here ({where}): " + ", ".join(rest))
    return "; ".join(notes)
