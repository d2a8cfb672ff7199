"""Where the demo study's time goes: each stage and the pieces inside it.

Runs ``clusterlab demo`` (``--quick`` for the small one) into a fresh folder and
prints, besides the demo's own per-stage table (wall and CPU time, calculations
run and taken from the store), the pieces inside the stages:

- scan and sample: each cluster calculation's vacuum and embedded parts (the
  engine's own timings, read back from the result store);
- film model: the state-charge fits, the finite fields of every conformer
  reference, the model on every molecule-frame and the Thole polarization,
  each with wall and CPU time of this process (the fits run here).

Usage::

    python bench/demo_stages.py [--quick] [--out /tmp/demo_stages] [--workers 2]

Speed is never asserted; the machine may be shared, so read the CPU times
beside the wall times.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))


def _timed(label: str, fn, log: list):
    """``fn`` wrapped so that each call appends (label, wall s, CPU s of this process)."""
    def wrapper(*a, **kw):
        w, c = time.perf_counter(), time.process_time()
        try:
            return fn(*a, **kw)
        finally:
            log.append((label, time.perf_counter() - w, time.process_time() - c))
    return wrapper


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--out", default="/tmp/demo_stages")
    ap.add_argument("--workers", type=int, default=None)
    args = ap.parse_args()

    import clusterlab.study.filmmodel as fm
    from clusterlab.demo import run_demo
    from clusterlab.store import ResultStore

    log: list = []
    fm.fit_state_charges = _timed("model: state-charge fits", fm.fit_state_charges, log)
    fm.add_field_response = _timed("model: finite fields (all references)", fm.add_field_response, log)
    run = fm.FilmModel.run

    def model_run(self, frames=None, molecules=None, progress=True):
        label = ("model: Thole polarization" if self.polarization else
                 "parity: model on the sampled sites" if molecules is not None else "model: every molecule-frame")
        return _timed(label, run, log)(self, frames, molecules, progress)

    fm.FilmModel.run = model_run
    if os.path.exists(args.out):
        shutil.rmtree(args.out)
    out = run_demo(args.out, quick=args.quick, workers=args.workers, progress=False)

    print("\n== inside the stages ==")
    with ResultStore(out.store_path, readonly=True) as st:
        df = st.to_frame(status="done")
        for _, r in df.iterrows():
            rec = st.get(r["key"])
            t = json.loads(rec.result_json).get("meta", {}).get("timings_s", {}) if rec.result_json else {}
            where = "periodic" if r.get("kind") == "periodic" else f"R {float(r['radius_A']):g} Å"
            print(f"  cluster f{int(r['frame'])} m{int(r['molecule'])} {where}: total {t.get('total', float('nan')):.1f} s, "
                  f"vacuum {t.get('vacuum', 0.0):.1f} s")
    for label, w, c in log:
        print(f"  {label}: {w:.1f} s wall, {c:.1f} s CPU")
    print(json.dumps(out.costs, indent=1))


if __name__ == "__main__":
    main()
