"""Parity of the electrostatic site-energy model against embedded QM.

For ``N_MOL`` demo-film molecules (frame 0) this script
1. fits state charges once on a reference copy (``StateChargeSet.from_film``,
   the same method as the QM; cached in ``bench/results/sitemodel_charges.json``);
2. computes the model's shifts (``film_site_energies``, same radius and rule);
3. runs ``clusterlab.qm.engine.excitations`` on ``film.carve(i, RADIUS)``
   (and the charged states when the method has ``charged_states``);
4. prints RMS error, mean error and Pearson r of S1, T1 (IP, EA) shifts,
   saves a parity plot and ``bench/results/parity_sitemodel.json``.

The QM embedding uses Gaussian-smeared point charges (the method's
``charge_smearing_A``), the model bare Coulomb sums; the environment charges
of both are the film's (topology) charges.

Run: ``OMP_NUM_THREADS=2 python bench/parity_sitemodel.py [--n 10] [--radius 10]``
(about 10 minutes of CPU at the sto-3g-level setting below).
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings

import numpy as np

from clusterlab import load_film
from clusterlab.electrostatics.sitemodel import StateChargeSet, film_site_energies

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "results")


def stats(x: np.ndarray, y: np.ndarray) -> dict[str, float]:
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    d = y - x
    r = float(np.corrcoef(x, y)[0, 1]) if len(x) > 2 and x.std() > 0 and y.std() > 0 else float("nan")
    return {"n": int(len(x)), "rms_error_eV": float(np.sqrt(np.mean(d**2))) if len(x) else float("nan"),
            "mean_error_eV": float(d.mean()) if len(x) else float("nan"), "pearson_r": r,
            "qm_std_eV": float(x.std()) if len(x) else float("nan")}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--radius", type=float, default=10.0)
    ap.add_argument("--basis", default="6-31g")
    ap.add_argument("--xc", default="b3lyp")
    ap.add_argument("--charged", action="store_true", help="also IP/EA (ΔSCF; doubles the cost)")
    ap.add_argument("--preset", default="draft", help="method preset of the QM side (e.g. fast-stda)")
    args = ap.parse_args()

    from clusterlab.demo import demo_paths
    from clusterlab.qm.engine import excitations
    from clusterlab.qm.method import Method
    from clusterlab.study.plots import plot_parity

    os.makedirs(OUT, exist_ok=True)
    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(top, traj)
    method = Method.preset(args.preset, xc=args.xc, basis=args.basis, n_singlets=3, n_triplets=3,
                           charged_states=bool(args.charged))
    cache = os.path.join(OUT, "sitemodel_charges.json")
    t0 = time.perf_counter()
    if os.path.exists(cache):
        cset = StateChargeSet.load(cache)
        if cset.method != f"{method.xc}/{method.basis}":
            cset = None
    else:
        cset = None
    if cset is None:
        cset = StateChargeSet.from_film(film, method, frame=0, grid_level=method.grid_level,
                                        density_fit=method.density_fit)
        cset.save(cache)
    t_fit = time.perf_counter() - t0
    print(f"state charges ({cset.method}): {t_fit:.1f} s")

    rng = np.random.default_rng(7)
    mols = np.sort(rng.choice(film.n_molecules, args.n, replace=False))
    states = ("S1", "T1", "cation", "anion")
    t0 = time.perf_counter()
    model = film_site_energies(film, states, radius=args.radius, frames=[0], charges=cset,
                               molecules=mols.tolist(), progress=False).set_index("molecule")
    t_model = time.perf_counter() - t0
    keys = ["S1_shift_eV", "T1_shift_eV"] + (["IP_shift_eV", "EA_shift_eV"] if args.charged else [])
    qm = {k: [] for k in keys}
    t0 = time.perf_counter()
    for m in mols:
        c = film.carve(int(m), args.radius, frame=0)
        s = excitations(c, method).summary()
        for k in keys:
            qm[k].append(float(s.get(k, np.nan)))
        print(f"  molecule {m}: " + ", ".join(f"{k} QM {qm[k][-1]:+.4f} model {model.loc[m, k]:+.4f}" for k in keys),
              flush=True)
    t_qm = time.perf_counter() - t0
    result = {"method": method.to_dict(), "radius_A": args.radius, "frame": 0, "molecules": mols.tolist(),
              "seconds": {"fit": t_fit, "model": t_model, "qm": t_qm}, "states": {}}
    xs, ys = [], []
    for k in keys:
        x, y = np.array(qm[k]), model.loc[mols, k].to_numpy(float)
        result["states"][k] = {**stats(x, y), "qm_eV": x.tolist(), "model_eV": y.tolist()}
        xs.append(x)
        ys.append(y)
        st = result["states"][k]
        print(f"{k:12s} RMS {st['rms_error_eV'] * 1e3:7.1f} meV  mean {st['mean_error_eV'] * 1e3:+7.1f} meV  "
              f"r {st['pearson_r']:.3f}  (QM spread {st['qm_std_eV'] * 1e3:.1f} meV, n={st['n']})")
    fig = plot_parity(np.concatenate(xs), np.concatenate(ys), xlabel="embedded QM shift",
                      ylabel="electrostatic model shift")
    fig.savefig(os.path.join(OUT, "parity_sitemodel.png"), dpi=120)
    with open(os.path.join(OUT, "parity_sitemodel.json"), "w", encoding="utf-8") as fh:
        json.dump(result, fh, indent=1)
    print(f"QM {t_qm:.0f} s for {len(mols)} clusters; model {t_model:.2f} s; wrote {OUT}/parity_sitemodel.json")


if __name__ == "__main__":
    main()
