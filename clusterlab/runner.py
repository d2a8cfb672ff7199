"""One runner for every batch of cluster calculations: serial, local
processes, or a Dask cluster.

The work unit is a :class:`Task`: a small JSON-serialisable spec (key, kind,
payload).  The calculation itself is a module-level function
``fn(payload) -> (result_json, summary)`` named by an import path string
such as ``"clusterlab.study.tasks:run_cluster_task"``; workers import it
themselves and rebuild the cluster from the film file named in the payload,
so the client never ships large objects and workers need no shared disk.
Results come back to the client, which alone writes the
:class:`~clusterlab.store.ResultStore`, one transaction per result, as they
complete.

Behaviour shared by all back ends
---------------------------------
- keys already ``"done"`` in the store are skipped (resume);
- a task that raises is recorded as ``"failed"`` with its exception text and
  traceback and the study goes on (a re-run retries failed keys);
- a task whose worker process dies is run again, up to ``retries`` times;
- ``cancel`` (a :class:`threading.Event`) stops submitting, cancels what has
  not started and returns the partial :class:`RunReport`;
- ``on_result(task, summary)`` / ``on_error(task, error)`` are called in the
  client as each result is stored (for live tables and widgets).

Why "spawn" for local processes
-------------------------------
``fork`` copies the parent with whatever locks its threads held at that
instant (OpenMP and BLAS thread pools used by PySCF and numpy, Jupyter's
ZMQ threads); the child can then deadlock on a lock whose owner thread does
not exist in it.  ``spawn`` starts a fresh interpreter, costs about one
import of numpy/PySCF per worker (once per pool, not per task) and behaves
the same on Linux, macOS and Windows.  ``"forkserver"`` is accepted too.
"""

from __future__ import annotations

import concurrent.futures as cf
import importlib
import json
import logging
import multiprocessing
import os
import signal
import socket
import sys
import threading
import time
import traceback as _tb
import warnings
from abc import ABC, abstractmethod
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

from .errors import InputError
from .store import ResultStore, task_key

__all__ = [
    "Task",
    "TaskOutcome",
    "RunReport",
    "Runner",
    "SerialRunner",
    "ProcessRunner",
    "DaskRunner",
    "run_tasks",
    "iter_tasks",
    "resolve_function",
    "default_workers",
    "execute_task",
]

log = logging.getLogger(__name__)

_THREAD_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


# --------------------------------------------------------------------------
# the work unit


@dataclass(frozen=True, eq=True)
class Task:
    """One cluster calculation, as a small serialisable spec.

    Parameters
    ----------
    key : str
        Identity of the result (from :func:`clusterlab.store.task_key`).
    kind : str
        What is computed, e.g. ``"excitations"``, ``"charged"``,
        ``"periodic"``, ``"transfer"``.
    payload : dict
        Everything the worker function needs, JSON-serialisable: film paths,
        frame, molecule, radius_A, rule, method dict, ...  Never arrays of
        the film itself.

    Examples
    --------
    >>> t = Task.make("excitations", {"film": "film.gro", "frame": 0, "molecule": 4,
    ...                                "radius_A": 10.0})
    >>> Task.from_json(t.to_json()) == t
    True
    """

    key: str
    kind: str
    payload: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not isinstance(self.key, str) or not self.key:
            raise InputError(f"Task key {self.key!r} must be a non-empty string")
        if not isinstance(self.kind, str) or not self.kind:
            raise InputError(f"Task kind {self.kind!r} must be a non-empty string")
        if not isinstance(self.payload, Mapping):
            raise InputError(f"Task payload must be a dict, got {type(self.payload).__name__}")
        try:
            json.dumps(dict(self.payload), sort_keys=True)
        except (TypeError, ValueError) as exc:
            raise InputError(
                f"Task {self.key[:12]}... payload is not JSON-serialisable ({exc}); "
                "pass paths, numbers, strings, lists and dicts only"
            ) from exc

    def __hash__(self) -> int:
        return hash(self.key)

    @classmethod
    def make(cls, kind: str, payload: Mapping[str, Any], **key_fields: Any) -> Task:
        """Build a task whose key is ``task_key(kind=kind, **key_fields)``.

        With no ``key_fields`` the whole payload is hashed.
        """
        fields = dict(key_fields) if key_fields else dict(payload)
        fields["kind"] = kind
        return cls(key=task_key(**fields), kind=kind, payload=dict(payload))

    def to_dict(self) -> dict[str, Any]:
        """``{"key", "kind", "payload"}`` (what the store keeps as the spec)."""
        return {"key": self.key, "kind": self.kind, "payload": dict(self.payload)}

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Task:
        return cls(key=d["key"], kind=d["kind"], payload=dict(d.get("payload", {})))

    @classmethod
    def from_json(cls, text: str) -> Task:
        return cls.from_dict(json.loads(text))


