"""Parity of the electrostatic site-energy model against embedded QM.

For ``N`` demo-film molecules (frame 0) this script
1. fits state charges on conformer references (``StateChargeSet``; farthest-point
   sampling in superposed RMSD from molecule 0, then every reference moved to the
   medoid of its family; ``--conformers`` of them) with the same xc/basis as the
   QM, and the dipole and polarizability changes of S1/T1 of each reference by
   finite fields with the QM method itself; all cached in
   ``bench/results/sitemodel_charges.json`` (references by molecule id);
2. computes the model's shifts (``film_site_energies``, same radius and rule)
   in five variants: one reference (charges of molecule 0 for every copy,
   first order: the model before conformer families and the Stark term);
   families (first order, each copy with its family's charges); families plus
   -1/2 F·Δα·F for S1/T1; the same with charges averaged over the two rings;
   the field response for S1/T1 (-Δμ·F - 1/2 F·Δα·F, finite-field Δμ and Δα
   of the family reference, F the least-squares uniform field), family charges
   for the ions; the field response for S1 only; and, when
   ``bench/results/sitemodel_charges_before.json`` is there, the model before
   this work (molecule 0's charges, first order);
3. runs ``clusterlab.qm.engine.excitations`` on ``film.carve(i, RADIUS)``
   (with the charged states when ``--charged``); results per molecule are
   cached in ``bench/results/parity_qm_cache.json`` (resumable);
4. prints RMS error, mean error and Pearson r of S1, T1 (IP, EA) shifts for
   every variant, saves a parity plot and ``bench/results/parity_sitemodel.json``.

The QM embedding uses Gaussian-smeared point charges (the method's
``charge_smearing_A``), the model bare Coulomb sums; the environment charges
of both are the film's (topology) charges.

Run: ``OMP_NUM_THREADS=1 python bench/parity_sitemodel.py --n 16 --charged --preset fast-stda``
(about an hour of one core: ~4 min per state-charge fit, ~3 min per finite-field
fit, ~1.5 min per cluster with the charged states).
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings

import numpy as np

from clusterlab import load_film
from clusterlab.electrostatics.chargeset import ConformerCharges, StateChargeSet
from clusterlab.study.chargefits import add_field_response, film_equivalence_classes, fit_state_charges
from clusterlab.study.filmmodel import film_site_energies

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "results")
#: molecules of the earlier 8-molecule parity run (rng seed 7), kept first so that numbers stay comparable
EARLIER = [57, 146, 156, 171, 197, 212, 226, 235]


def stats(x: np.ndarray, y: np.ndarray) -> dict[str, float]:
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    d = y - x
    r = float(np.corrcoef(x, y)[0, 1]) if len(x) > 2 and x.std() > 0 and y.std() > 0 else float("nan")
    return {"n": int(len(x)), "rms_error_eV": float(np.sqrt(np.mean(d**2))) if len(x) else float("nan"),
            "mean_error_eV": float(d.mean()) if len(x) else float("nan"), "pearson_r": r,
            "qm_std_eV": float(x.std()) if len(x) else float("nan")}


def parity_figure(qm, before, after, mols, keys):
    """One panel per quantity: QM against the model before (grey crosses) and after (dots)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from clusterlab.study.plots import plot_parity

    fig, axes = plt.subplots(1, len(keys), figsize=(4.2 * len(keys), 4.2))
    for ax, k in zip(np.atleast_1d(axes), keys):
        x = qm[k]
        yb = before.loc[mols, k].to_numpy(float)
        ax.scatter(x, yb, marker="x", color="0.6", label="before")
        plot_parity(x, after.loc[mols, k].to_numpy(float), ax=ax, xlabel=f"embedded QM {k}",
                    ylabel="model")
        lim = [min(np.nanmin(x), np.nanmin(yb)) - 0.01, max(np.nanmax(x), np.nanmax(yb)) + 0.01]
        ax.set_xlim(lim)
        ax.set_ylim(lim)
        ax.legend(loc="lower right", fontsize=7)
    fig.suptitle("demo film, frame 0, R = 10 Å, sTDA on B3LYP/6-31G: dots = 4 conformer references, field "
                 "response for S1, charges for T1/IP/EA; crosses = before (molecule 0's charges)", fontsize=9)
    fig.tight_layout()
    return fig


