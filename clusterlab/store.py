"""Resumable result store: one SQLite file per study.

Every finished cluster calculation is written to the store in its own
transaction as soon as it reaches the client, so a study that is stopped in
any way (Ctrl-C, SIGKILL, a lost node) keeps every result it had finished and
a re-run skips them.  Records are keyed by :func:`task_key`, a SHA-256 of the
canonical JSON of everything that determines the result, so the same
calculation can never be stored twice.

Durability
----------
The file runs in WAL (write-ahead log) mode, so readers in other processes
(a notebook watching a running study, ``counts()`` from a shell) never block
the writer and never see a half-written record.  ``synchronous=FULL`` is the
default: every commit is fsynced, so a result that was reported as stored
survives a power loss or kernel crash too, not only a killed process.  The
cost is one fsync per result (about 1-10 ms on a local disk), negligible
next to a cluster calculation of seconds to hours.  ``synchronous="NORMAL"``
keeps the file consistent after any crash but may roll back the last few
commits after a power loss; those results would simply be recomputed.

Notes
-----
SQLite over a network file system (NFS, Lustre) is unsafe for concurrent
access; keep the store on a local disk of the machine that runs the client.
Workers never touch the store.
"""

from __future__ import annotations

import json
import logging
import math
import os
import socket
import sqlite3
import threading
import time
import warnings
from collections.abc import Iterator, Mapping, MutableMapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .versions import __version__
from .errors import InputError, ProvenanceError, StudyFileError

_log = logging.getLogger(__name__)

__all__ = [
    "ResultStore",
    "StoreFolderNotice",
    "StoredRecord",
    "task_key",
    "canonical_json",
    "KEY_FLOAT_DECIMALS",
    "STATUSES",
]

#: Decimal places floats are rounded to before hashing (1e-6 Å for radii).
KEY_FLOAT_DECIMALS = 6

#: Allowed values of the ``status`` column.
STATUSES = ("done", "failed")

_SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS results (
    key           TEXT PRIMARY KEY,
    kind          TEXT NOT NULL,
    status        TEXT NOT NULL CHECK (status IN ('done', 'failed')),
    spec_json     TEXT NOT NULL,
    result_json   TEXT,
    summary_json  TEXT,
    frame         INTEGER,
    molecule      INTEGER,
    radius_A      REAL,
    method_key    TEXT,
    error         TEXT,
    traceback     TEXT,
    n_failures    INTEGER NOT NULL DEFAULT 0,
    created_at    REAL NOT NULL,
    stored_at     REAL NOT NULL,
    wall_s        REAL,
    host          TEXT,
    worker        TEXT,
    version       TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS results_status ON results (status, kind);
CREATE INDEX IF NOT EXISTS results_site ON results (frame, molecule, radius_A);
CREATE INDEX IF NOT EXISTS results_method ON results (method_key);
CREATE TABLE IF NOT EXISTS meta (
    name  TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
"""

_INDEXED = ("frame", "molecule", "radius_A", "method_key")

_BASE_COLUMNS = (
    "key", "kind", "status", "frame", "molecule", "radius_A", "method_key",
    "wall_s", "host", "worker", "version", "created_at", "stored_at",
    "n_failures", "error",
)


# --------------------------------------------------------------------------
# keys


def _normalise(value: Any, decimals: int, path: str) -> Any:
    """Turn ``value`` into plain JSON types with floats rounded."""
    if value is None or isinstance(value, (bool, str)):
        return value
    # numpy scalars and 0-d arrays expose .item(); check before int/float
    if hasattr(value, "item") and callable(value.item) and getattr(value, "ndim", 0) == 0:
        value = value.item()
        if isinstance(value, bool):
            return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise InputError(
                f"key field {path!r} is {value!r}; key fields must be finite numbers, "
                "strings, booleans, None, lists or dicts of those"
            )
        r = round(value, decimals)
        if r == 0.0:
            return 0  # -0.0 and 0.0 give the same key
        if r.is_integer():
            return int(r)  # 5.0 and 5 give the same key
        return r
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise InputError(f"key field {path!r} has a non-string dict key {k!r}")
            out[k] = _normalise(v, decimals, f"{path}.{k}")
        return out
    if isinstance(value, (list, tuple)) or (hasattr(value, "tolist") and hasattr(value, "ndim")):
        seq = value.tolist() if hasattr(value, "tolist") else value
        return [_normalise(v, decimals, f"{path}[{i}]") for i, v in enumerate(seq)]
    if isinstance(value, Path):
        return str(value)
    raise InputError(
        f"key field {path!r} has type {type(value).__name__}; use numbers, strings, "
        "booleans, None, lists or dicts (give a method as its key string or its dict)"
    )


def canonical_json(fields: Mapping[str, Any], *, decimals: int = KEY_FLOAT_DECIMALS) -> str:
    """Canonical JSON text of ``fields``: sorted keys, no spaces, floats rounded.

    Floats are rounded to ``decimals`` places; a float that is then integral
    is written as an integer (so ``radius_A=5`` and ``radius_A=5.0`` agree)
    and ``-0.0`` is written as ``0``.  numpy scalars and arrays become plain
    numbers and lists.

    Raises
    ------
    InputError
        For NaN/inf or types that have no canonical JSON form.
    """
    norm = _normalise(dict(fields), decimals, "fields")
    return json.dumps(norm, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def task_key(*, decimals: int = KEY_FLOAT_DECIMALS, **fields: Any) -> str:
    """Stable identity of one calculation: SHA-256 hex of canonical JSON.

    The one key function of clusterlab.  Pass everything that determines
    the result, typically ``film_id`` (film content hash), ``frame``,
    ``molecule``, ``radius_A``, ``rule``, ``qm_shell``, ``method_key`` and
    ``kind``.  The package version is added as ``clusterlab_version`` unless
    given, so a new release never silently reuses old numbers.

    Parameters
    ----------
    decimals : int
        Decimal places floats are rounded to (default 6: radius noise below
        1e-6 Å gives the same key).
    **fields
        JSON-like values (numbers, strings, booleans, None, lists, dicts).

    Returns
    -------
    str
        64 lower-case hex digits.  The same fields give the same key in any
        process, on any machine, with any dict order.

    Examples
    --------
    >>> a = task_key(film_id="f0", frame=0, molecule=3, radius_A=12.0, kind="excitations")
    >>> a == task_key(kind="excitations", radius_A=12.0000000001, molecule=3, frame=0, film_id="f0")
    True
    >>> len(a)
    64
    """
    import hashlib

    if not fields:
        raise InputError("task_key() needs at least one field, e.g. film_id=..., frame=...")
    fields.setdefault("clusterlab_version", __version__)
    text = canonical_json(fields, decimals=decimals)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------
# records


@dataclass(frozen=True)
class StoredRecord:
    """One row of the store.

    Attributes
    ----------
    key, kind, status : str
        Task key, task kind, ``"done"`` or ``"failed"``.
    spec : dict
        The task spec as it was submitted.
    result_json : str or None
        The result text (``None`` for failures); opaque to the store.
    summary : dict
        Flat summary (scalars) of the result; ``{}`` for failures.
    frame, molecule : int or None
    radius_A : float or None
    method_key : str or None
    error, traceback : str or None
        Exception text and traceback of the last failure.
    n_failures : int
        How many times this key has failed (kept after a later success).
    created_at, stored_at : float
        Unix time (s) of the first write of this key and of the current record.
    wall_s : float or None
        Calculation wall time on the worker (s).
    host, worker : str or None
        Where it ran.
    version : str
        clusterlab version that wrote the record.
    """

    key: str
    kind: str
    status: str
    spec: dict
    result_json: str | None
    summary: dict
    frame: int | None
    molecule: int | None
    radius_A: float | None
    method_key: str | None
    error: str | None
    traceback: str | None
    n_failures: int
    created_at: float
    stored_at: float
    wall_s: float | None
    host: str | None
    worker: str | None
    version: str

    @property
    def done(self) -> bool:
        """True for a successful record."""
        return self.status == "done"


class _Meta(MutableMapping):
    """Dict-like view on the ``meta`` table (values stored as JSON)."""

    def __init__(self, store: ResultStore) -> None:
        self._store = store

    def __getitem__(self, name: str) -> Any:
        row = self._store._query("SELECT value FROM meta WHERE name = ?", (name,))
        if not row:
            raise KeyError(name)
        return json.loads(row[0][0])

    def __setitem__(self, name: str, value: Any) -> None:
        if not isinstance(name, str):
            raise InputError(f"meta name {name!r} must be a string")
        text = json.dumps(value, sort_keys=True)
        self._store._write(
            "INSERT INTO meta (name, value) VALUES (?, ?) "
            "ON CONFLICT(name) DO UPDATE SET value = excluded.value",
            (name, text),
        )

    def __delitem__(self, name: str) -> None:
        if name not in self:
            raise KeyError(name)
        self._store._write("DELETE FROM meta WHERE name = ?", (name,))

    def __iter__(self) -> Iterator[str]:
        return iter([r[0] for r in self._store._query("SELECT name FROM meta ORDER BY name")])

    def __len__(self) -> int:
        return int(self._store._query("SELECT COUNT(*) FROM meta")[0][0])

    def __repr__(self) -> str:
        return f"StoreMeta({dict(self)!r})"


def _json_default(obj: Any) -> Any:
    if hasattr(obj, "item") and getattr(obj, "ndim", None) == 0:
        return obj.item()
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"{type(obj).__name__} is not JSON serialisable")


def _dumps(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, default=_json_default)


def _flatten(d: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Flatten nested dicts with dotted names; lists become JSON text."""
    out: dict[str, Any] = {}
    for k, v in d.items():
        name = f"{prefix}{k}"
        if isinstance(v, Mapping):
            out.update(_flatten(v, name + "."))
        elif isinstance(v, (list, tuple)):
            out[name] = json.dumps(v, default=_json_default)
        else:
            out[name] = v
    return out


class StoreFolderNotice(UserWarning):
    """Issued when opening a result store creates the folder it lives in (a
    mistyped path then shows at once instead of results landing in a new,
    unexpected folder). Silence it with ``warnings.filterwarnings("ignore",
    category=StoreFolderNotice)``."""


def _make_parent(path: Path) -> str | None:
    """Create the missing folders above a store file; say which, once (warning and log line).
    Returns the created folder (absolute) or None when it existed."""
    parent = path.parent
    if parent.exists():
        return None
    top = parent
    while not top.parent.exists() and top.parent != top:
        top = top.parent  # the outermost folder that will be new
    parent.mkdir(parents=True, exist_ok=True)
    where = str(parent.resolve())
    msg = (f"result store {str(path)!r}: folder {where!r} did not exist and was created"
           + (f" (new from {str(top.resolve())!r} down)" if top != parent else ""))
    _log.info(msg)
    warnings.warn(msg, StoreFolderNotice, stacklevel=3)
    return where


class ResultStore:
    """SQLite result store of one study.

    Parameters
    ----------
    path : str or os.PathLike
        The ``.sqlite`` file; created if missing. Missing parent folders are
        created too, with a :class:`StoreFolderNotice` warning (and an INFO
        log line) naming the new folder; :attr:`created_folder` holds it
        (None when the folder existed).
    readonly : bool
        Open for reading only (another process may be writing).  The file
        must exist.
    synchronous : {"FULL", "NORMAL"}
        SQLite durability level (see the module notes); default ``"FULL"``.
    timeout_s : float
        How long a connection waits for a lock held by another connection
        before raising (busy timeout), in seconds.

    Raises
    ------
    StudyFileError
        If ``readonly`` and the file does not exist, or the file is not a
        clusterlab store of a known schema version.

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> with ResultStore(os.path.join(d, "s.sqlite")) as st:
    ...     k = task_key(film_id="f", frame=0, molecule=1, radius_A=8.0, kind="excitations")
    ...     st.put(k, {"kind": "excitations"}, '{"e": 1}', {"S1_eV": 3.1}, kind="excitations")
    ...     st.counts()["done"]
    True
    1
    """

    def __init__(
        self,
        path: str | os.PathLike,
        *,
        readonly: bool = False,
        synchronous: str = "FULL",
        timeout_s: float = 60.0,
    ) -> None:
        self.path = Path(path)
        self.readonly = bool(readonly)
        sync = str(synchronous).upper()
        if sync not in ("FULL", "NORMAL", "EXTRA"):
            raise InputError(
                f"synchronous={synchronous!r} is not valid; use 'FULL' (default) or 'NORMAL'"
            )
        self._lock = threading.RLock()
        self._conn = None
        self.created_folder: str | None = None
        if self.path.is_dir():
            raise StudyFileError(
                f"result store {str(self.path)!r} is a directory; give the path of a .sqlite file "
                f"(e.g. {str(self.path / 'results.sqlite')!r})"
            )
        if readonly:
            if not self.path.exists():
                raise StudyFileError(f"result store {str(self.path)!r} does not exist")
            uri = f"file:{self.path.resolve().as_posix()}?mode=ro"
            conn = sqlite3.connect(uri, uri=True, timeout=timeout_s, check_same_thread=False)
        else:
            self.created_folder = _make_parent(self.path)
            conn = sqlite3.connect(
                str(self.path), timeout=timeout_s, check_same_thread=False,
                isolation_level=None,  # explicit BEGIN/COMMIT below
            )
        self._conn: sqlite3.Connection | None = conn
        conn.execute(f"PRAGMA busy_timeout = {int(timeout_s * 1000)}")
        try:
            if not readonly:
                mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise StudyFileError(
                        f"result store {str(self.path)!r} could not switch to WAL mode "
                        f"(got {mode!r}); is it on a file system without shared memory?"
                    )
                conn.execute(f"PRAGMA synchronous = {sync}")
                with self._tx():
                    for stmt in _SCHEMA.split(";"):
                        if stmt.strip():
                            conn.execute(stmt)
                    conn.execute(
                        "INSERT OR IGNORE INTO meta (name, value) VALUES (?, ?)",
                        ("created_utc", json.dumps(time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()))),
                    )
                    conn.execute(
                        "INSERT OR IGNORE INTO meta (name, value) VALUES (?, ?)",
                        ("schema_version", json.dumps(_SCHEMA_VERSION)),
                    )
                    conn.execute(
                        "INSERT OR IGNORE INTO meta (name, value) VALUES (?, ?)",
                        ("clusterlab_version", json.dumps(__version__)),
                    )
            tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        except sqlite3.DatabaseError as exc:
            conn.close()
            self._conn = None
            raise StudyFileError(f"{str(self.path)!r} is not a usable SQLite result store: {exc}") from exc
        if not {"results", "meta"} <= tables:
            conn.close()
            self._conn = None
            raise StudyFileError(
                f"{str(self.path)!r} is not a clusterlab result store "
                f"(tables {sorted(tables)}, expected 'results' and 'meta')"
            )
        version = json.loads(
            conn.execute("SELECT value FROM meta WHERE name='schema_version'").fetchone()[0]
        )
        if version != _SCHEMA_VERSION:
            conn.close()
            self._conn = None
            raise StudyFileError(
                f"result store {str(self.path)!r} has schema version {version}; "
                f"this clusterlab reads version {_SCHEMA_VERSION}"
            )
        self.meta: MutableMapping[str, Any] = _Meta(self)

    # ------------------------------------------------------------------ plumbing
    @property
    def conn(self) -> sqlite3.Connection:
        if self._conn is None:
            raise StudyFileError(f"result store {str(self.path)!r} is closed")
        return self._conn

    class _Tx:
        def __init__(self, store: ResultStore) -> None:
            self.store = store

        def __enter__(self) -> sqlite3.Connection:
            self.store._lock.acquire()
            conn = self.store.conn
            conn.execute("BEGIN IMMEDIATE")
            return conn

        def __exit__(self, exc_type, exc, tb) -> None:
            conn = self.store.conn
            try:
                if exc_type is None:
                    conn.execute("COMMIT")
                else:
                    conn.execute("ROLLBACK")
            finally:
                self.store._lock.release()

    def _tx(self) -> ResultStore._Tx:
        if self.readonly:
            raise StudyFileError(f"result store {str(self.path)!r} was opened read-only")
        return ResultStore._Tx(self)

    def _write(self, sql: str, params: tuple = ()) -> int:
        with self._tx() as conn:
            cur = conn.execute(sql, params)
            return cur.rowcount

    def _query(self, sql: str, params: tuple = ()) -> list[tuple]:
        with self._lock:
            return self.conn.execute(sql, params).fetchall()

    # ------------------------------------------------------------------ writing
    @staticmethod
    def _index_values(spec: Mapping, summary: Mapping, given: Mapping) -> dict:
        payload = spec.get("payload", {}) if isinstance(spec.get("payload"), Mapping) else {}
        out = {}
        for name in _INDEXED:
            for src in (given, summary, spec, payload):
                if src.get(name) is not None:
                    out[name] = src[name]
                    break
            else:
                out[name] = None
        for name in ("frame", "molecule"):
            if out[name] is not None:
                out[name] = int(out[name])
        if out["radius_A"] is not None:
            out["radius_A"] = float(out["radius_A"])
        if out["method_key"] is not None and not isinstance(out["method_key"], str):
            out["method_key"] = _dumps(out["method_key"])
        return out

    def put(
        self,
        key: str,
        spec: Mapping[str, Any],
        result_json: str,
        summary: Mapping[str, Any] | None = None,
        *,
        kind: str | None = None,
        frame: int | None = None,
        molecule: int | None = None,
        radius_A: float | None = None,
        method_key: str | None = None,
        wall_s: float | None = None,
        host: str | None = None,
        worker: str | None = None,
    ) -> bool:
        """Store a finished result, atomically, in its own transaction.

        A key that is already ``"done"`` is left untouched (the first result
        wins, no duplicate can appear); a ``"failed"`` record of the key is
        replaced (its failure count is kept).

        Parameters
        ----------
        key : str
            From :func:`task_key`.
        spec : dict
            The task spec (JSON-serialisable).
        result_json : str
            The full result as text (opaque to the store).
        summary : dict, optional
            Flat scalars shown by :meth:`to_frame`.
        kind : str, optional
            Task kind; default ``spec["kind"]``.
        frame, molecule, radius_A, method_key : optional
            Indexed columns; by default taken from ``summary``, ``spec`` or
            ``spec["payload"]``.
        wall_s : float, optional
            Calculation time on the worker (s).
        host, worker : str, optional
            Where it ran; ``host`` defaults to this machine.

        Returns
        -------
        bool
            True if the record was written, False if the key was already done.
        """
        if not isinstance(result_json, str):
            raise InputError(
                f"result_json must be a str (the result's JSON text), got {type(result_json).__name__}"
            )
        summary = dict(summary or {})
        kind = kind or spec.get("kind")
        if not kind:
            raise InputError(f"put({key[:12]}...): no kind given and spec has no 'kind'")
        idx = self._index_values(
            spec, summary,
            {"frame": frame, "molecule": molecule, "radius_A": radius_A, "method_key": method_key},
        )
        now = time.time()
        with self._tx() as conn:
            cur = conn.execute(
                """
                INSERT INTO results (key, kind, status, spec_json, result_json, summary_json,
                    frame, molecule, radius_A, method_key, error, traceback, n_failures,
                    created_at, stored_at, wall_s, host, worker, version)
                VALUES (?, ?, 'done', ?, ?, ?, ?, ?, ?, ?, NULL, NULL, 0, ?, ?, ?, ?, ?, ?)
                ON CONFLICT(key) DO UPDATE SET
                    kind = excluded.kind, status = 'done', spec_json = excluded.spec_json,
                    result_json = excluded.result_json, summary_json = excluded.summary_json,
                    frame = excluded.frame, molecule = excluded.molecule,
                    radius_A = excluded.radius_A, method_key = excluded.method_key,
                    stored_at = excluded.stored_at, wall_s = excluded.wall_s,
                    host = excluded.host, worker = excluded.worker, version = excluded.version,
                    error = NULL, traceback = NULL
                WHERE results.status != 'done'
                """,
                (
                    key, kind, _dumps(dict(spec)), result_json, _dumps(summary),
                    idx["frame"], idx["molecule"], idx["radius_A"], idx["method_key"],
                    now, now, wall_s, host or socket.gethostname(), worker, __version__,
                ),
            )
            return cur.rowcount > 0

    def put_failure(
        self,
        key: str,
        spec: Mapping[str, Any],
        error: str,
        traceback: str | None = None,
        *,
        kind: str | None = None,
        wall_s: float | None = None,
        host: str | None = None,
        worker: str | None = None,
    ) -> bool:
        """Record a failed calculation (error text and traceback).

        A key that is already ``"done"`` is left untouched.  A repeated
        failure updates the error and increments ``n_failures``.

        Returns
        -------
        bool
            True if written, False if the key was already done.
        """
        kind = kind or spec.get("kind")
        if not kind:
            raise InputError(f"put_failure({key[:12]}...): no kind given and spec has no 'kind'")
        idx = self._index_values(spec, {}, {})
        now = time.time()
        with self._tx() as conn:
            cur = conn.execute(
                """
                INSERT INTO results (key, kind, status, spec_json, result_json, summary_json,
                    frame, molecule, radius_A, method_key, error, traceback, n_failures,
                    created_at, stored_at, wall_s, host, worker, version)
                VALUES (?, ?, 'failed', ?, NULL, '{}', ?, ?, ?, ?, ?, ?, 1, ?, ?, ?, ?, ?, ?)
                ON CONFLICT(key) DO UPDATE SET
                    error = excluded.error, traceback = excluded.traceback,
                    n_failures = results.n_failures + 1, stored_at = excluded.stored_at,
                    wall_s = excluded.wall_s, host = excluded.host, worker = excluded.worker,
                    version = excluded.version
                WHERE results.status != 'done'
                """,
                (
                    key, kind, _dumps(dict(spec)),
                    idx["frame"], idx["molecule"], idx["radius_A"], idx["method_key"],
                    str(error), traceback, now, now, wall_s,
                    host or socket.gethostname(), worker, __version__,
                ),
            )
            return cur.rowcount > 0

    # ------------------------------------------------------------------ reading
    def has(self, key: str, status: str = "done") -> bool:
        """True if ``key`` has a record of ``status`` (``None``: any status)."""
        if status is None:
            rows = self._query("SELECT 1 FROM results WHERE key = ?", (key,))
        else:
            rows = self._query("SELECT 1 FROM results WHERE key = ? AND status = ?", (key, status))
        return bool(rows)

    def __contains__(self, key: object) -> bool:
        return isinstance(key, str) and self.has(key)

    def get(self, key: str) -> StoredRecord | None:
        """The record of ``key`` (done or failed), or None if there is none."""
        cols = [f.name for f in StoredRecord.__dataclass_fields__.values()]
        sql_cols = [
            "spec_json" if c == "spec" else "summary_json" if c == "summary" else c for c in cols
        ]
        rows = self._query(f"SELECT {', '.join(sql_cols)} FROM results WHERE key = ?", (key,))
        if not rows:
            return None
        vals = dict(zip(cols, rows[0]))
        vals["spec"] = json.loads(vals["spec"])
        vals["summary"] = json.loads(vals["summary"] or "{}")
        return StoredRecord(**vals)

    def _check_status(self, status: str | None) -> None:
        if status is not None and status not in STATUSES:
            raise InputError(f"status={status!r} is not valid; use 'done', 'failed' or None (all)")

    def keys(self, status: str | None = "done", kind: str | None = None) -> list[str]:
        """Keys with ``status`` (``None``: all), optionally of one ``kind``."""
        self._check_status(status)
        sql, params = "SELECT key FROM results WHERE 1=1", []
        if status is not None:
            sql += " AND status = ?"
            params.append(status)
        if kind is not None:
            sql += " AND kind = ?"
            params.append(kind)
        return [r[0] for r in self._query(sql + " ORDER BY created_at, key", tuple(params))]

    def counts(self, kind: str | None = None) -> dict[str, int]:
        """Number of records: ``{"done": n, "failed": m, "total": n + m}``."""
        sql, params = "SELECT status, COUNT(*) FROM results", ()
        if kind is not None:
            sql, params = sql + " WHERE kind = ?", (kind,)
        out = {s: 0 for s in STATUSES}
        for status, n in self._query(sql + " GROUP BY status", params):
            out[status] = int(n)
        out["total"] = sum(out[s] for s in STATUSES)
        return out

    def __len__(self) -> int:
        return self.counts()["total"]

    # ------------------------------------------------------------------ provenance
    def _grouped(self, expr: str, kind: str | None) -> dict[str, int]:
        sql = f"SELECT {expr} AS v, COUNT(*) FROM results WHERE v IS NOT NULL"
        params: tuple = ()
        if kind is not None:
            sql, params = sql + " AND kind = ?", (kind,)
        return {str(v): int(n) for v, n in self._query(sql + " GROUP BY v ORDER BY v", params)}

    def film_ids(self, kind: str | None = None) -> dict[str, int]:
        """Film content ids of the stored records (any status), with their counts.

        A record's film is the ``film_id`` of its task's film spec
        (``spec["payload"]["film"]["film_id"]``); records without one are not counted.
        """
        return self._grouped("json_extract(spec_json, '$.payload.film.film_id')", kind)

    def method_keys(self, kind: str | None = None) -> dict[str, int]:
        """Method keys of the stored records (any status), with their counts."""
        return self._grouped("method_key", kind)

    def films(self) -> dict[str, dict[str, Any]]:
        """Every film this store holds or was given, by content id.

        Returns ``{film_id: {"topology": str, "n_records": int}}``: the films
        registered by :meth:`claim_film` and those named by stored records
        (a store written before films were registered has only the latter).
        """
        registered = dict(self.meta.get("films", {}))
        counts = self.film_ids()
        tops = dict(self._query(
            "SELECT json_extract(spec_json, '$.payload.film.film_id') AS v, "
            "MIN(json_extract(spec_json, '$.payload.film.topology')) FROM results "
            "WHERE v IS NOT NULL GROUP BY v"
        ))
        out: dict[str, dict[str, Any]] = {}
        for fid in sorted(set(registered) | set(counts)):
            top = (registered.get(fid) or {}).get("topology") or tops.get(fid) or ""
            out[fid] = {"topology": str(top), "n_records": counts.get(fid, 0)}
        return out

    def claim_film(self, film_id: str, *, topology: str = "", allow_another: bool = False) -> None:
        """Register the film a run writes into this store; refuse another film.

        A store holds the results of one film: the first run registers its
        content id (``store.meta["films"]``), and a later run of a film with
        another id (another film, the same film with moved atoms or other
        charges) is refused.  ``allow_another=True`` keeps a second film in
        the same store on purpose; its records stay apart by film id, and
        :func:`clusterlab.study.sample.site_table` then asks which film to read.

        Parameters
        ----------
        film_id : str
            :attr:`clusterlab.Film.film_id`.
        topology : str
            The film's topology path, shown in messages.
        allow_another : bool
            Register ``film_id`` even though the store holds another film.

        Raises
        ------
        ProvenanceError
            If the store holds another film and ``allow_another`` is False;
            the message names both ids.
        """
        if not isinstance(film_id, str) or not film_id:
            raise InputError(f"film_id={film_id!r} must be a non-empty string (Film.film_id)")
        known = self.films()
        if film_id not in known and known and not allow_another:
            held = "; ".join(f"{fid} ({v['topology'] or 'no topology recorded'}, {v['n_records']} records)"
                             for fid, v in known.items())
            raise ProvenanceError(
                f"result store {str(self.path)!r} holds results of the film {held}, not of the film "
                f"{film_id} ({topology or 'no topology given'}): a different film, the same film with "
                "moved atoms or other charges. Use a separate store for this film, or keep both films "
                f"apart in this store explicitly with store.claim_film({film_id!r}, allow_another=True)."
            )
        if film_id not in dict(self.meta.get("films", {})):
            registered = dict(self.meta.get("films", {}))
            registered[film_id] = {"topology": str(topology),
                                   "registered_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
            self.meta["films"] = registered

    def to_frame(self, kind: str | None = None, status: str | None = "done"):
        """All records as a pandas DataFrame, one row per key.

        Columns: the record columns (``key, kind, status, frame, molecule,
        radius_A, method_key, wall_s, host, worker, version, created_at,
        stored_at, n_failures, error``), then every summary field, then every
        spec payload field not already present (nested dicts flattened with
        dotted names, e.g. ``method.basis``; lists as JSON text).  Times are
        Unix seconds.

        Parameters
        ----------
        kind : str, optional
            Only this kind.
        status : {"done", "failed", None}
            Only this status; None for all.

        Returns
        -------
        pandas.DataFrame
        """
        import pandas as pd

        self._check_status(status)
        sql = f"SELECT {', '.join(_BASE_COLUMNS)}, summary_json, spec_json FROM results WHERE 1=1"
        params: list = []
        if kind is not None:
            sql += " AND kind = ?"
            params.append(kind)
        if status is not None:
            sql += " AND status = ?"
            params.append(status)
        rows = self._query(sql + " ORDER BY created_at, key", tuple(params))
        records = []
        extra_order: dict[str, None] = {}
        spec_order: dict[str, None] = {}
        for row in rows:
            rec = dict(zip(_BASE_COLUMNS, row[: len(_BASE_COLUMNS)]))
            summary = _flatten(json.loads(row[-2] or "{}"))
            spec = json.loads(row[-1])
            payload = spec.get("payload", spec) if isinstance(spec, dict) else {}
            flat_spec = _flatten(payload) if isinstance(payload, Mapping) else {}
            for k, v in summary.items():
                if k not in rec:
                    rec[k] = v
                    extra_order.setdefault(k)
            for k, v in flat_spec.items():
                if k not in rec and k not in extra_order:
                    rec[k] = v
                    spec_order.setdefault(k)
            records.append(rec)
        columns = list(_BASE_COLUMNS) + list(extra_order) + [c for c in spec_order if c not in extra_order]
        return pd.DataFrame.from_records(records, columns=columns)

    # ------------------------------------------------------------------ lifetime
    def close(self) -> None:
        """Close the connection (idempotent).  Committed data is on disk."""
        with self._lock:
            if self._conn is not None:
                if not self.readonly:
                    try:
                        self._conn.execute("PRAGMA wal_checkpoint(PASSIVE)")
                    except sqlite3.DatabaseError:
                        pass
                self._conn.close()
                self._conn = None

    def __enter__(self) -> ResultStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __del__(self) -> None:  # pragma: no cover - best effort
        try:
            self.close()
        except Exception:
            pass

    def __repr__(self) -> str:
        state = "closed" if self._conn is None else ("read-only" if self.readonly else "open")
        return f"ResultStore({str(self.path)!r}, {state})"
