"""Parity of the film model's Thole ion polarization against polarizable QM embedding.

For ``--n`` demo-film molecules of frame 0 (molecule 0 first, the rest drawn with
``numpy.random.default_rng(--seed)``; the list is printed) this script

1. runs :func:`clusterlab.charged_states` (ΔSCF IP/EA only, no excited states) on
   ``film.carve(i, --radius, polarizable_radius=--inner)`` with the ``fast-refined``
   preset's ground-state part (B3LYP/6-31G, density fitting, grid 1) and
   ``environment="polarizable"``: P+ = ``IP_polarization_eV`` and P- =
   ``EA_polarization_eV`` (polarizable minus fixed charges on one cluster), plus the
   fixed-charge and polarized IP/EA themselves; results per molecule are cached in
   ``bench/results/parity_polarization_qm.json`` (resumable);
2. evaluates the film model (:class:`clusterlab.study.filmmodel.FilmModel`, cation
   and anion, ``polarization=True``) for the same molecules and frame with the SAME
   polarizable region (``polarizable_radius_A = --inner``: the environment images
   that carry induced dipoles are those carving would make polarizable) in the
   variants that locate the difference (without the neutral-state induction term,
   and with it, which is the model's default), and, when asked, with a calibration
   scale fitted on this set (``--fit-scale``);
3. prints per-molecule rows, MAE, RMS, mean error, Pearson r, mean and σ of P+ and
   P- on both sides, and the spread (σ over the molecules) of the IP/EA site
   energies with and without polarization on both sides.

Sign conventions: both sides give P as "polarizable minus fixed" of the quantity:
P+ = ΔIP (negative: the cation is stabilized) and P- = ΔEA (positive: the anion is
stabilized). The model's ``P_cation_eV`` is ΔIP, its ``P_anion_eV`` is -ΔEA.

The state charges of the model (ΔSCF ESP charges of four conformer references,
B3LYP/6-31G) come from ``bench/results/sitemodel_charges.json`` (written by
``bench/parity_sitemodel.py``).

Why ``--inner 6``: ``bench/results/bench_polarizable.txt`` (molecule 0) gives ΔIP
-0.652/-0.713/-0.718 eV at 4/6/8 Å: 6 Å is converged to 5 meV for the cation, while
ΔEA still grows (+0.455/+0.528/+0.645 eV) and 8 Å costs about twice 6 Å. Both sides
use the same inner region, so the comparison is fair at any inner radius.

Run: ``OMP_NUM_THREADS=1 python bench/parity_polarization.py --n 8 > bench/results/parity_polarization.txt``
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "results")


def pick_molecules(n_molecules: int, n: int, seed: int) -> list[int]:
    """Molecule 0 (the one of the convergence bench) and ``n - 1`` drawn with ``seed``."""
    rng = np.random.default_rng(seed)
    rest = [int(m) for m in rng.permutation(n_molecules) if int(m) != 0]
    return [0] + rest[: n - 1]


def qm_rows(film, mols, method, radius_A: float, inner_A: float, cache: str, only: int | None) -> dict:
    """Polarizable ΔSCF per molecule, cached by method key, radii and molecule."""
    from clusterlab import charged_states

    allq = json.load(open(cache)) if os.path.exists(cache) else {}
    tag = f"{method.key()}:R{radius_A:g}:inner{inner_A:g}"
    block = allq.setdefault(tag, {})
    for m in mols[:only]:
        if str(m) in block:
            continue
        t0 = time.perf_counter()
        cluster = film.carve(int(m), radius_A, frame=0, polarizable_radius=inner_A)
        res = charged_states(cluster, method)
        s = {k: float(v) for k, v in res.summary().items() if isinstance(v, (int, float, np.floating))}
        s.update(seconds=time.perf_counter() - t0, n_dipoles=int(np.count_nonzero(cluster.env_polarizable)),
                 converged=bool(res.converged))
        block[str(m)] = s
        with open(cache, "w", encoding="utf-8") as fh:
            json.dump(allq, fh, indent=1)
        print(f"  QM molecule {m}: {s['seconds']:.0f} s, {s['n_dipoles']} dipoles, "
              f"dIP {s['IP_polarization_eV']:+.3f} dEA {s['EA_polarization_eV']:+.3f} eV", flush=True)
    return block


def agreement(x: np.ndarray, y: np.ndarray) -> str:
    d = y - x
    r = np.corrcoef(x, y)[0, 1] if x.std() > 0 and y.std() > 0 else np.nan
    return (f"MAE {np.abs(d).mean() * 1e3:5.0f} meV  RMS {np.sqrt(np.mean(d ** 2)) * 1e3:5.0f} meV  "
            f"mean error {d.mean() * 1e3:+5.0f} meV  r {r:+.2f}  "
            f"QM mean {x.mean():+.3f} σ {x.std(ddof=1) * 1e3:3.0f} meV  model mean {y.mean():+.3f} "
            f"σ {y.std(ddof=1) * 1e3:3.0f} meV  ratio of means {y.mean() / x.mean():.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=8)
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--radius", type=float, default=10.0)
    ap.add_argument("--inner", type=float, default=6.0)
    ap.add_argument("--only", type=int, default=None, help="run the QM of the first ONLY molecules (timing)")
    ap.add_argument("--fit-scale", action="store_true", help="also fit and apply the calibration scale")
    args = ap.parse_args()

    import clusterlab as cl
    from clusterlab.demo import demo_paths
    from clusterlab.electrostatics.chargeset import StateChargeSet

    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = cl.load_film(top, traj)
    method = cl.Method.preset("fast-refined", n_singlets=0, n_triplets=0, charged_states=True,
                              environment="polarizable")
    mols = pick_molecules(film.n_molecules, args.n, args.seed)
    print(f"demo film, frame 0, molecules {mols} (molecule 0, then default_rng({args.seed}) draws); outer "
          f"radius {args.radius:g} Å, polarizable inner radius {args.inner:g} Å (both sides)")
    print(f"QM: {method.describe()}, ΔSCF IP/EA only")
    t0 = time.perf_counter()
    qm = qm_rows(film, mols, method, args.radius, args.inner,
                 os.path.join(OUT, "parity_polarization_qm.json"), args.only)
    t_qm = time.perf_counter() - t0
    if args.only is not None:
        return
    from clusterlab.study.filmmodel import FilmModel, fit_polarization_scale

    cset = StateChargeSet.load(os.path.join(OUT, "sitemodel_charges.json"))
    q = {k: np.array([qm[str(m)][k] for m in mols]) for k in
         ("IP_polarization_eV", "EA_polarization_eV", "IP_eV", "EA_eV", "IP_fixed_eV", "EA_fixed_eV")}
    qm_p = {"P+": q["IP_polarization_eV"], "P-": q["EA_polarization_eV"]}
    kw = dict(radius_A=args.radius, states=("cation", "anion"), polarization=True,
              polarizable_radius_A=args.inner)
    variants = {
        "difference field only (the model before)": dict(neutral_induction=False),
        "difference field + neutral-state induction": dict(),
    }
    t0 = time.perf_counter()
    tables = {name: FilmModel(film, cset, **kw, **opt).run([0], mols, progress=False).table.set_index("molecule")
              for name, opt in variants.items()}
    t_model = time.perf_counter() - t0
    best = "difference field + neutral-state induction"
    if args.fit_scale:
        base = tables[best]
        scale = fit_polarization_scale(
            np.r_[base.loc[mols, "P_cation_eV"], base.loc[mols, "P_anion_eV"]],
            np.r_[qm_p["P+"], -qm_p["P-"]])
        best = f"as above, calibrated (polarization_scale = {scale:.3f}, fitted here)"
        tables[best] = FilmModel(film, cset, **kw, polarization_scale=scale).run([0], mols, progress=False
                                                                                ).table.set_index("molecule")
    model_p = {name: {"P+": t.loc[mols, "P_cation_eV"].to_numpy(float),
                      "P-": -t.loc[mols, "P_anion_eV"].to_numpy(float)} for name, t in tables.items()}

    print(f"\nper molecule (eV): P+ = ΔIP, P- = ΔEA, polarizable minus fixed; model = '{best}'")
    print(f"{'mol':>4} {'dipoles':>7} {'QM s':>5} {'QM P+':>7} {'model P+':>8} {'QM P-':>7} {'model P-':>8}")
    for k, m in enumerate(mols):
        r = qm[str(m)]
        print(f"{m:4d} {r['n_dipoles']:7d} {r['seconds']:5.0f} {qm_p['P+'][k]:+7.3f} {model_p[best]['P+'][k]:+8.3f} "
              f"{qm_p['P-'][k]:+7.3f} {model_p[best]['P-'][k]:+8.3f}")
    print("\nagreement with polarizable QM over the molecules:")
    for name, p in model_p.items():
        print(f"  {name}")
        for key in ("P+", "P-"):
            print(f"    {key}: {agreement(qm_p[key], p[key])}")

    def sd(x) -> str:
        return f"{np.std(x, ddof=1) * 1e3:4.0f} meV"

    t = tables[best]
    print("\nsite-energy spread over these molecules (σ):")
    print(f"  QM     IP fixed {sd(q['IP_fixed_eV'])}  polarized {sd(q['IP_eV'])}   "
          f"EA fixed {sd(q['EA_fixed_eV'])}  polarized {sd(q['EA_eV'])}")
    print(f"  model  IP shift {sd(t.loc[mols, 'cation_shift_eV'])}  polarized {sd(t.loc[mols, 'IP_shift_eV'])}   "
          f"EA shift {sd(-t.loc[mols, 'anion_shift_eV'])}  polarized {sd(t.loc[mols, 'EA_shift_eV'])}")
    print(f"  QM mean IP fixed {q['IP_fixed_eV'].mean():.3f} polarized {q['IP_eV'].mean():.3f} eV; "
          f"EA fixed {q['EA_fixed_eV'].mean():.3f} polarized {q['EA_eV'].mean():.3f} eV")
    print(f"\nQM {t_qm:.0f} s this run (cached molecules not rerun; {sum(qm[str(m)]['seconds'] for m in mols):.0f} s "
          f"in all); model {t_model:.1f} s for {len(variants)} variants")


if __name__ == "__main__":
    main()
