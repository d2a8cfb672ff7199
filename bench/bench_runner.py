"""Benchmark of the runner: 8 embedded TDA calculations with 1 local worker,
2 local workers and a Dask LocalCluster of 2 workers, in one run.

Each task is RHF + TDA (3 singlets) of formaldehyde in 6-311+G* with six
point charges placed around it; the payload carries the geometry and charges
itself, so it needs no film file.  Prints wall times, the speed-up over one
worker (target >= 1.7x on 2 cores), and the runner + store overhead per
task relative to the mean calculation time.

Usage::

    OMP_NUM_THREADS=1 python bench/bench_runner.py [--tasks 8] [--basis 6-311+g*]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(1, str(HERE.parent))

FORMALDEHYDE_A = [
    ("C", (0.0, 0.0, 0.0)),
    ("O", (0.0, 0.0, 1.205)),
    ("H", (0.0, 0.94, -0.59)),
    ("H", (0.0, -0.94, -0.59)),
]


def embedded_tda(payload: dict) -> tuple[str, dict]:
    """RHF + TDA of a small molecule in point charges (payload is
    self-contained: ``symbols``, ``coords_A``, ``charge_xyz_A``,
    ``charges_e``, ``basis``, ``nstates``)."""
    import numpy as np
    from pyscf import gto, qmmm, scf, tdscf

    from clusterlab.units import HARTREE_TO_EV

    atom = [(s, tuple(x)) for s, x in zip(payload["symbols"], payload["coords_A"])]
    mol = gto.M(atom=atom, basis=payload["basis"], unit="Angstrom", verbose=0)
    mf = qmmm.mm_charge(scf.RHF(mol), np.asarray(payload["charge_xyz_A"]),
                        np.asarray(payload["charges_e"]), unit="Angstrom")
    mf.kernel()
    td = tdscf.TDA(mf)
    td.nstates = int(payload["nstates"])
    td.kernel()
    e_eV = (np.asarray(td.e) * HARTREE_TO_EV).tolist()
    summary = {"S1_eV": e_eV[0], "converged": bool(mf.converged and all(td.converged)),
               "e_scf_Eh": float(mf.e_tot)}
    return json.dumps({"excitation_eV": e_eV, **summary}), summary


def make_tasks(n: int, basis: str):
    import numpy as np

    from clusterlab.runner import Task

    rng = np.random.default_rng(2024)
    tasks = []
    for i in range(n):
        xyz = np.array([[4, 0, 0], [-4, 0, 0], [0, 4, 1], [0, -4, 1], [0, 0, 5], [0, 0, -4.0]])
        xyz = xyz + rng.normal(scale=0.3, size=xyz.shape)
        q = np.array([0.4, -0.4, 0.3, -0.3, 0.2, -0.2])
        payload = {"symbols": [s for s, _ in FORMALDEHYDE_A],
                   "coords_A": [list(x) for _, x in FORMALDEHYDE_A],
                   "charge_xyz_A": xyz.tolist(), "charges_e": q.tolist(),
                   "basis": basis, "nstates": 3, "index": i}
        tasks.append(Task.make("excitations", payload))
    return tasks


def main() -> None:
    ap = argparse.ArgumentParser(description="runner benchmark")
    ap.add_argument("--tasks", type=int, default=8)
    ap.add_argument("--basis", default="6-311+g*")
    args = ap.parse_args()
    os.environ.setdefault("OMP_NUM_THREADS", "1")

    from clusterlab.runner import DaskRunner, ProcessRunner, run_tasks
    from clusterlab.store import ResultStore

    tasks = make_tasks(args.tasks, args.basis)
    print(f"{len(tasks)} tasks: formaldehyde RHF/TDA {args.basis} in 6 point charges; "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at start")
    configs = [
        ("1 worker (processes)", ProcessRunner(n_workers=1, threads_per_worker=1)),
        ("2 workers (processes)", ProcessRunner(n_workers=2, threads_per_worker=1)),
        ("Dask LocalCluster 2x1", DaskRunner(n_workers=2, threads_per_worker=1)),
    ]
    rows = []
    ref_s1 = None
    with tempfile.TemporaryDirectory() as tmp:
        for label, runner in configs:
            with ResultStore(Path(tmp) / f"{runner.name}{runner.n_slots}.sqlite") as st:
                t0 = time.perf_counter()
                rep = run_tasks(tasks, "bench_runner:embedded_tda", store=st, runner=runner,
                                progress=False)
                wall = time.perf_counter() - t0
                s1 = st.to_frame().sort_values("index")["S1_eV"].to_numpy()
            if rep.done != len(tasks):
                raise SystemExit(f"{label}: only {rep.done} of {len(tasks)} done: {rep.failures}")
            if ref_s1 is None:
                ref_s1 = s1
            drift = float(abs(s1 - ref_s1).max())
            mean_calc = rep.compute_s / rep.executed
            rows.append((label, wall, rep, mean_calc, drift))
            print(f"  {label:24s} wall {wall:6.1f} s  mean calc {mean_calc:5.2f} s  "
                  f"overhead {rep.overhead_per_task_s:5.2f} s/task "
                  f"({rep.overhead_per_task_s / mean_calc:5.1%} of calc)  "
                  f"store+callbacks {rep.store_s / rep.executed * 1e3:5.1f} ms/task  "
                  f"max |dS1| vs 1 worker {drift:.1e} eV", flush=True)
    base = rows[0][1]
    print("speed-up over 1 worker (wall, pool start included):")
    for label, wall, *_ in rows[1:]:
        print(f"  {label:24s} {base / wall:4.2f}x  (target >= 1.7x on 2 free cores)")
    print(f"load average {os.getloadavg()[0]:.1f} at end (other jobs share this machine)")


if __name__ == "__main__":
    main()
