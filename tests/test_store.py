"""Tests of the SQLite result store and the task key."""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from clusterlab import __version__
from clusterlab.errors import InputError, StudyFileError
import warnings

from clusterlab.store import ResultStore, StoreFolderNotice, canonical_json, task_key

ROOT = Path(__file__).resolve().parents[1]

FIELDS = dict(film_id="a3f9c2", frame=4, molecule=17, radius_A=12.5, rule="atom",
              qm_shell=0, method_key="tda/def2-svp/b3lyp", kind="excitations")


def _spec(i: int) -> dict:
    return {"key": f"k{i}", "kind": "excitations",
            "payload": {"frame": i % 3, "molecule": i, "radius_A": 8.0 + i,
                        "method": {"basis": "sto-3g", "xc": "hf"}}}


@pytest.fixture
def store(tmp_path):
    with ResultStore(tmp_path / "study.sqlite") as st:
        yield st


def test_wal_and_synchronous(tmp_path):
    path = tmp_path / "s.sqlite"
    with ResultStore(path) as st:
        assert st.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert st.conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
        assert st.conn.execute("PRAGMA busy_timeout").fetchone()[0] == 60000
    with ResultStore(path, synchronous="NORMAL") as st:
        assert st.conn.execute("PRAGMA synchronous").fetchone()[0] == 1
    # WAL is a property of the file: a plain sqlite3 connection sees it too
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    con.close()
    with pytest.raises(InputError, match="synchronous='OFF' is not valid"):
        ResultStore(path, synchronous="OFF")


def test_put_exactly_once(store):
    key = task_key(**FIELDS)
    assert store.put(key, _spec(1), '{"e": 1}', {"S1_eV": 3.10}) is True
    first = store.get(key)
    time.sleep(0.01)
    for _ in range(5):
        assert store.put(key, _spec(1), '{"e": 2}', {"S1_eV": 9.99}) is False
    rec = store.get(key)
    assert rec.summary == {"S1_eV": 3.10}  # the first result wins
    assert rec.result_json == '{"e": 1}'
    assert rec.created_at == first.created_at and rec.stored_at == first.stored_at
    assert store.counts() == {"done": 1, "failed": 0, "total": 1}
    n = store.conn.execute("SELECT COUNT(*) FROM results WHERE key = ?", (key,)).fetchone()[0]
    assert n == 1
    assert store.has(key) and key in store and not store.has("nope")


def test_failure_then_success_replaces(store):
    key = task_key(**FIELDS)
    assert store.put_failure(key, _spec(2), "ConvergenceError: SCF not converged", "Traceback...")
    assert store.put_failure(key, _spec(2), "ConvergenceError: again", "Traceback 2")
    rec = store.get(key)
    assert rec.status == "failed" and rec.n_failures == 2 and rec.error.endswith("again")
    assert store.keys(status="failed") == [key] and store.keys() == []
    assert not store.has(key) and store.has(key, status="failed")
    assert store.put(key, _spec(2), "{}", {"S1_eV": 3.0}) is True
    rec = store.get(key)
    assert rec.status == "done" and rec.error is None and rec.n_failures == 2
    # a failure after success does not overwrite the good result
    assert store.put_failure(key, _spec(2), "late failure") is False
    assert store.get(key).status == "done"
    assert store.counts() == {"done": 1, "failed": 0, "total": 1}


def test_to_frame_columns(store):
    for i in range(4):
        store.put(f"k{i}", _spec(i), json.dumps({"i": i}),
                  {"S1_eV": 3.0 + 0.1 * i, "T1_eV": 2.5, "converged": True},
                  wall_s=0.5 * i, worker="w1")
    store.put_failure("k9", _spec(9), "ValueError: bad", "tb")
    df = store.to_frame()
    assert len(df) == 4 and set(df["status"]) == {"done"}
    for col in ("key", "kind", "frame", "molecule", "radius_A", "wall_s", "worker",
                "version", "created_at", "S1_eV", "T1_eV", "converged",
                "method.basis", "method.xc"):
        assert col in df.columns, col
    assert df["molecule"].tolist() == [0, 1, 2, 3]
    assert df["radius_A"].tolist() == [8.0, 9.0, 10.0, 11.0]
    assert df["S1_eV"].round(6).tolist() == [3.0, 3.1, 3.2, 3.3]
    assert set(df["version"]) == {__version__}
    fail = store.to_frame(status="failed")
    assert fail["key"].tolist() == ["k9"] and fail["error"].iloc[0] == "ValueError: bad"
    assert len(store.to_frame(status=None)) == 5
    assert len(store.to_frame(kind="charged")) == 0
    with pytest.raises(InputError, match="status='ok' is not valid"):
        store.to_frame(status="ok")


def test_meta_and_reopen(tmp_path):
    path = tmp_path / "s.sqlite"
    with ResultStore(path) as st:
        st.meta["study"] = "blend-T300"
        st.meta["film_id"] = "a3f9c2"
        created = st.meta["created_utc"]
        st.put("k1", _spec(1), "{}", {})
    with ResultStore(path) as st:
        assert st.meta["study"] == "blend-T300" and st.meta["created_utc"] == created
        assert dict(st.meta)["schema_version"] == 1
        assert st.keys() == ["k1"]
    with pytest.raises(StudyFileError, match="is closed"):
        st.counts()


