"""Tests of the Dask runner against a real distributed scheduler with two
worker processes on localhost, including a worker killed with SIGKILL.

With a LocalCluster each worker runs under a nanny: the scheduler
reschedules the tasks of the killed worker on the surviving one, and the
nanny starts a replacement worker process.
"""

from __future__ import annotations

import os
import signal
import sys
from collections import Counter
from pathlib import Path

import pytest

distributed = pytest.importorskip("distributed")

import _study_worker as sw  # noqa: E402
from clusterlab.runner import DaskRunner, Task, run_tasks  # noqa: E402
from clusterlab.store import ResultStore  # noqa: E402
from test_cli import _write_study, gro  # noqa: E402,F401 - the fixture
from test_runner import check_results, log_lines  # noqa: E402

HERE = Path(__file__).resolve().parent
FN = "_study_worker:compute"


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    # workers are spawned with this process's sys.path, so they can import
    # clusterlab and tests/_study_worker.py
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=":0", silence_logs=40) as lc:
        yield lc


@pytest.mark.slow
def test_dask_worker_sigkill_mid_study(cluster, tmp_path):
    from distributed import Client

    log = tmp_path / "log.txt"
    tasks = sw.make_tasks(12, sleep_s=0.7, log=str(log))
    with Client(cluster) as client:
        pids = client.run(os.getpid)  # {worker address: pid}
    assert len(pids) == 2
    victim_addr, victim_pid = sorted(pids.items())[0]
    killed = []

    def kill_after_three(task, summary):
        if len(killed) == 0 and len(done) == 2:
            os.kill(victim_pid, signal.SIGKILL)
            killed.append(victim_pid)
        done.append(task.key)

    done: list[str] = []
    with ResultStore(tmp_path / "study.sqlite") as store:
        rep = run_tasks(tasks, FN, store=store, runner="dask",
                        scheduler_address=cluster.scheduler_address,
                        progress=False, on_result=kill_after_three)
        assert killed == [victim_pid]
        assert (rep.done, rep.failed, rep.unfinished) == (12, 0, 0)
        check_results(store, tasks)
        rows = store.conn.execute("SELECT COUNT(*), COUNT(DISTINCT key) FROM results").fetchone()
        assert rows == (12, 12)
        df = store.to_frame()
    # a task was running on the killed worker when it died, and was finished elsewhere
    lines = log_lines(log)
    started_on_victim = {name for what, name, pid in lines if what == "start" and pid == victim_pid}
    ended_on_victim = {name for what, name, pid in lines if what == "end" and pid == victim_pid}
    lost = started_on_victim - ended_on_victim
    assert lost, "no task was in flight on the killed worker"
    assert victim_pid not in set(df["pid"][df["key"].isin([t.key for t in tasks
                                                            if t.payload["name"] in lost])])
    for name in lost:
        assert Counter(n for what, n, _ in lines if what == "end")[name] == 1
    # the nanny replaced the killed worker process
    with Client(cluster) as client:
        client.wait_for_workers(2, timeout=30)
        assert victim_pid not in client.run(os.getpid).values()


def test_dask_failure_recorded_and_resume(cluster, tmp_path):
    from distributed import Client

    tasks = sw.make_tasks(5)
    bad = Task.make("toy", {"name": "bad", "n": 3, "raise": "no convergence in 50 cycles"})
    with ResultStore(tmp_path / "s.sqlite") as store, Client(cluster) as client:
        rep = run_tasks(tasks + [bad], FN, store=store, runner=DaskRunner(client=client),
                        progress=False)
        assert (rep.done, rep.failed) == (5, 1)
        assert rep.n_slots == 2
        rec = store.get(bad.key)
        assert rec.error == "ValueError: no convergence in 50 cycles"
        assert "raise ValueError" in rec.traceback
        assert rec.worker.startswith("tcp://127.0.0.1:")
        check_results(store, tasks)
        rep2 = run_tasks(tasks + [bad], FN, store=store, runner=DaskRunner(client=client),
                         progress=False)
        assert (rep2.done, rep2.skipped, rep2.failed) == (0, 5, 1)
        assert client.status == "running"  # a client we passed in is left open


def test_dask_cancel(cluster, tmp_path):
    import threading

    tasks = sw.make_tasks(10, sleep_s=0.3)
    cancel = threading.Event()

    def stop(task, summary):
        cancel.set()

    with ResultStore(tmp_path / "s.sqlite") as store:
        rep = run_tasks(tasks, FN, store=store, runner="dask",
                        scheduler_address=cluster.scheduler_address, progress=False,
                        on_result=stop, cancel=cancel)
        assert rep.cancelled and 1 <= rep.done < 10 and rep.unfinished == 10 - rep.done
        assert store.counts()["done"] == rep.done


def test_dask_localcluster_made_for_us(tmp_path):
    """runner='dask' without an address makes (and closes) its own cluster."""
    tasks = sw.make_tasks(3)
    with ResultStore(tmp_path / "s.sqlite") as store:
        rep = run_tasks(tasks, FN, store=store, runner="dask", n_workers=1,
                        progress=False)
        assert rep.done == 3
        check_results(store, tasks)
        assert all(w.startswith("tcp://127.0.0.1:") for w in store.to_frame()["worker"])


def test_study_file_on_dask_gives_the_serial_numbers(cluster, gro, tmp_path):  # noqa: F811
    """The same study file (scan and sample, real embedded QM) on the serial runner and on
    the Dask cluster: the same tasks, the same energies to within convergence. The serial
    runner starts each SCF from the previous site's orbitals, each worker from its own, so
    the two agree to the SCF's tolerance, not to round-off (conv_tol 1e-9 Eh in the energy
    leaves orbitals, and so excitation energies, good to ~√ of it): measured 7 µeV at most;
    0.1 meV bounds it, far below any model error, and a wrong task or site is off by meV+."""
    import numpy as np

    from clusterlab.pipeline import run_study
    from clusterlab.studyfile import load_study

    sections = """
[scan]
molecule = 13
radii = [3.0, 4.5]
[sample]
molecules = [13, 4, 22]
radius = 4.5
"""
    study = _write_study(gro, tmp_path, n_singlets=1, sections=sections)
    serial = run_study(load_study(study), progress=False, echo=lambda *_: None)
    over = {("runner", "kind"): "dask", ("runner", "scheduler"): cluster.scheduler_address,
            ("output", "store"): str(tmp_path / "dask.sqlite"), ("output", "report"): str(tmp_path / "rep_dask")}
    dask = run_study(load_study(study, overrides=over), progress=False, echo=lambda *_: None)
    assert dask.costs["sample"]["computed"] == 2  # molecule 13 at 4.5 Å came from the scan
    with ResultStore(tmp_path / "dask.sqlite") as st:
        assert {w.startswith("tcp://127.0.0.1:") for w in st.to_frame()["worker"]} == {True}
    for a, b, by in ((serial.scan.table, dask.scan.table, ["radius_A"]),
                     (serial.sample.at(), dask.sample.at(), ["frame", "molecule"])):
        a, b = a.sort_values(by), b.sort_values(by)
        cols = [c for c in a.columns if c.endswith("_eV")]
        assert len(a) == len(b) and len(cols) >= 3
        assert np.allclose(a[cols].to_numpy(float), b[cols].to_numpy(float), atol=1e-4, rtol=0, equal_nan=True)
    assert len(serial.sample.at()) == 3 and np.isfinite(serial.sample.at()["S1_eV"]).all()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(pytest.main([__file__, "-q"]))
