"""Benchmark: the cost of one conformer reference's finite-field response for the doped
film's 60-atom emitter, from the first field calculations of the real fit.

Runs :func:`clusterlab.qm.finitefield.differential_polarizability` as the study's film
model runs it (:func:`clusterlab.study.filmmodel.run_film_model` with ``response = true``:
S1 only, triplets left out; 1 + 24 engine calculations, each an SCF at 1e-11 Eh and the
singlet response in a uniform field, warm-started from the zero-field calculation) on guest ``--molecule``
of frame 0 with the study preset ``fast-large``, times the zero field and the first
``--fields`` field calculations through its progress callback, and stops the fit there.
Prints the measured seconds of each and the whole reference extrapolated from their
mean (1 zero field + 24 fields); writes ``bench/results/emitter_field_cost.json``.

Usage::

    OMP_NUM_THREADS=2 python bench/emitter_field_cost.py [--molecule 1400] [--fields 2]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

import clusterlab as cl  # noqa: E402 - before PySCF (BLAS kernel)
from clusterlab.demo import doped_demo_paths  # noqa: E402
from clusterlab.qm import Method  # noqa: E402
from clusterlab.qm.finitefield import differential_polarizability  # noqa: E402
from clusterlab.versions import software_versions  # noqa: E402


class _Enough(Exception):
    """Raised from the progress callback once the fields asked for are timed."""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--molecule", type=int, default=1400)
    ap.add_argument("--fields", type=int, default=2, help="field calculations to time after the zero field")
    ap.add_argument("--preset", default="fast-large")
    ap.add_argument("--out", default=os.path.join(HERE, "results", "emitter_field_cost.json"))
    a = ap.parse_args(argv)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = cl.load_film(*doped_demo_paths())
    c = film.carve(a.molecule, 0.0, frame=0)
    method = Method.preset(a.preset).replace(n_triplets=0)  # run_film_model's field method for S1
    marks = [(time.perf_counter(), time.process_time())]

    def tick() -> None:
        marks.append((time.perf_counter(), time.process_time()))
        w, cpu = marks[-1][0] - marks[-2][0], marks[-1][1] - marks[-2][1]
        print(f"  calculation {len(marks) - 1}: {w:.1f} s wall, {cpu:.1f} s CPU", flush=True)
        if len(marks) - 1 > a.fields:
            raise _Enough

    try:
        differential_polarizability(c.qm_symbols, c.qm_positions, method, states=("S1",), on_field=tick)
    except _Enough:
        pass
    walls = [marks[i + 1][0] - marks[i][0] for i in range(len(marks) - 1)]
    cpus = [marks[i + 1][1] - marks[i][1] for i in range(len(marks) - 1)]
    n_fields = 24  # two strengths x six directions x two signs
    field_w, field_c = sum(walls[1:]) / len(walls[1:]), sum(cpus[1:]) / len(cpus[1:])
    res = {"molecule": a.molecule, "n_atoms": len(c.qm_symbols), "method": method.describe(),
           "zero_field_s": {"wall": walls[0], "cpu": cpus[0]},
           "field_s": {"wall": walls[1:], "cpu": cpus[1:]},
           "reference_estimate_s": {"wall": walls[0] + n_fields * field_w, "cpu": cpus[0] + n_fields * field_c},
           "note": "1 zero field measured + 24 fields at the measured mean of the first ones (an extrapolation)",
           "load_average_1min_end": os.getloadavg()[0], "omp_threads": os.environ.get("OMP_NUM_THREADS"),
           "versions": software_versions()}
    os.makedirs(os.path.dirname(os.path.abspath(a.out)), exist_ok=True)
    with open(a.out, "w", encoding="utf-8") as fh:
        json.dump(res, fh, indent=2, default=float)
    est = res["reference_estimate_s"]
    print(f"zero field {walls[0]:.0f} s, field calculations {field_w:.0f} s wall each (mean of {len(walls) - 1}); "
          f"one reference ≈ {est['wall'] / 60:.1f} min wall, {est['cpu'] / 60:.1f} min CPU; written {a.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