def charge_set(film, method, cache: str, n_conformers: int) -> StateChargeSet:
    """Conformer references (medoids of the families) with charges and Δα; every
    reference copy's QM is cached by molecule id, so only new ones are fitted."""
    from clusterlab.electrostatics.conformers import pick_references
    from clusterlab.qm.statecharges import state_charges

    want_method = f"{method.xc}/{method.basis}"
    cset = StateChargeSet.load(cache) if os.path.exists(cache) else None
    if cset is not None and cset.method != want_method:
        cset = None
    if cset is None:
        cset = fit_state_charges(film, method, frame=0)
        cset.save(cache)
    res = cset.resnames[0]
    if not cset.conformers.get(res):
        fit = cset.fits[res]
        tr = fit["transition_charges_e"]
        q = {k: np.asarray(v, float) for k, v in fit["charges_e"].items()}
        cset.conformers[res] = [ConformerCharges(positions_A=np.asarray(fit["positions_A"], float), charges_e=q,
                                                 transition_e=None if tr is None else np.asarray(tr, float),
                                                 frame=cset.reference[res]["frame"],
                                                 molecule=cset.reference[res]["molecule"])]
    known = {c.molecule: c for c in cset.conformers[res]}
    geo = film.frame_geometry(0)
    ids = np.flatnonzero(np.asarray(film.molecule_resnames) == res)
    copies = np.stack([geo.positions_A[film.molecule_atoms(int(m))] for m in ids])
    picks = [int(ids[k]) for k in pick_references(copies, n_conformers, first=int(np.flatnonzero(ids == 0)[0]),
                                                  medoids=True)]
    refs = []
    for mol in picks:
        if mol not in known:
            t0 = time.perf_counter()
            pos = geo.positions_A[film.molecule_atoms(mol)]
            sc = state_charges(list(film.symbols[film.molecule_atoms(mol)]), pos, method)
            known[mol] = ConformerCharges(positions_A=pos, charges_e=dict(sc.charges_e),
                                          transition_e=sc.transition_charges_e, frame=0, molecule=mol)
            print(f"state charges of conformer reference molecule {mol}: {time.perf_counter() - t0:.0f} s", flush=True)
        refs.append(known[mol])
    cset.conformers[res] = refs
    cset.charges_e[res] = dict(refs[0].charges_e)
    cset.transition_e[res] = refs[0].transition_e
    cset.reference[res] = {"frame": refs[0].frame, "molecule": refs[0].molecule}
    cset.save(cache)
    if cset.stark_method.get("steps_V_A") != [0.1, 0.2]:
        for c in refs:
            c.dalpha_A3, c.dmu_D = {}, {}
    if any("S1" not in c.dalpha_A3 for c in refs):
        t0 = time.perf_counter()
        stark = method.replace(n_singlets=3, n_triplets=3)
        cset = add_field_response(cset, film, stark, refit=False)
        cset.save(cache)
        print(f"finite-field polarizability changes: {time.perf_counter() - t0:.0f} s", flush=True)
    return cset


