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
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

#: columns shown first, in this order, when present
LEADING_COLUMNS = ("molecule", "frame", "radius_A", "polarizable_radius_A")

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
    "wall_s": "time (s)",
    "n": "n",
    "quantity": "quantity",
    "skewness": "skewness",
    "excess_kurtosis": "excess kurtosis",
    "normality_p": "normality p",
    "sigma_ci_method": "σ interval",
}

#: words for the parts of a column name
_WORDS = {"dEST": "ΔEST", "osc": "oscillator strength", "sigma": "σ", "lo": "low", "hi": "high",
          "followed": "followed", "vacuum": "vacuum", "shift": "shift", "polarization": "polarization",
          "mean": "mean", "fixed": "fixed charges", "follow": "follow", "overlap": "overlap"}

#: display units by name ending
_UNITS = (("_meV", "meV"), ("_eV", "eV"), ("_A", "Å"), ("_s", "s"), ("_e", "e"), ("_D", "D"))


def shown_in_meV(name: str) -> bool:
    """Whether a column in eV is shown in meV: environment shifts, polarization parts and widths
    (σ, the spread of a host-guest difference)."""
    s = str(name)
    return s.endswith("_eV") and ("_shift" in s or "_polarization" in s or s.startswith(("sigma", "spread")))


def column_label(name: str) -> str:
    """The header of a column (with its display unit)."""
    s = str(name)
    if s in COLUMN_LABELS:
        return COLUMN_LABELS[s]
    unit = ""
    if shown_in_meV(s):
        s, unit = s[: -len("_eV")], "meV"
    else:
        for end, u in _UNITS:
            if s.endswith(end):
                s, unit = s[: -len(end)], u
                break
    words = " ".join(_WORDS.get(w, w) for w in s.split("_"))
    return f"{words} ({unit})" if unit else words


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


def display_table(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``df`` to show: molecule, frame and radius first, shifts and σ
    in meV (1 decimal), other energies in eV (3 decimals), human headers.

    A vacuum row (``kind == "vacuum"`` or radius 0 with no charges) reads
    "vacuum" in the radius column and leaves "SCF converged" blank, since it
    is the reference, not a judged radius; an infinite radius reads
    "periodic". Cells are strings.
    """
    if df is None or len(df) == 0:
        return pd.DataFrame()
    lead = [c for c in LEADING_COLUMNS if c in df.columns]
    t = df[lead + [c for c in df.columns if c not in lead]].reset_index(drop=True)
    if "kind" in t.columns:
        vacuum = t["kind"].astype(str).eq("vacuum")
    elif "radius_A" in t.columns:
        vacuum = pd.to_numeric(t["radius_A"], errors="coerce").eq(0.0)
    else:
        vacuum = pd.Series(False, index=t.index)
    out = {}
    for c in t.columns:
        col = t[c]
        if shown_in_meV(c) and pd.api.types.is_numeric_dtype(col):
            cells = [_fmt(1e3 * float(v), 1) for v in col]
        elif pd.api.types.is_float_dtype(col):
            digits = 3 if str(c).endswith("_eV") or c in ("normality_p", "skewness", "excess_kurtosis") else 2
            if str(c).endswith("_A"):
                digits = 1
            cells = [_fmt(float(v), digits) for v in col]
        else:
            cells = [_fmt(v, 3) for v in col]
        if c == "radius_A":
            cells = ["vacuum" if vac else ("periodic" if cell == "∞" else cell)
                     for vac, cell in zip(vacuum, cells)]
        if c == "converged":
            cells = ["" if vac else cell for vac, cell in zip(vacuum, cells)]
        out[column_label(c)] = cells
    return pd.DataFrame(out)
