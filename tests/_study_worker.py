"""Cheap deterministic task function and a study script for runner tests.

``compute(payload)`` diagonalises ``scale * T_n`` where ``T_n`` is the
n x n tridiagonal matrix (2 on the diagonal, -1 off it), whose eigenvalues
are known exactly: ``2 - 2 cos(k pi / (n + 1))``, k = 1..n (the discrete
Laplacian; e.g. G. Strang, "Linear Algebra and Its Applications", 4th ed.,
2006).  Payload options simulate trouble:

- ``sleep_s``: sleep before computing;
- ``raise``: raise ``ValueError`` with this text;
- ``die_once``: a marker file path; if it does not exist, create it and
  ``os._exit(1)`` (a dying worker), otherwise compute normally;
- ``die_always``: ``os._exit(1)`` every time;
- ``log``: a file to which ``start``/``end`` lines (key, pid, time) are
  appended, to count how often each task really ran.

Run as a script, it is a small resumable study::

    python tests/_study_worker.py STORE.sqlite N [--runner processes]
        [--workers 2] [--sleep 0.3] [--log FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np


def _log(path: str | None, what: str, key: str) -> None:
    if not path:
        return
    line = f"{what} {key} {os.getpid()} {time.time():.6f}\n"
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, line.encode())  # one short O_APPEND write: atomic
    finally:
        os.close(fd)


def compute(payload: dict) -> tuple[str, dict]:
    """Lowest eigenvalues of ``scale * tridiag(-1, 2, -1)`` of size n."""
    key = str(payload.get("name", "?"))
    _log(payload.get("log"), "start", key)
    if payload.get("sleep_s"):
        time.sleep(float(payload["sleep_s"]))
    if payload.get("raise"):
        raise ValueError(str(payload["raise"]))
    if payload.get("die_always"):
        os._exit(1)
    marker = payload.get("die_once")
    if marker and not os.path.exists(marker):
        with open(marker, "w") as fh:
            fh.write(str(os.getpid()))
        os._exit(1)
    n = int(payload["n"])
    scale = float(payload.get("scale", 1.0))
    mat = scale * (2.0 * np.eye(n) - np.eye(n, k=1) - np.eye(n, k=-1))
    w = np.linalg.eigvalsh(mat)
    _log(payload.get("log"), "end", key)
    result = {"eigenvalues": w.tolist(), "n": n, "scale": scale, "pid": os.getpid()}
    summary = {"lowest": float(w[0]), "highest": float(w[-1]), "pid": os.getpid()}
    return json.dumps(result), summary


def make_tasks(n_tasks: int, *, sleep_s: float = 0.0, log: str | None = None, **extra):
    """``n_tasks`` tasks of sizes 3, 4, ... (distinct keys)."""
    from clusterlab.runner import Task

    tasks = []
    for i in range(n_tasks):
        payload = {"name": f"t{i:03d}", "n": 3 + i, "scale": 0.5 + 0.1 * i,
                   "sleep_s": sleep_s, "log": log, **extra}
        tasks.append(Task.make("toy", payload, name=payload["name"], n=payload["n"],
                               scale=payload["scale"]))
    return tasks


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("store")
    ap.add_argument("n", type=int)
    ap.add_argument("--runner", default="processes")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--sleep", type=float, default=0.3)
    ap.add_argument("--log", default=None)
    args = ap.parse_args(argv)

    from clusterlab.runner import run_tasks
    from clusterlab.store import ResultStore

    tasks = make_tasks(args.n, sleep_s=args.sleep, log=args.log)
    with ResultStore(args.store) as store:
        rep = run_tasks(tasks, "_study_worker:compute", store=store, runner=args.runner,
                        n_workers=args.workers, progress=False)
    print(json.dumps({"done": rep.done, "skipped": rep.skipped, "failed": rep.failed,
                      "unfinished": rep.unfinished}))
    return 0 if rep.complete else 1


if __name__ == "__main__":
    here = os.path.dirname(os.path.abspath(__file__))
    sys.path.insert(0, here)  # so workers import this file as "_study_worker"
    sys.path.insert(1, os.path.dirname(here))
    sys.exit(main())