@dataclass(frozen=True)
class TaskOutcome:
    """What happened to one task in a run (yielded by :func:`iter_tasks`).

    Attributes
    ----------
    task : Task
    status : {"done", "failed", "skipped"}
    summary : dict
        Flat summary for done tasks, ``{}`` otherwise.
    error : str or None
        Exception text of a failure.
    wall_s : float or None
        Worker-side calculation time (s).
    worker : str or None
        Worker that ran it (``host:pid`` or a Dask worker address).
    """

    task: Task
    status: str
    summary: dict
    error: str | None = None
    wall_s: float | None = None
    worker: str | None = None


@dataclass
class RunReport:
    """Counts and timings of one :func:`run_tasks` call.

    Attributes
    ----------
    runner : str
        Back end (``"serial"``, ``"processes"``, ``"dask"``).
    n_tasks : int
        Distinct tasks asked for.
    done, skipped, failed : int
        Computed and stored now; already done in the store; recorded failed.
    unfinished : int
        Not finished because the run was cancelled or interrupted.
    duplicates : int
        Input tasks dropped because their key appeared earlier in the list.
    worker_restarts : int
        Worker processes that died (local pools rebuilt, or Dask reschedules
        seen by this runner; Dask's own reschedules are invisible here).
    wall_s : float
        Wall time of the whole run, pool start and shutdown included (s).
    compute_s : float
        Sum of worker-side calculation times (s).
    store_s : float
        Client time spent writing the store and running callbacks (s).
    n_slots : int
        Parallel task slots used (workers x 1 task each).
    cancelled : bool
        True if the run was stopped by ``cancel``.
    failures : list of (str, str)
        ``(key, error)`` of the failures of this run.
    """

    runner: str
    n_tasks: int = 0
    done: int = 0
    skipped: int = 0
    failed: int = 0
    unfinished: int = 0
    duplicates: int = 0
    worker_restarts: int = 0
    wall_s: float = 0.0
    compute_s: float = 0.0
    store_s: float = 0.0
    n_slots: int = 1
    cancelled: bool = False
    failures: list = field(default_factory=list)

    @property
    def executed(self) -> int:
        """Tasks that ran to an outcome in this run (done + failed)."""
        return self.done + self.failed

    @property
    def overhead_per_task_s(self) -> float:
        """Slot time not spent computing, per executed task (s).

        ``(wall_s * n_slots - compute_s) / executed``: worker start-up,
        transfer, store writes and idle slots at the tail, per task.
        """
        if self.executed == 0:
            return 0.0
        return max(0.0, self.wall_s * self.n_slots - self.compute_s) / self.executed

    @property
    def complete(self) -> bool:
        """True if every task is done (now or before)."""
        return self.unfinished == 0 and self.failed == 0

    def __str__(self) -> str:
        s = (
            f"{self.runner}: {self.done} done, {self.skipped} already stored, "
            f"{self.failed} failed"
        )
        if self.unfinished:
            s += f", {self.unfinished} unfinished"
        if self.cancelled:
            s += " (cancelled)"
        s += f" of {self.n_tasks} in {self.wall_s:.1f} s"
        if self.executed:
            s += f"; overhead {self.overhead_per_task_s * 1e3:.0f} ms/task"
        return s


# --------------------------------------------------------------------------
# worker side


def resolve_function(ref: str | Callable) -> Callable:
    """Import ``"package.module:function"`` (or return a callable as is).

    Raises
    ------
    InputError
        If the string is not of the form ``"module:function"`` or the
        function cannot be imported.
    """
    if callable(ref):
        return ref
    if not isinstance(ref, str) or ":" not in ref:
        raise InputError(
            f"task function {ref!r} must be a callable or an import path "
            "'package.module:function'"
        )
    mod_name, _, attr = ref.partition(":")
    try:
        obj: Any = importlib.import_module(mod_name)
        for part in attr.split("."):
            obj = getattr(obj, part)
    except (ImportError, AttributeError) as exc:
        raise InputError(f"cannot import task function {ref!r}: {exc}") from exc
    if not callable(obj):
        raise InputError(f"task function {ref!r} is not callable")
    return obj