def test_readonly_and_bad_files(tmp_path):
    with pytest.raises(StudyFileError, match="does not exist"):
        ResultStore(tmp_path / "missing.sqlite", readonly=True)
    other = tmp_path / "other.sqlite"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    with pytest.raises(StudyFileError, match="not a clusterlab result store"):
        ResultStore(other, readonly=True)
    path = tmp_path / "s.sqlite"
    ResultStore(path).close()
    with ResultStore(path, readonly=True) as ro:
        with pytest.raises(StudyFileError, match="read-only"):
            ro.put("k", _spec(0), "{}", {})


def test_concurrent_reader_in_another_process(tmp_path):
    """A reader process polls counts() while this process inserts; it must
    never block long, never see a count go down, and see the final count."""
    path = tmp_path / "s.sqlite"
    ResultStore(path).close()
    reader = textwrap.dedent(f"""
        import json, sys, time
        sys.path.insert(0, {str(ROOT)!r})
        from clusterlab.store import ResultStore
        st = ResultStore({str(path)!r}, readonly=True)
        print("ready", flush=True)
        seen, slowest, t_end = [], 0.0, time.time() + 30
        while time.time() < t_end:
            t0 = time.perf_counter()
            n = st.counts()["done"]
            slowest = max(slowest, time.perf_counter() - t0)
            seen.append(n)
            if n >= 60:
                break
            time.sleep(0.005)
        print(json.dumps({{"seen": seen, "slowest": slowest}}))
    """)
    proc = subprocess.Popen([sys.executable, "-c", reader], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "ready"
    with ResultStore(path) as st:
        for i in range(60):
            st.put(f"k{i}", _spec(i), "{}", {"S1_eV": 3.0})
            time.sleep(0.01)
    out, _ = proc.communicate(timeout=60)
    assert proc.returncode == 0
    res = json.loads(out)
    seen = res["seen"]
    assert seen[-1] == 60
    assert all(a <= b for a, b in zip(seen, seen[1:]))  # monotone: no torn reads
    assert len(set(seen)) > 2  # it really read while the writer was writing
    assert res["slowest"] < 2.0


# ------------------------------------------------------------------ task_key


def test_task_key_stable_across_processes():
    key = task_key(**FIELDS)
    code = (
        f"import sys; sys.path.insert(0, {str(ROOT)!r}); "
        "from clusterlab.store import task_key; "
        "print(task_key(method_key='tda/def2-svp/b3lyp', kind='excitations', qm_shell=0, "
        "rule='atom', radius_A=12.5, molecule=17, frame=4, film_id='a3f9c2'))"
    )
    env = dict(os.environ, PYTHONHASHSEED="12345")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=env, timeout=60, check=True).stdout.strip()
    assert out == key
    assert len(key) == 64 and int(key, 16) >= 0


def test_task_key_sensitivity():
    import hashlib

    import numpy as np

    base = task_key(**FIELDS)
    assert task_key(**{**FIELDS, "radius_A": 12.5 + 3e-9}) == base  # noise below precision
    assert task_key(**{**FIELDS, "radius_A": np.float64(12.5)}) == base
    assert task_key(**{**FIELDS, "radius_A": 13.0}) != base
    assert task_key(**{**FIELDS, "radius_A": 12.5001}) != base
    assert task_key(**{**FIELDS, "molecule": 18}) != base
    assert task_key(**{**FIELDS, "kind": "charged"}) != base
    assert task_key(**FIELDS, clusterlab_version="99.0") != base
    assert task_key(**{**FIELDS, "radius_A": 12}) == task_key(**{**FIELDS, "radius_A": 12.0})
    # the key is plain SHA-256 (hashlib) of the documented canonical text
    text = canonical_json({**FIELDS, "clusterlab_version": __version__})
    assert text.startswith('{"clusterlab_version":') and " " not in text
    assert hashlib.sha256(text.encode()).hexdigest() == base
    with pytest.raises(InputError, match="'fields.radius_A' is nan"):
        task_key(**{**FIELDS, "radius_A": float("nan")})
    with pytest.raises(InputError, match="has type object"):
        task_key(method=object())


def test_a_store_in_a_missing_folder_says_which_folder_it_created(tmp_path, caplog):
    path = tmp_path / "new" / "deeper" / "study.sqlite"
    with caplog.at_level("INFO", logger="clusterlab.store"):
        with pytest.warns(StoreFolderNotice) as rec:
            st = ResultStore(path)
    st.close()
    msg = str(rec[0].message)
    assert str((tmp_path / "new" / "deeper").resolve()) in msg and "did not exist and was created" in msg
    assert f"new from {str((tmp_path / 'new').resolve())!r} down" in msg
    assert st.created_folder == str((tmp_path / "new" / "deeper").resolve()) and path.exists()
    assert any("was created" in r.getMessage() for r in caplog.records)
    # the warning points at the caller's line, not inside the store
    assert rec[0].filename == __file__
    # an existing folder: no word, nothing created
    with warnings.catch_warnings():
        warnings.simplefilter("error", StoreFolderNotice)
        with ResultStore(path) as again:
            assert again.created_folder is None
        with ResultStore(tmp_path / "other.sqlite") as beside:
            assert beside.created_folder is None
