"""Radius scan of one guest of the doped demo film at the emitter preset ``fast-large``.

Measures the convergence of the S1/T1 environment shifts of the donor-acceptor
emitter in its polar host, and the cost of each calculation (stage timings from
the engine), on this machine. One thread; from an empty store.

    python bench/doped_guest_scan.py [--molecule 1400] [--radii 4,8,12,16] [--store PATH]

Writes ``bench/results/doped_guest_scan.json``: the scan table's main columns,
the verdict, the per-calculation stage timings, wall and CPU time, load average.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")


def main(argv=None) -> int:
    import clusterlab
    from clusterlab import Method
    from clusterlab.demo import doped_demo_paths
    from clusterlab.ranges import parse_radii
    from clusterlab.store import ResultStore

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--molecule", type=int, default=1400)
    ap.add_argument("--radii", default="4,8,12,16")
    ap.add_argument("--preset", default="fast-large")
    ap.add_argument("--store", default="/tmp/doped_guest_scan.sqlite")
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "doped_guest_scan.json"))
    a = ap.parse_args(argv)
    if os.path.exists(a.store):
        sys.exit(f"{a.store} exists; the benchmark starts from an empty store")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = clusterlab.load_film(*doped_demo_paths())
    method = Method.preset(a.preset)
    t0 = time.perf_counter()
    scan = clusterlab.radius_scan(film, a.molecule, parse_radii(a.radii), method, frame=0, store=a.store,
                                  runner="serial", progress=True)
    wall = time.perf_counter() - t0
    r = resource.getrusage(resource.RUSAGE_SELF)
    cols = ["radius_A", "n_env_molecules", "n_charges", "S1_eV", "S1_shift_eV", "S1_osc", "T1_eV", "T1_shift_eV",
            "dEST_eV", "S1_ct_distance_A", "T1_ct_distance_A", "wall_s"]
    table = scan.table[[c for c in cols if c in scan.table.columns]]
    print(scan.verdict.message)
    print(table.to_string())
    store = ResultStore(a.store)
    timings = [json.loads(store.get(k).result_json).get("meta", {}).get("timings_s", {}) for k in store.keys()]
    out = {"molecule": a.molecule, "method": method.describe(), "threads": int(os.environ["OMP_NUM_THREADS"]),
           "verdict": scan.verdict.message, "table": json.loads(table.to_json(orient="records")),
           "timings_s_per_calculation": timings, "wall_s": wall, "cpu_s": r.ru_utime + r.ru_stime,
           "load_average_1min_end": os.getloadavg()[0]}
    Path(a.out).write_text(json.dumps(out, indent=1))
    print(f"wall {wall:.0f} s, CPU {out['cpu_s']:.0f} s -> {a.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
