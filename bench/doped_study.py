"""Benchmark: the doped-film study (``studies/doped_film.toml``) end to end from an
empty store, with the cost of each stage and the fast model's error against full TDA.

Runs the study file through :func:`clusterlab.pipeline.run_study` (scan with the
periodic limit, the polarizable scan, the QM parity sample at the converged
radius, the film-wide model, the export), then

* σ with 95 % intervals per species for S1, T1, ΔEST, IP and EA from the
  film-wide model over every molecule and frame it ran on, the trap depths
  (:func:`clusterlab.study.doped.species_energies`) and the triplet
  confinement of the guests (:func:`clusterlab.study.doped.triplet_confinement`);
* the study method against full TDA (``excited="tda"``, no orbital window, the
  same MO-basis operator, which equals PySCF's to 1e-14) on ``--tda-sites``
  clusters of the parity sample: RMS of the S1 and T1 shift differences and of
  ΔEST.

Prints wall and CPU seconds of each stage (CPU: this process and its finished
workers) with the 1-minute load average, and writes them to
``bench/results/doped_study.json`` (``doped_study_small.json`` with ``--small``,
``doped_study_medium.json`` with ``--medium``).

Usage::

    nice -n 19 python bench/doped_study.py --small        # STO-3G/sTDA, 2 radii, 2 guests, 1 frame
    python bench/doped_study.py --medium                  # the study's method on a reduced plan
    python bench/doped_study.py                           # the full study: hours on 2 cores
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

import clusterlab  # noqa: E402,F401 - before PySCF (BLAS kernel)
from clusterlab.export.sites import site_table  # noqa: E402
from clusterlab.pipeline import run_study  # noqa: E402
from clusterlab.study.doped import species_energies, triplet_confinement  # noqa: E402
from clusterlab.study.sample import sample_sites  # noqa: E402
from clusterlab.studyfile import load_study, method_from_study  # noqa: E402
from clusterlab.versions import software_versions  # noqa: E402

STUDY = os.path.join(ROOT, "studies", "doped_film.toml")

#: ``--small``: the same study file at minimal settings (tests the path, not the film)
SMALL = {("method", "basis"): "sto-3g", ("method", "excited"): "stda", ("scan", "radii"): [4.0, 8.0],
         ("scan", "polarizable_radius"): 4.0, ("sample", "n"): 2, ("sample", "frames"): "0",
         ("model", "frames"): "0", ("model", "response"): False, ("model", "polarize_molecules"): "1400-1401"}


#: ``--medium``: the study's own method (``fast-large``, ΔSCF ions) on a reduced plan: every stage at the
#: demo method, so each stage's cost is measured; the polarizable scan and the finite-field response are
#: left out (their costs: README), the parity sample and the full-TDA check are two guests
MEDIUM = {("scan", "radii"): [4.0, 8.0, 12.0], ("sample", "n"): 2, ("model", "response"): False,
          ("model", "polarize_molecules"): "1400-1401"}


def small_study(store: str, report: str, runner: str = "serial", sections=None) -> dict:
    """The study file with the ``--small`` overrides, a given store, report folder and runner;
    ``sections``: keep only these sections (e.g. ``["sample"]``)."""
    over = dict(SMALL)
    over.update({("output", "store"): store, ("output", "report"): report, ("runner", "kind"): runner})
    study = load_study(STUDY, overrides=over)
    if sections is not None:
        study["_present"] = [s for s in study["_present"] if s in {"film", "method", "runner", "output", *sections}]
    return study


def tda_errors(film, sample, method, store, n_sites: int, runner_kw: dict) -> dict:
    """The study method against full TDA on ``n_sites`` clusters of the sample (same radius)."""
    t = sample.at()
    t = t[t.converged.astype(bool)].sort_values(["frame", "molecule"]).head(n_sites)
    ref = method.replace(excited="tda", orbital_window_Eh=None, charged_states=False)
    w0, c0 = time.perf_counter(), time.process_time()
    rows = []
    for frame, g in t.groupby("frame"):
        full = sample_sites(film, [int(m) for m in g.molecule], [int(frame)], float(g.radius_A.iloc[0]), ref,
                            store=store, progress=False, **runner_kw).at()
        rows.append(g.merge(full, on=["frame", "molecule"], suffixes=("", "_tda")))
    pairs = rows[0] if len(rows) == 1 else __import__("pandas").concat(rows)
    out = {"n_clusters": int(len(pairs)), "reference": ref.describe(), "wall_s": time.perf_counter() - w0,
           "cpu_s_client": time.process_time() - c0}
    for q in ("S1_shift_eV", "T1_shift_eV", "dEST_eV"):
        d = pairs[q].to_numpy(float) - pairs[f"{q}_tda"].to_numpy(float)
        out[f"{q[:-3]}_rms_meV"] = float(1e3 * np.sqrt(np.nanmean(d ** 2)))
        out[f"{q[:-3]}_max_meV"] = float(1e3 * np.nanmax(np.abs(d)))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="STO-3G/sTDA, 2 radii, 2 guests, 1 frame")
    ap.add_argument("--medium", action="store_true", help="the study's method; radii 4-12 Å and the periodic "
                    "limit, no polarizable scan, 2 guests, no field response")
    ap.add_argument("--tda-sites", type=int, default=None, help="clusters of the full-TDA check (default 8; "
                    "2 with --small)")
    ap.add_argument("--runner", default=None, help="runner kind (default: the study file's)")
    ap.add_argument("--workdir", default=None, help="store and report folder (default: a new temporary one)")
    ap.add_argument("--out", default=None, help="JSON file (default bench/results/doped_study[_small].json)")
    a = ap.parse_args(argv)
    work = a.workdir or tempfile.mkdtemp(prefix="doped_study_")
    store, report = os.path.join(work, "study.sqlite"), os.path.join(work, "report")
    for p in (store, report):  # an empty store: nothing reused
        if os.path.isdir(p):
            shutil.rmtree(p)
        elif os.path.exists(p):
            os.remove(p)
    if a.small:
        study = small_study(store, report, a.runner or "serial")
    else:
        over = {("output", "store"): store, ("output", "report"): report}
        if a.medium:
            over.update(MEDIUM)
        if a.runner:
            over[("runner", "kind")] = a.runner
        study = load_study(STUDY, overrides=over)
        if a.medium:
            study["scan"]["polarizable_radius"] = None
    n_tda = a.tda_sites if a.tda_sites is not None else (2 if a.small or a.medium else 8)
    load0 = os.getloadavg()[0]
    out = run_study(study, progress=False, title="doped-film study (bench)")
    film, method = out.film, method_from_study(study)
    costs = dict(out.costs)

    # σ per species from the film-wide model alone (vacuum energies of its reference fits)
    t0, c0 = time.perf_counter(), time.process_time()
    model_sites = site_table(film, model=out.model, vacuum_eV=out.model.charges)
    energies = species_energies(model_sites, film=film)
    confinement = triplet_confinement(film, model_sites, cutoff_A=study["doped"]["neighbour_cutoff_A"] or 9.0)
    costs["statistics"] = {"wall_s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0}
    from clusterlab.pipeline import _runner_kwargs

    errors = tda_errors(film, out.sample, method, out.store_path, n_tda, _runner_kwargs(study))
    costs["tda_check"] = {"wall_s": errors.pop("wall_s"), "cpu_s": errors.pop("cpu_s_client")}

    from clusterlab.store import ResultStore

    with ResultStore(out.store_path) as st:
        tasks = st.to_frame()
    per_task = tasks.groupby("kind")["wall_s"].describe()[["count", "mean", "min", "max"]] if len(tasks) else None
    result = {
        "study": os.path.relpath(STUDY, ROOT), "small": a.small, "medium": a.medium,
        "overrides": ({f"{s}.{k}": v for (s, k), v in (SMALL if a.small else MEDIUM).items()}
                      if a.small or a.medium else {}),
        "method": method.describe(), "stages": costs,
        "load_average_1min": {"start": load0, "end": os.getloadavg()[0]}, "cpu_count": os.cpu_count(),
        "scan": {"verdict": out.scan.verdict.message, "converged_radius_A": out.scan.verdict.radius_A,
                 "polarizable": out.polarizable_scan.message if out.polarizable_scan is not None else None},
        "sample_sites": int(len(out.sample.at())),
        "model_rows": int(len(out.model.table)), "model_frames": int(out.model.table.frame.nunique()),
        "species_stats": energies.stats.to_dict(orient="records"),
        "trap_depths": energies.traps.to_dict(orient="records"),
        "triplet_confinement": confinement.summary(),
        "fast_vs_full_tda": errors,
        "per_task_wall_s": per_task.reset_index().to_dict(orient="records") if per_task is not None else [],
        "versions": software_versions(),
        "note": "model estimates; --small numbers test the path, not the film" if a.small else "model estimates",
    }
    name = "doped_study_small.json" if a.small else "doped_study_medium.json" if a.medium else "doped_study.json"
    path = a.out or os.path.join(HERE, "results", name)
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(result, fh, indent=2, default=float)
    print(f"\nstages (wall / CPU, s; load {load0:.1f} -> {os.getloadavg()[0]:.1f}):")
    for name, r in costs.items():
        print(f"  {name:<17} {r['wall_s']:9.1f} {r['cpu_s']:9.1f}")
    print("per species (film-wide model):")
    for r in energies.stats.itertuples(index=False):
        print(f"  {r.species} {r.quantity:<8} n={r.n:<5} mean {r.mean_eV:.3f} eV, σ {1e3 * r.sigma_eV:.0f} meV "
              f"[{1e3 * r.sigma_lo_eV:.0f}, {1e3 * r.sigma_hi_eV:.0f}]")
    print(f"fast model vs full TDA on {errors['n_clusters']} clusters: S1 shift RMS {errors['S1_shift_rms_meV']:.1f} "
          f"meV, T1 shift RMS {errors['T1_shift_rms_meV']:.1f} meV, ΔEST RMS {errors['dEST_rms_meV']:.1f} meV")
    print(f"written: {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
