"""JSON of study results: their kind, and flat tables that come back exactly.

Every result's JSON is an object with a ``"kind"`` (``"clusterlab.<Type>"``)
that :func:`json_of_kind` checks on the way in.

``pandas.DataFrame.to_json`` rounds floats (10 digits by default); results
that promise an exact round trip keep each column as a list of Python
numbers instead (``repr`` of a float is exact), with its dtype, and NaN as
``null`` so the text stays standard JSON.
"""

from __future__ import annotations

import json
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["json_of_kind", "table_to_dict", "table_from_dict"]


def json_of_kind(text: str, kind: str, what: str) -> dict[str, Any]:
    """The JSON object in ``text`` after checking that its ``"kind"`` is ``kind``.

    Raises
    ------
    InputError
        Text that is not JSON, or JSON of another kind (``what`` names the wanted one).
    """
    try:
        d = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"not JSON text: {exc}") from exc
    if not isinstance(d, dict) or d.get("kind") != kind:
        raise InputError(f"this JSON is not {what} (kind {kind!r}).")
    return d


def table_to_dict(table: pd.DataFrame) -> dict[str, Any]:
    """``{"columns": [{"name", "dtype", "values"}, ...], "n_rows"}`` of a table
    with a default (0..n-1) index and columns of numbers, booleans or strings.

    Raises
    ------
    InputError
        A table with another index (it would not come back).
    """
    if not table.index.equals(pd.RangeIndex(len(table))):
        raise InputError("only tables with the default index 0..n-1 are written; call reset_index() first.")
    cols = []
    for name in table.columns:
        s = table[name]
        values = s.tolist()
        if s.dtype.kind == "f":
            values = [None if v != v else v for v in values]          # NaN -> null
        cols.append({"name": str(name), "dtype": str(s.dtype), "values": values})
    return {"columns": cols, "n_rows": int(len(table))}


def table_from_dict(d: Mapping[str, Any]) -> pd.DataFrame:
    """Inverse of :func:`table_to_dict`."""
    data = {}
    for c in d["columns"]:
        vals = c["values"]
        if c["dtype"].startswith("float"):
            vals = [np.nan if v is None else v for v in vals]
        data[c["name"]] = pd.Series(vals, dtype=c["dtype"])
    return pd.DataFrame(data, index=pd.RangeIndex(int(d["n_rows"])))