def _fn_ref(fn: str | Callable) -> str:
    """Import-path string of ``fn`` (so workers can import it)."""
    if isinstance(fn, str):
        resolve_function(fn)  # fail fast in the client
        return fn
    mod = getattr(fn, "__module__", None)
    qual = getattr(fn, "__qualname__", None)
    if not mod or not qual or "<" in qual or mod == "__main__":
        raise InputError(
            f"task function {fn!r} must be a module-level function importable by workers "
            "(give it as 'package.module:function'; functions defined in __main__, "
            "lambdas and closures cannot be imported)"
        )
    return f"{mod}:{qual}"


_LIMITER: Any = None


def _limit_threads(n_threads: int | None) -> None:
    """Set OpenMP/BLAS threads in this process (env for libraries not yet
    loaded, threadpoolctl and PySCF for those already loaded)."""
    global _LIMITER
    if not n_threads:
        return
    for name in _THREAD_ENV:
        os.environ[name] = str(int(n_threads))
    try:
        from threadpoolctl import threadpool_limits

        _LIMITER = threadpool_limits(limits=int(n_threads))
    except Exception:  # threadpoolctl missing or a library it cannot drive
        pass
    if "pyscf" in sys.modules:
        try:
            sys.modules["pyscf"].lib.num_threads(int(n_threads))
        except Exception:
            pass


_START_QUEUE: Any = None


def _init_process_worker(n_threads: int | None, start_queue: Any) -> None:
    """Initializer of local pool workers."""
    global _START_QUEUE
    _START_QUEUE = start_queue
    # a pool worker should die with its pool, not linger on Ctrl-C
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    except (ValueError, OSError):
        pass
    _limit_threads(n_threads)
    _exit_with_parent()


def worker_pool(n_workers: int, threads_per_worker: int | None, *, ctx: Any = None,
                start_queue: Any = None) -> cf.ProcessPoolExecutor:
    """Local worker processes as every clusterlab pool starts them: spawned
    (``ctx``; default the "spawn" context: fork is unsafe with OpenMP/BLAS
    threads), each limited to ``threads_per_worker`` threads, ignoring Ctrl-C
    and ending with its parent (:func:`_init_process_worker`)."""
    ctx = multiprocessing.get_context("spawn") if ctx is None else ctx
    return cf.ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=_init_process_worker,
                                  initargs=(threads_per_worker, start_queue))


#: how often a pool worker checks that its parent (the client) is alive (s)
PARENT_POLL_S = 0.5


def _exit_with_parent(poll_s: float | None = None) -> None:
    """Start a daemon thread that ends this worker process when its parent
    dies (a killed ``clusterlab run`` must not leave workers computing):
    the parent id changes when the parent is gone (the worker is re-parented)."""
    parent = os.getppid()
    period = PARENT_POLL_S if poll_s is None else float(poll_s)

    def watch() -> None:
        while True:
            time.sleep(period)
            if os.getppid() != parent:
                os._exit(3)

    threading.Thread(target=watch, name="clusterlab-parent-watch", daemon=True).start()


def execute_task(fn_ref: str, key: str, payload: Mapping[str, Any],
                 n_threads: int | None = None) -> dict[str, Any]:
    """Run one task on a worker and wrap the outcome in a plain dict.

    Exceptions of the task function are caught and returned with their
    traceback text (so an exception that cannot be pickled still reaches
    the client).  Module-level so every back end can import it.

    Returns
    -------
    dict
        ``ok``, ``result_json``, ``summary``, ``error``, ``traceback``,
        ``wall_s``, ``worker``.
    """
    if _START_QUEUE is not None:
        try:
            _START_QUEUE.put((key, os.getpid()))
        except Exception:
            pass
    if n_threads:
        _limit_threads(n_threads)
    worker = f"{socket.gethostname()}:{os.getpid()}"
    if "distributed" in sys.modules:  # on a Dask worker; never import it elsewhere
        try:
            worker = sys.modules["distributed"].get_worker().address
        except Exception:
            pass
    t0 = time.perf_counter()
    try:
        fn = resolve_function(fn_ref)
        out = fn(dict(payload))
        if not (isinstance(out, tuple) and len(out) == 2):
            raise TypeError(
                f"task function {fn_ref!r} returned {type(out).__name__}; "
                "it must return (result_json: str, summary: dict)"
            )
        result_json, summary = out
        if not isinstance(result_json, str):
            raise TypeError(f"task function {fn_ref!r} returned a result that is not a str")
        summary = dict(summary or {})
        json.dumps(summary, default=float)
        return {"ok": True, "result_json": result_json, "summary": summary,
                "error": None, "traceback": None,
                "wall_s": time.perf_counter() - t0, "worker": worker}
    except Exception as exc:
        return {"ok": False, "result_json": None, "summary": {},
                "error": f"{type(exc).__name__}: {exc}", "traceback": _tb.format_exc(),
                "wall_s": time.perf_counter() - t0, "worker": worker}