def refit_charges(film, cset: StateChargeSet, method, cache: str) -> dict:
    """Refit the state charges of every cached conformer reference with the
    current ``state_charges`` (same geometry, same method; the finite-field
    Δμ/Δα are kept: they already came from the engine) and report how far
    the charges moved: per state the largest |Δq| over atoms and references,
    and the change of the difference-charge dipole |Δ(μ_X - μ_S0)| (D)."""
    from clusterlab.qm.statecharges import state_charges
    from clusterlab.units import DEBYE_E_A

    res = cset.resnames[0]
    moved: dict[str, dict[str, float]] = {}
    t0 = time.perf_counter()
    for ref in cset.conformers[res]:
        atoms = film.molecule_atoms(ref.molecule)
        sc = state_charges(list(film.symbols[atoms]), ref.positions_A, method)
        c = ref.positions_A - ref.positions_A.mean(axis=0)
        for st, q in sc.charges_e.items():
            old = np.asarray(ref.charges_e[st], float)
            m = moved.setdefault(st, {"max_abs_dq_e": 0.0, "max_ddipole_D": 0.0})
            m["max_abs_dq_e"] = max(m["max_abs_dq_e"], float(np.abs(q - old).max()))
            if st != "S0":
                d_new = (q - sc.charges_e["S0"]) @ c / DEBYE_E_A
                d_old = (old - np.asarray(ref.charges_e["S0"], float)) @ c / DEBYE_E_A
                m["max_ddipole_D"] = max(m["max_ddipole_D"], float(np.linalg.norm(d_new - d_old)))
        ref.charges_e = {k: np.asarray(v, float) for k, v in sc.charges_e.items()}
        ref.transition_e = sc.transition_charges_e
    cset.charges_e[res] = dict(cset.conformers[res][0].charges_e)
    cset.transition_e[res] = cset.conformers[res][0].transition_e
    cset.save(cache)
    out = {"seconds": time.perf_counter() - t0, "n_references": len(cset.conformers[res]), "moved": moved}
    print("refitted state charges:", json.dumps(out, indent=1), flush=True)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=16)
    ap.add_argument("--radius", type=float, default=10.0)
    ap.add_argument("--basis", default="6-31g")
    ap.add_argument("--xc", default="b3lyp")
    ap.add_argument("--charged", action="store_true", help="also IP/EA (ΔSCF; doubles the cost)")
    ap.add_argument("--preset", default="fast-stda", help="method preset of the QM side")
    ap.add_argument("--conformers", type=int, default=4)
    ap.add_argument("--refit-charges", action="store_true",
                    help="refit the cached references' state charges with the current code and say what moved")
    args = ap.parse_args()

    from clusterlab.demo import demo_paths
    from clusterlab.qm.engine import excitations
    from clusterlab.qm.method import Method

    os.makedirs(OUT, exist_ok=True)
    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(top, traj)
    method = Method.preset(args.preset, xc=args.xc, basis=args.basis, n_singlets=3, n_triplets=3,
                           charged_states=bool(args.charged))
    t0 = time.perf_counter()
    cset = charge_set(film, method, os.path.join(OUT, "sitemodel_charges.json"), args.conformers)
    refit = refit_charges(film, cset, method, os.path.join(OUT, "sitemodel_charges.json")) if args.refit_charges else None
    t_fit = time.perf_counter() - t0
    res = cset.resnames[0]
    one = StateChargeSet.from_arrays({res: cset.conformers[res][0].charges_e}, method=cset.method)

    rng = np.random.default_rng(7)
    rest = [int(m) for m in rng.permutation(film.n_molecules) if int(m) not in EARLIER]
    mols = np.array((EARLIER + rest)[: args.n])
    states = ("S1", "T1", "cation", "anion")
    t0 = time.perf_counter()
    kw = dict(states=states, radius_A=args.radius, frames=[0], molecules=mols.tolist(), progress=False)
    sym = cset.symmetrized(film_equivalence_classes(film, cset.resnames))
    variants = {}
    before_file = os.path.join(OUT, "sitemodel_charges_before.json")
    if os.path.exists(before_file):
        before = StateChargeSet.load(before_file)
        variants["before: molecule 0's charges, first order"] = film_site_energies(film, before, **kw)
    variants.update({
        "one reference, first order": film_site_energies(film, one, **kw),
        "families, first order": film_site_energies(film, cset, **kw),
        "families, first order + Stark": film_site_energies(film, cset, second_order=True, **kw),
        "families symmetrized, first order + Stark": film_site_energies(film, sym, second_order=True, **kw),
        "families, field response": film_site_energies(film, cset, field_response=("S1", "T1"), **kw),
        "families, field response for S1": film_site_energies(film, cset, field_response=("S1",), **kw),
    })
    variants = {k: v.table.set_index("molecule") for k, v in variants.items()}
    t_model = time.perf_counter() - t0
    keys = ["S1_shift_eV", "T1_shift_eV"] + (["IP_shift_eV", "EA_shift_eV"] if args.charged else [])
    qcache = os.path.join(OUT, "parity_qm_cache.json")
    qm_all = json.load(open(qcache)) if os.path.exists(qcache) else {}
    tag = f"{method.key()}:R{args.radius}"
    qm_all.setdefault(tag, {})
    t0 = time.perf_counter()
    for m in mols:
        if str(m) in qm_all[tag] and all(k in qm_all[tag][str(m)] for k in keys):
            continue
        c = film.carve(int(m), args.radius, frame=0)
        s = excitations(c, method).summary()
        qm_all[tag][str(m)] = {k: float(v) for k, v in s.items() if isinstance(v, (int, float))}
        with open(qcache, "w", encoding="utf-8") as fh:
            json.dump(qm_all, fh, indent=1)
        v = variants["families, field response"]
        print(f"  molecule {m}: " + ", ".join(f"{k} QM {qm_all[tag][str(m)].get(k, np.nan):+.4f} "
                                              f"model {v.loc[m, k]:+.4f}" for k in keys), flush=True)
    t_qm = time.perf_counter() - t0
    qm = {k: np.array([qm_all[tag][str(m)].get(k, np.nan) for m in mols]) for k in keys}
    fam = variants["families, first order"]
    result = {"method": method.to_dict(), "radius_A": args.radius, "frame": 0, "molecules": mols.tolist(),
              "conformer_references": [{"molecule": c.molecule, "frame": c.frame}
                                       for c in cset.conformers[res]],
              "conformer_of_molecule": fam.loc[mols, "conformer"].astype(int).tolist(),
              "seconds": {"fit_or_cache": t_fit, "model": t_model, "qm_this_run": t_qm},
              "qm": {k: v.tolist() for k, v in qm.items()}, "variants": {}, "refit_charges": refit}
    result["qm"]["S1_followed_shift_eV"] = [qm_all[tag][str(m)].get("S1_followed_shift_eV", np.nan) for m in mols]
    for name, table in variants.items():
        block = {}
        for k in keys:
            y = table.loc[mols, k].to_numpy(float)
            block[k] = {**stats(qm[k], y), "model_eV": y.tolist()}
        for extra in ("S1_stark_eV", "T1_stark_eV", "S1_first_order_eV", "T1_first_order_eV", "field_V_A"):
            if extra in table:
                block[extra] = table.loc[mols, extra].to_numpy(float).tolist()
        result["variants"][name] = block
        for k in keys:
            st = block[k]
            print(f"{name:42s} {k:12s} RMS {st['rms_error_eV'] * 1e3:6.1f} meV  mean "
                  f"{st['mean_error_eV'] * 1e3:+6.1f} meV  r {st['pearson_r']:+.3f}  "
                  f"(QM spread {st['qm_std_eV'] * 1e3:.1f} meV, n={st['n']})")
    before = variants.get("before: molecule 0's charges, first order", variants["one reference, first order"])
    after = variants["families, field response for S1"]
    fig = parity_figure(qm, before, after, mols, keys)
    fig.savefig(os.path.join(OUT, "parity_sitemodel.png"), dpi=120)
    with open(os.path.join(OUT, "parity_sitemodel.json"), "w", encoding="utf-8") as fh:
        json.dump(result, fh, indent=1)
    print(f"QM {t_qm:.0f} s this run for {len(mols)} clusters; model {t_model:.2f} s; "
          f"wrote {OUT}/parity_sitemodel.json")


if __name__ == "__main__":
    main()
