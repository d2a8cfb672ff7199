"""Environment shifts from sTDA and stda-refined against full TDA on demo-film clusters.

Shifts (embedded minus vacuum) are what disorder studies consume, so this
reports the RMS difference of the S1 and T1 shifts between the two
excited-state models at the same functional, basis and embedding, over a
sample of demo-film molecules. Writes ``bench/results/stda_shifts.json``.

Run: ``OMP_NUM_THREADS=2 python bench/stda_shifts.py --n 4 --radius 8 --basis sto-3g``
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings

import numpy as np

OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=4, help="number of molecules")
    ap.add_argument("--radius", type=float, default=8.0)
    ap.add_argument("--basis", default="sto-3g")
    ap.add_argument("--states", type=int, default=2)
    args = ap.parse_args()

    import clusterlab as cl
    from clusterlab.demo import demo_paths

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = cl.load_film(*demo_paths())
    base = cl.Method.preset("fast-stda", basis=args.basis, n_singlets=args.states, n_triplets=args.states)
    methods = {"tda": base.replace(excited="tda"), "stda": base, "refined": base.replace(excited="stda-refined")}
    mols = np.sort(np.random.default_rng(3).choice(film.n_molecules, args.n, replace=False))
    rows = []
    for m in mols:
        cluster = film.carve(int(m), args.radius)
        row = {"molecule": int(m), "n_charges": cluster.n_charges}
        for name, meth in methods.items():
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                s = cl.excitations(cluster, meth).summary()
            row[f"{name}_s"] = time.perf_counter() - t0
            for k in ("S1_shift_eV", "S1_followed_shift_eV", "T1_shift_eV", "S1_vacuum_eV", "T1_vacuum_eV"):
                row[f"{name}_{k}"] = float(s[k])
        rows.append(row)
        print({k: (round(v, 4) if isinstance(v, float) else v) for k, v in row.items()}, flush=True)
    res = {"radius_A": args.radius, "method": base.to_dict(), "rows": rows, "rms_eV": {}, "mean_eV": {}}
    for model in ("stda", "refined"):
        for k in ("S1_shift_eV", "S1_followed_shift_eV", "T1_shift_eV", "S1_vacuum_eV", "T1_vacuum_eV"):
            d = np.array([r[f"{model}_{k}"] - r[f"tda_{k}"] for r in rows])
            res["rms_eV"][f"{model}:{k}"] = float(np.sqrt(np.mean(d**2)))
            res["mean_eV"][f"{model}:{k}"] = float(np.mean(d))
            spread = float(np.std([r[f"tda_{k}"] for r in rows]))
            print(f"{model:7s} {k:22s} - TDA: RMS {res['rms_eV'][f'{model}:{k}'] * 1e3:7.1f} meV, "
                  f"mean {res['mean_eV'][f'{model}:{k}'] * 1e3:+7.1f} meV (TDA spread {spread * 1e3:.1f} meV, "
                  f"n={len(rows)})")
    t = {name: sum(r[f"{name}_s"] for r in rows) for name in methods}
    print(f"wall per cluster (vacuum + embedded, same SCF settings): TDA {t['tda'] / len(rows):.1f} s, "
          f"sTDA {t['stda'] / len(rows):.1f} s, stda-refined {t['refined'] / len(rows):.1f} s")
    os.makedirs(OUT, exist_ok=True)
    with open(os.path.join(OUT, "stda_shifts.json"), "w", encoding="utf-8") as fh:
        json.dump(res, fh, indent=1)


if __name__ == "__main__":
    main()
