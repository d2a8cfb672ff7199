"""Tests of the serial and local-process runners, resume after SIGKILL, and
the progress bar.

The task function (tests/_study_worker.py) diagonalises scale * tridiag(-1,
2, -1), whose eigenvalues are known in closed form, 2 - 2 cos(k pi/(n+1))
(G. Strang, "Linear Algebra and Its Applications", 4th ed., 2006), so every
stored result is checked against exact mathematics, not against itself.
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import pytest

import _study_worker as sw
from clusterlab.errors import InputError
from clusterlab.progress import progress_bar, progress_wanted
from clusterlab.runner import ProcessRunner, Task, run_tasks
from clusterlab.store import ResultStore

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
FN = "_study_worker:compute"


def exact_lowest(n: int, scale: float) -> float:
    return scale * (2.0 - 2.0 * math.cos(math.pi / (n + 1)))


def check_results(store: ResultStore, tasks: list[Task]) -> None:
    """Every task done exactly once, with the exact lowest eigenvalue."""
    df = store.to_frame()
    assert sorted(df["key"]) == sorted(t.key for t in tasks)
    assert df["key"].is_unique
    for _, row in df.iterrows():
        assert row["lowest"] == pytest.approx(exact_lowest(row["n"], row["scale"]), abs=1e-12)


def log_lines(path: Path) -> list[tuple[str, str, int]]:
    if not path.exists():
        return []
    out = []
    for line in path.read_text().splitlines():
        what, name, pid, _ = line.split()
        out.append((what, name, int(pid)))
    return out


@pytest.fixture
def store(tmp_path):
    with ResultStore(tmp_path / "study.sqlite") as st:
        yield st


def test_serial_results_failures_callbacks_and_resume(store):
    tasks = sw.make_tasks(5)
    bad = Task.make("toy", {"name": "bad", "n": 3, "raise": "synthetic failure 42"})
    got, errs = [], []
    rep = run_tasks(tasks + [bad, tasks[0]], FN, store=store, runner="serial", progress=False,
                    on_result=lambda t, s: got.append((t.key, s["lowest"])),
                    on_error=lambda t, e: errs.append((t.key, e)))
    assert (rep.done, rep.failed, rep.skipped, rep.duplicates) == (5, 1, 0, 1)
    assert rep.n_tasks == 6 and not rep.complete
    check_results(store, tasks)
    assert sorted(k for k, _ in got) == sorted(t.key for t in tasks)
    assert errs == [(bad.key, "ValueError: synthetic failure 42")]
    rec = store.get(bad.key)
    assert rec.status == "failed" and "synthetic failure 42" in rec.error
    assert "_study_worker.py" in rec.traceback and "raise ValueError" in rec.traceback
    # resume: done keys are skipped, the failed one is tried again
    rep2 = run_tasks(tasks + [bad], FN, store=store, runner="serial", progress=False)
    assert (rep2.done, rep2.skipped, rep2.failed) == (0, 5, 1)
    assert store.get(bad.key).n_failures == 2


def test_callback_error_does_not_stop_study(store):
    tasks = sw.make_tasks(3)

    def broken(task, summary):
        raise RuntimeError("widget went away")

    with pytest.warns(RuntimeWarning, match="widget went away"):
        rep = run_tasks(tasks, FN, store=store, runner="serial", progress=False,
                        on_result=broken)
    assert rep.done == 3


def test_cancel_returns_partial_report_then_resume(store):
    tasks = sw.make_tasks(6, sleep_s=0.05)
    cancel = threading.Event()
    seen = []

    def stop_after_two(task, summary):
        seen.append(task.key)
        if len(seen) == 2:
            cancel.set()

    rep = run_tasks(tasks, FN, store=store, runner="serial", progress=False,
                    on_result=stop_after_two, cancel=cancel)
    assert rep.cancelled and rep.done == 2 and rep.unfinished == 4
    assert store.counts()["done"] == 2
    rep2 = run_tasks(tasks, FN, store=store, runner="serial", progress=False)
    assert (rep2.done, rep2.skipped) == (4, 2)
    check_results(store, tasks)


def test_processes_dying_worker_and_failure(store, tmp_path):
    """2 worker processes; one task kills its worker once (os._exit), one
    raises.  The pool is rebuilt, the killed task re-run, everything else
    done exactly once and the study not stopped."""
    log = tmp_path / "log.txt"
    marker = tmp_path / "died.marker"
    tasks = sw.make_tasks(8, sleep_s=0.1, log=str(log))
    dying = Task.make("toy", {"name": "dying", "n": 5, "scale": 2.0, "die_once": str(marker),
                              "log": str(log)})
    bad = Task.make("toy", {"name": "bad", "n": 3, "raise": "boom"})
    all_tasks = tasks[:3] + [dying] + tasks[3:] + [bad]
    rep = run_tasks(all_tasks, FN, store=store,
                    runner=ProcessRunner(n_workers=2, threads_per_worker=1),
                    progress=False, retries=2)
    assert marker.exists()
    assert (rep.done, rep.failed, rep.unfinished) == (9, 1, 0)
    assert rep.worker_restarts == 1 and rep.n_slots == 2
    check_results(store, tasks + [dying])
    assert store.get(bad.key).error == "ValueError: boom"
    lines = log_lines(log)
    starts = Counter(name for what, name, _ in lines if what == "start")
    ends = Counter(name for what, name, _ in lines if what == "end")
    assert starts["dying"] == 2 and ends["dying"] == 1  # died once, then succeeded
    # a task running beside the dying one loses its result with the broken
    # pool and runs again; at most the rest of the in-flight window (3 tasks)
    assert all(ends[f"t{i:03d}"] >= 1 for i in range(8))
    assert sum(ends[f"t{i:03d}"] for i in range(8)) - 8 <= 3
    # the workers really were other processes, with 1 OpenMP thread each
    pids = set(store.to_frame()["pid"])
    assert os.getpid() not in pids and len(pids) >= 2


def test_processes_task_that_always_kills_its_worker(store):
    tasks = sw.make_tasks(4)
    killer = Task.make("toy", {"name": "killer", "n": 3, "die_always": True})
    rep = run_tasks([killer] + tasks, FN, store=store, runner="processes", n_workers=2,
                    progress=False, retries=1)
    assert rep.done == 4 and rep.failed == 1 and rep.worker_restarts == 2
    rec = store.get(killer.key)
    assert rec.status == "failed" and "worker process died" in rec.error
    assert "retries=1" in rec.error
    check_results(store, tasks)


def test_processes_cancel_keeps_running_results(store):
    tasks = sw.make_tasks(8, sleep_s=0.3)
    cancel = threading.Event()
    rep = run_tasks(tasks, FN, store=store, runner="processes", n_workers=2, progress=False,
                    on_result=lambda t, s: cancel.set(), cancel=cancel)
    assert rep.cancelled and 1 <= rep.done < 8 and rep.unfinished == 8 - rep.done
    assert store.counts()["done"] == rep.done  # what finished was stored, nothing more


def test_input_errors(store):
    tasks = sw.make_tasks(1)
    with pytest.raises(InputError, match="runner='gpu' is not valid"):
        run_tasks(tasks, FN, store=store, runner="gpu", progress=False)
    with pytest.raises(InputError, match="must be a module-level function"):
        run_tasks(tasks, lambda p: ("{}", {}), store=store, runner="serial", progress=False)
    with pytest.raises(InputError, match="cannot import task function 'nope.mod:f'"):
        run_tasks(tasks, "nope.mod:f", store=store, runner="serial", progress=False)
    with pytest.raises(InputError, match="retries=-1"):
        run_tasks(tasks, FN, store=store, runner="serial", retries=-1, progress=False)
    with pytest.raises(InputError, match="not JSON-serialisable"):
        Task(key="k", kind="toy", payload={"x": object()})
    with pytest.raises(InputError, match="start_method='fork'"):
        ProcessRunner(start_method="fork")


def test_task_json_roundtrip():
    t = Task.make("excitations", {"film": "f.gro", "frame": 0, "molecule": 3, "radius_A": 9.5},
                  film_id="abc", frame=0, molecule=3, radius_A=9.5)
    assert Task.from_json(t.to_json()) == t and hash(t) == hash(t.key)
    assert Task.make("excitations", {"a": 1}, film_id="abc", frame=0, molecule=3,
                     radius_A=9.5000000001).key == t.key


def test_progress_bar_quiet_rules(monkeypatch):
    class Pipe:
        def isatty(self):
            return False

    class Tty:
        def isatty(self):
            return True

    monkeypatch.setenv("CI", "true")
    assert not progress_wanted(True, Pipe()) and progress_wanted(True, Tty())
    monkeypatch.delenv("CI")
    assert progress_wanted(True, Pipe())  # e.g. a Jupyter kernel
    assert not progress_wanted(False, Tty())
    bar = progress_bar(10, "x", enabled=False)
    assert bar.disable and bar.total == 10
    bar.close()
    monkeypatch.setenv("CI", "0")
    import io

    monkeypatch.setattr(sys, "stderr", io.StringIO())
    bar = progress_bar(4, "sites", initial=1)
    bar.update(2)
    bar.close()
    text = sys.stderr.getvalue()
    assert "sites" in text and "3/4" in text


# ------------------------------------------------------------------ SIGKILL


def _counts_readonly(path: Path) -> int:
    if not path.exists():
        return 0
    try:
        with ResultStore(path, readonly=True) as st:
            return st.counts()["done"]
    except Exception:  # store being created right now
        return 0


@pytest.mark.slow
def test_sigkill_study_then_resume(tmp_path):
    """Kill a running study (client and its worker processes) with SIGKILL,
    restart it: exactly N distinct done results, and tasks stored before the
    kill were not computed again."""
    n = 14
    path = tmp_path / "study.sqlite"
    log = tmp_path / "log.txt"
    cmd = [sys.executable, str(HERE / "_study_worker.py"), str(path), str(n),
           "--workers", "2", "--sleep", "0.4", "--log", str(log)]
    env = dict(os.environ, OMP_NUM_THREADS="1")
    proc = subprocess.Popen(cmd, env=env, start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.time() + 60
        while _counts_readonly(path) < 3:
            assert proc.poll() is None, proc.communicate()
            assert time.time() < deadline, "study made no progress"
            time.sleep(0.05)
        os.killpg(proc.pid, signal.SIGKILL)  # the client and its pool workers
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == -signal.SIGKILL
    with ResultStore(path, readonly=True) as st:
        before = {k: st.get(k).created_at for k in st.keys()}
    assert 3 <= len(before) < n

    out = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout.strip().splitlines()[-1])
    assert report == {"done": n - len(before), "skipped": len(before), "failed": 0,
                      "unfinished": 0}
    with ResultStore(path, readonly=True) as st:
        assert st.counts() == {"done": n, "failed": 0, "total": n}
        rows = st.conn.execute("SELECT COUNT(*), COUNT(DISTINCT key) FROM results").fetchone()
        assert rows == (n, n)
        for k, t in before.items():
            assert st.get(k).created_at == t  # untouched
        names_before = {st.get(k).spec["payload"]["name"] for k in before}
    check_results_path(path, n)
    ends = Counter(name for what, name, _ in log_lines(log) if what == "end")
    assert all(ends[name] == 1 for name in names_before)  # never recomputed
    assert sorted(ends) == [f"t{i:03d}" for i in range(n)]


def _alive(pid: int) -> bool:
    """True while ``pid`` runs (a zombie waiting to be reaped counts as gone)."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_workers_exit_when_the_client_is_killed(tmp_path):
    """SIGKILL of the client alone (not its process group): its pool workers,
    busy with long tasks, notice that their parent is gone and exit within a
    few poll periods instead of computing on (issue 18)."""
    path, log = tmp_path / "study.sqlite", tmp_path / "log.txt"
    cmd = [sys.executable, str(HERE / "_study_worker.py"), str(path), "6",
           "--workers", "2", "--sleep", "30", "--log", str(log)]
    proc = subprocess.Popen(cmd, env=dict(os.environ, OMP_NUM_THREADS="1"), start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.time() + 60
        while len({pid for what, _, pid in log_lines(log) if what == "start"}) < 2:
            assert proc.poll() is None, proc.communicate()
            assert time.time() < deadline, "workers never started"
            time.sleep(0.05)
        workers = {pid for what, _, pid in log_lines(log) if what == "start"}
        assert proc.pid not in workers
        os.kill(proc.pid, signal.SIGKILL)  # the client only
        proc.wait(timeout=30)
        deadline = time.time() + 10  # poll period 0.5 s; a 30 s task would still be running
        while any(_alive(p) for p in workers) and time.time() < deadline:
            time.sleep(0.1)
        assert not any(_alive(p) for p in workers), "workers kept running after their client died"
    finally:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    assert not [name for what, name, _ in log_lines(log) if what == "end"]  # no task finished


def check_results_path(path: Path, n: int) -> None:
    with ResultStore(path, readonly=True) as st:
        check_results(st, sw.make_tasks(n, sleep_s=0.4))