def _died(task: Task, reason: str) -> dict[str, Any]:
    return {"ok": False, "result_json": None, "summary": {}, "error": reason,
            "traceback": None, "wall_s": None, "worker": None}


# --------------------------------------------------------------------------
# back ends


def default_workers() -> int:
    """Cores this process may use (affinity-aware ``os.cpu_count()``)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


class Runner(ABC):
    """Back end: runs tasks and yields ``(task, envelope)`` as they finish.

    Subclasses implement :meth:`execute`; :func:`run_tasks` does the
    skipping, storing, callbacks and counting.  ``envelope`` is the dict of
    :func:`execute_task`.  Tasks not yielded are unfinished.
    """

    name = "runner"
    n_slots = 1
    worker_restarts = 0

    @abstractmethod
    def execute(self, tasks: list[Task], fn_ref: str, *, retries: int,
                cancel: threading.Event | None) -> Iterator[tuple[Task, dict]]:
        """Run ``tasks`` and yield each ``(task, envelope)`` as it completes."""


class SerialRunner(Runner):
    """Run tasks one by one in this process (debugging, tiny studies).

    Parameters
    ----------
    threads : int, optional
        OpenMP/BLAS threads for the calculations (default: leave as is).
    """

    name = "serial"

    def __init__(self, threads: int | None = None) -> None:
        self.threads = threads
        self.n_slots = 1

    def execute(self, tasks, fn_ref, *, retries, cancel):
        if self.threads:
            _limit_threads(self.threads)
        for task in tasks:
            if cancel is not None and cancel.is_set():
                return
            yield task, execute_task(fn_ref, task.key, task.payload)


class ProcessRunner(Runner):
    """Local worker processes (:class:`concurrent.futures.ProcessPoolExecutor`).

    Parameters
    ----------
    n_workers : int, optional
        Worker processes; default one per usable core.
    threads_per_worker : int, optional
        OpenMP/BLAS threads in each worker (set in the worker initializer);
        default 1, which is fastest for many small clusters.  For few large
        clusters use fewer workers with more threads.
    start_method : {"spawn", "forkserver"}
        How workers start (see the module notes for why not ``fork``).
    max_in_flight : int, optional
        Tasks handed to the pool at once (default ``2 * n_workers``); the
        rest wait in the client, so cancel is prompt and a dying worker
        takes few tasks with it.

    Notes
    -----
    A worker that dies (segfault, out-of-memory kill, ``os._exit``) breaks
    the whole pool.  The runner then builds a fresh pool and resubmits the
    unfinished tasks.  Only the tasks that were running in the dead process
    (found from the worker's start messages and exit codes) are charged a
    retry; a task charged more than ``retries`` times is recorded failed.
    """

    name = "processes"

    def __init__(self, n_workers: int | None = None, threads_per_worker: int | None = None,
                 *, start_method: str = "spawn", max_in_flight: int | None = None) -> None:
        self.n_workers = int(n_workers) if n_workers else default_workers()
        if self.n_workers < 1:
            raise InputError(f"n_workers={n_workers!r} must be at least 1")
        self.threads_per_worker = int(threads_per_worker) if threads_per_worker else 1
        if self.threads_per_worker < 1:
            raise InputError(f"threads_per_worker={threads_per_worker!r} must be at least 1")
        if start_method not in ("spawn", "forkserver"):
            raise InputError(
                f"start_method={start_method!r} is not valid; use 'spawn' or 'forkserver' "
                "(fork is unsafe with OpenMP/BLAS threads)"
            )
        self.start_method = start_method
        self.max_in_flight = int(max_in_flight) if max_in_flight else 2 * self.n_workers
        self.n_slots = self.n_workers
        self.worker_restarts = 0

    def _new_pool(self, ctx):
        # SimpleQueue writes synchronously to a pipe: a start message is not
        # lost when the worker dies right after sending it (Queue uses a
        # feeder thread that os._exit or a segfault would cut off).  A fresh
        # queue per pool: a worker killed inside put() may leave its lock taken.
        start_q = ctx.SimpleQueue()
        return worker_pool(self.n_workers, self.threads_per_worker, ctx=ctx, start_queue=start_q), start_q

    def execute(self, tasks, fn_ref, *, retries, cancel):
        ctx = multiprocessing.get_context(self.start_method)
        todo: deque[Task] = deque(tasks)
        charged: dict[str, int] = {}
        pool, start_q = self._new_pool(ctx)
        running: dict[cf.Future, Task] = {}
        started: dict[str, int] = {}  # key -> pid, for tasks in flight
        clean = False
        try:
            while todo or running:
                if cancel is not None and cancel.is_set():
                    # stop submitting; drop what has not started, keep what runs
                    todo.clear()
                    for fut in list(running):
                        if fut.cancel():
                            running.pop(fut)
                    if not running:
                        break
                pool_broken = False
                while todo and len(running) < self.max_in_flight:
                    task = todo[0]
                    try:
                        fut = pool.submit(execute_task, fn_ref, task.key, dict(task.payload))
                    except cf.process.BrokenProcessPool:
                        pool_broken = True  # seen by the pool before our wait below
                        break
                    todo.popleft()
                    running[fut] = task
                finished, _ = cf.wait(list(running), timeout=0.2,
                                      return_when=cf.FIRST_COMPLETED)
                self._drain(start_q, started)
                broken: list[Task] = []
                for fut in finished:
                    task = running.pop(fut)
                    try:
                        env = fut.result()
                    except cf.process.BrokenProcessPool:
                        broken.append(task)
                        continue
                    except cf.CancelledError:
                        continue
                    except Exception as exc:  # pickling of the result, etc.
                        env = _died(task, f"{type(exc).__name__}: {exc}")
                        env["traceback"] = "".join(_tb.format_exception(exc))
                    started.pop(task.key, None)
                    yield task, env
                if broken or pool_broken:
                    # every future of a broken pool fails; gather them all
                    time.sleep(0.05)
                    for fut in list(running):
                        task = running.pop(fut)
                        if fut.done() and not fut.cancelled() and fut.exception() is None:
                            started.pop(task.key, None)
                            yield task, fut.result()  # finished before the break
                        else:
                            broken.append(task)
                    self._drain(start_q, started)
                    dead = self._dead_pids(pool)
                    pool.shutdown(wait=True, cancel_futures=True)
                    self.worker_restarts += 1
                    suspects = [t for t in broken if started.get(t.key) in dead] if dead else []
                    if not suspects:  # could not tell: charge everything that had started
                        suspects = [t for t in broken if t.key in started]
                    if not suspects:  # nor that: charge all in flight, so retries end
                        suspects = list(broken)
                    log.warning("a worker process died (pids %s) running %d task(s); "
                                "%d task(s) in flight go to a fresh pool (unless out of "
                                "retries)", sorted(dead) or "?", len(suspects), len(broken))
                    suspect_keys = {t.key for t in suspects}
                    retry_front, retry_back = [], []
                    for t in broken:
                        started.pop(t.key, None)
                        if t.key in suspect_keys:
                            charged[t.key] = charged.get(t.key, 0) + 1
                            if charged[t.key] > retries:
                                yield t, _died(t, (
                                    f"worker process died while running this task "
                                    f"{charged[t.key]} time(s) (retries={retries})"))
                                continue
                            retry_back.append(t)  # run suspects later, beside other tasks
                        else:
                            retry_front.append(t)
                    todo.extendleft(reversed(retry_front))
                    todo.extend(retry_back)
                    try:
                        start_q.close()
                    except Exception:
                        pass
                    pool, start_q = self._new_pool(ctx)
            clean = True
        finally:
            if not clean:  # Ctrl-C or an error in the client: do not wait for workers
                for proc in list((getattr(pool, "_processes", None) or {}).values()):
                    try:
                        proc.terminate()
                    except Exception:
                        pass
            pool.shutdown(wait=clean, cancel_futures=True)
            try:
                start_q.close()
            except Exception:
                pass

    @staticmethod
    def _drain(start_q, started: dict[str, int]) -> None:
        while True:
            try:
                if start_q.empty():
                    return
                key, pid = start_q.get()
            except (OSError, EOFError, ValueError):
                return
            started[key] = pid

    @staticmethod
    def _dead_pids(pool) -> set[int]:
        """Pids of pool workers that exited on their own (not terminated by
        the pool after the break).  Uses the executor's process table."""
        procs = getattr(pool, "_processes", None) or {}
        dead = set()
        for pid, proc in list(procs.items()):
            code = proc.exitcode
            if code is None:
                proc.join(0.5)
                code = proc.exitcode
            if code is not None and code != -signal.SIGTERM:
                dead.add(pid)
        return dead


class DaskRunner(Runner):
    """Run tasks on a Dask distributed cluster.

    Parameters
    ----------
    scheduler_address : str, optional
        Address of a running scheduler (``"tcp://head:8786"``, or
        ``cluster.scheduler_address`` of a dask-jobqueue cluster).
    client : distributed.Client, optional
        An existing client (used as is, not closed).
    n_workers, threads_per_worker : int, optional
        For the :class:`distributed.LocalCluster` made when neither
        ``scheduler_address`` nor ``client`` is given: default one worker
        process per core with one thread each.
    cluster_kwargs : dict, optional
        Extra :class:`~distributed.LocalCluster` arguments.
    max_in_flight : int, optional
        Futures submitted at once (default: all tasks, so the scheduler can
        balance them over a growing cluster).

    Notes
    -----
    A task whose worker dies is rescheduled by the Dask scheduler on another
    worker; after ``distributed.scheduler.allowed-failures`` deaths
    (a scheduler setting; set from ``retries`` for a cluster made here) it
    fails with ``KilledWorker`` and is recorded failed.  Workers must be able
    to import clusterlab and the task function, and read the film files
    named in the payloads.
    """

    name = "dask"

    def __init__(self, scheduler_address: str | None = None, *, client: Any = None,
                 n_workers: int | None = None, threads_per_worker: int | None = None,
                 cluster_kwargs: Mapping[str, Any] | None = None,
                 max_in_flight: int | None = None) -> None:
        if scheduler_address is not None and client is not None:
            raise InputError("give DaskRunner either scheduler_address or client, not both")
        self.scheduler_address = scheduler_address
        self.client = client
        self.n_workers = n_workers
        self.threads_per_worker = threads_per_worker
        self.cluster_kwargs = dict(cluster_kwargs or {})
        self.max_in_flight = max_in_flight
        self.n_slots = 1
        self.worker_restarts = 0

    def _connect(self, retries: int):
        import dask
        from distributed import Client, LocalCluster

        if self.client is not None:
            return self.client, None, False
        if self.scheduler_address is not None:
            return Client(self.scheduler_address), None, True
        kw = dict(
            n_workers=self.n_workers or default_workers(),
            threads_per_worker=self.threads_per_worker or 1,
            processes=True, dashboard_address=":0", host="127.0.0.1",
        )
        kw.update(self.cluster_kwargs)
        with dask.config.set({"distributed.scheduler.allowed-failures": int(retries)}):
            cluster = LocalCluster(**kw)
        return Client(cluster), cluster, True

    def execute(self, tasks, fn_ref, *, retries, cancel):
        from distributed import as_completed

        client, cluster, owned = self._connect(retries)
        try:
            try:
                self.n_slots = max(1, sum(client.nthreads().values()))
            except Exception:
                self.n_slots = 1
            window = self.max_in_flight or len(tasks) or 1
            todo: deque[Task] = deque(tasks)
            live: dict[str, tuple[Any, Task]] = {}

            def submit_one() -> Any:
                task = todo.popleft()
                fut = client.submit(
                    execute_task, fn_ref, task.key, dict(task.payload),
                    key=f"clusterlab-{task.kind}-{task.key}", retries=retries, pure=False,
                )
                live[fut.key] = (fut, task)
                return fut

            ac = as_completed([submit_one() for _ in range(min(window, len(todo)))],
                              loop=client.loop, raise_errors=False)
            while not ac.is_empty():
                if cancel is not None and cancel.is_set():
                    client.cancel([f for f, _ in live.values()])
                    return
                if not ac.has_ready():
                    time.sleep(0.05)
                    continue
                for fut in ac.next_batch(block=False):
                    task = live.pop(fut.key)[1]
                    if fut.status == "finished":
                        env = fut.result()
                    elif fut.status == "cancelled":
                        fut.release()
                        continue
                    else:
                        exc = fut.exception()
                        tb = fut.traceback()
                        env = _died(task, f"{type(exc).__name__}: {exc}")
                        env["traceback"] = "".join(_tb.format_tb(tb)) if tb is not None else None
                        if type(exc).__name__ == "KilledWorker":
                            self.worker_restarts += 1
                    fut.release()
                    yield task, env
                    if todo and not (cancel is not None and cancel.is_set()):
                        ac.add(submit_one())
        finally:
            if owned:
                client.close()
            if cluster is not None:
                cluster.close()


def _make_runner(runner: str | Runner, n_workers, threads_per_worker,
                 scheduler_address) -> Runner:
    if isinstance(runner, Runner):
        return runner
    if runner == "serial":
        return SerialRunner(threads=threads_per_worker)
    if runner == "processes":
        return ProcessRunner(n_workers, threads_per_worker)
    if runner == "dask":
        return DaskRunner(scheduler_address, n_workers=n_workers,
                          threads_per_worker=threads_per_worker)
    raise InputError(
        f"runner={runner!r} is not valid; use 'processes' (default), 'serial', 'dask' "
        "or a Runner instance"
    )


# --------------------------------------------------------------------------
# orchestration


class _Stream:
    """Iterator of :class:`TaskOutcome`; ``.report`` is final once exhausted."""

    def __init__(self, gen_factory, report: RunReport) -> None:
        self.report = report
        self._gen = gen_factory()

    def __iter__(self) -> Iterator[TaskOutcome]:
        return self._gen

    def __next__(self) -> TaskOutcome:
        return next(self._gen)


def _claim_films(store: ResultStore, tasks: Iterable[Task]) -> None:
    """Register the film of every task with the store before anything runs
    (:meth:`ResultStore.claim_film` refuses a film other than the store's)."""
    films: dict[str, str] = {}
    for t in tasks:
        spec = t.payload.get("film") if isinstance(t.payload, Mapping) else None
        if isinstance(spec, Mapping) and spec.get("film_id"):
            films.setdefault(str(spec["film_id"]), str(spec.get("topology", "")))
    for fid, top in films.items():
        store.claim_film(fid, topology=top)


def iter_tasks(
    tasks: Iterable[Task],
    fn: str | Callable,
    *,
    store: ResultStore,
    runner: str | Runner = "processes",
    n_workers: int | None = None,
    threads_per_worker: int | None = None,
    scheduler_address: str | None = None,
    retries: int = 2,
    cancel: threading.Event | None = None,
    yield_skipped: bool = False,
) -> _Stream:
    """Like :func:`run_tasks`, but an iterator of :class:`TaskOutcome`.

    Each outcome is yielded after its record is committed to the store.
    The returned object has a ``report`` attribute (a :class:`RunReport`),
    complete once the iterator is exhausted.  Arguments as in
    :func:`run_tasks`.
    """
    if not isinstance(store, ResultStore):
        raise InputError(f"store must be a ResultStore, got {type(store).__name__}")
    if store.readonly:
        raise InputError(f"store {str(store.path)!r} is read-only; open it writable to run tasks")
    if not isinstance(retries, int) or retries < 0:
        raise InputError(f"retries={retries!r} must be a non-negative integer")
    fn_ref = _fn_ref(fn)
    back = _make_runner(runner, n_workers, threads_per_worker, scheduler_address)
    report = RunReport(runner=back.name)

    unique: dict[str, Task] = {}
    for t in tasks:
        if not isinstance(t, Task):
            raise InputError(f"tasks must be Task objects, got {type(t).__name__}")
        if t.key in unique:
            report.duplicates += 1
            continue
        unique[t.key] = t
    report.n_tasks = len(unique)
    _claim_films(store, unique.values())

    done_keys = set(store.keys(status="done"))
    todo = [t for t in unique.values() if t.key not in done_keys]
    skipped = [t for t in unique.values() if t.key in done_keys]
    report.skipped = len(skipped)

    def gen() -> Iterator[TaskOutcome]:
        t0 = time.perf_counter()
        if yield_skipped:
            for t in skipped:
                yield TaskOutcome(t, "skipped", {})
        seen: set[str] = set()
        try:
            if todo:
                for task, env in back.execute(todo, fn_ref, retries=retries, cancel=cancel):
                    if task.key in seen:  # a back end must never yield twice; be safe
                        continue
                    seen.add(task.key)
                    ts = time.perf_counter()
                    spec = task.to_dict()
                    if env["ok"]:
                        store.put(task.key, spec, env["result_json"], env["summary"],
                                  kind=task.kind, wall_s=env["wall_s"], worker=env["worker"])
                        report.done += 1
                        out = TaskOutcome(task, "done", env["summary"], None,
                                          env["wall_s"], env["worker"])
                    else:
                        store.put_failure(task.key, spec, env["error"], env["traceback"],
                                          kind=task.kind, wall_s=env["wall_s"],
                                          worker=env["worker"])
                        report.failed += 1
                        report.failures.append((task.key, env["error"]))
                        out = TaskOutcome(task, "failed", {}, env["error"],
                                          env["wall_s"], env["worker"])
                    report.compute_s += env["wall_s"] or 0.0
                    report.store_s += time.perf_counter() - ts
                    yield out
        finally:
            report.cancelled = bool(cancel is not None and cancel.is_set())
            report.unfinished = len(todo) - len(seen)
            report.n_slots = back.n_slots
            report.worker_restarts = back.worker_restarts
            report.wall_s = time.perf_counter() - t0

    return _Stream(gen, report)


def run_tasks(
    tasks: Iterable[Task],
    fn: str | Callable,
    *,
    store: ResultStore,
    runner: str | Runner = "processes",
    n_workers: int | None = None,
    threads_per_worker: int | None = None,
    scheduler_address: str | None = None,
    progress: bool = True,
    desc: str = "clusters",
    retries: int = 2,
    on_result: Callable[[Task, dict], Any] | None = None,
    on_error: Callable[[Task, str], Any] | None = None,
    cancel: threading.Event | None = None,
) -> RunReport:
    """Run cluster calculations, storing each result as it completes.

    Parameters
    ----------
    tasks : iterable of Task
        The calculations.  Tasks with the same key are run once.
    fn : str or callable
        Worker function ``fn(payload: dict) -> (result_json: str,
        summary: dict)``, as an import path ``"package.module:function"``
        (preferred) or a module-level function.
    store : ResultStore
        Where results go; keys already done there are skipped.
    runner : {"processes", "serial", "dask"} or Runner
        Back end.  ``"processes"`` (default) uses local worker processes,
        ``"dask"`` a scheduler at ``scheduler_address`` or a LocalCluster
        made for this run.  Pass a :class:`ProcessRunner` or
        :class:`DaskRunner` for more control (e.g. an existing Client).
    n_workers : int, optional
        Worker processes (default: one per usable core).
    threads_per_worker : int, optional
        OpenMP/BLAS threads per worker (default 1).
    scheduler_address : str, optional
        Dask scheduler to use with ``runner="dask"``.
    progress : bool
        Show a progress bar (text in a terminal, widget in Jupyter).
    desc : str
        Progress bar label.
    retries : int
        Times a task is run again after its worker process died (default 2).
        Tasks that raise are not retried in the same run; they are recorded
        failed and retried by the next run.
    on_result : callable, optional
        ``on_result(task, summary)``, called in the client after each result
        is stored.  Its exceptions are reported as warnings and do not stop
        the study.
    on_error : callable, optional
        ``on_error(task, error_text)``, called after each failure is stored.
    cancel : threading.Event, optional
        Set it (from another thread, a widget button) to stop submitting,
        cancel tasks not yet started and return the partial report.

    Returns
    -------
    RunReport
        Counts (done, skipped, failed, unfinished), wall time and overhead.

    Raises
    ------
    InputError
        For a bad runner name, task function reference, store or retries.

    Examples
    --------
    >>> import tempfile, os
    >>> st = ResultStore(os.path.join(tempfile.mkdtemp(), "demo.sqlite"))
    >>> tasks = [Task.make("toy", {"x": float(i)}) for i in range(3)]
    >>> rep = run_tasks(tasks, "clusterlab.runner:_echo_task", store=st,
    ...                 runner="serial", progress=False)
    >>> (rep.done, rep.skipped, rep.failed)
    (3, 0, 0)
    >>> run_tasks(tasks, "clusterlab.runner:_echo_task", store=st,
    ...           runner="serial", progress=False).skipped
    3
    """
    from .progress import progress_bar

    stream = iter_tasks(
        tasks, fn, store=store, runner=runner, n_workers=n_workers,
        threads_per_worker=threads_per_worker, scheduler_address=scheduler_address,
        retries=retries, cancel=cancel, yield_skipped=False,
    )
    report = stream.report
    warned = False

    def _call(cb, *args) -> None:
        nonlocal warned
        try:
            cb(*args)
        except Exception as exc:  # never let a display callback kill a study
            log.exception("result callback %r failed", cb)
            if not warned:
                warnings.warn(f"result callback {cb!r} raised {type(exc).__name__}: {exc}; "
                              "the study goes on", RuntimeWarning, stacklevel=3)
                warned = True

    bar = progress_bar(report.n_tasks, desc, enabled=progress, initial=report.skipped)
    try:
        for out in stream:
            bar.update(1)
            if report.failed:
                bar.set_postfix(failed=report.failed, refresh=False)
            if out.status == "done" and on_result is not None:
                _call(on_result, out.task, out.summary)
            elif out.status == "failed" and on_error is not None:
                _call(on_error, out.task, out.error)
    finally:
        bar.close()
    log.info("%s", report)
    return report


def _echo_task(payload: Mapping[str, Any]) -> tuple[str, dict]:
    """Trivial task function for examples: echoes ``payload["x"]`` squared."""
    x = float(payload["x"])
    return json.dumps({"x": x, "x2": x * x}), {"x2": x * x}
