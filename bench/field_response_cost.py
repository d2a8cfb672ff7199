"""Cost and parity of the finite-field response: two field strengths (1 + 24
engine calculations per conformer reference) against one strength (1 + 12,
slope and curvature per direction exactly determined).

For the demo film's conformer references cached in
``bench/results/sitemodel_charges.json`` (fitted with steps 0.1 and 0.2 V/Å)
this script
1. times both designs on the first reference (CPU and wall seconds, ratio);
2. refits Δμ and Δα of S1/T1 of every reference with one strength (0.2 V/Å)
   and prints the largest change in Δμ (D) and Δα (Å³) against the cached
   two-strength fit;
3. recomputes the film model's field-response variants of the parity run
   (``bench/parity_sitemodel.py``; QM side from ``parity_qm_cache.json``) with
   both sets and prints the S1/T1 shift RMS and r side by side;
4. writes ``bench/results/field_response_cost.json``.

Run: ``nice -n 19 env OMP_NUM_THREADS=1 PYTHONPATH=$PWD python bench/field_response_cost.py``
"""

from __future__ import annotations

import copy
import json
import os
import sys
import time
import warnings

import numpy as np

from clusterlab import load_film
from clusterlab.electrostatics.chargeset import StateChargeSet
from clusterlab.qm.finitefield import differential_polarizability
from clusterlab.qm.method import Method
from clusterlab.study.filmmodel import film_site_energies

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "results")
sys.path.insert(0, HERE)
from parity_sitemodel import stats  # noqa: E402

BEFORE, AFTER = (0.1, 0.2), (0.2,)


def timed(fn):
    c0, w0 = time.process_time(), time.perf_counter()
    out = fn()
    return out, time.process_time() - c0, time.perf_counter() - w0


def main() -> None:
    from clusterlab.demo import demo_paths

    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(top, traj)
    cset = StateChargeSet.load(os.path.join(OUT, "sitemodel_charges.json"))
    assert cset.stark_method.get("steps_V_A") == list(BEFORE), cset.stark_method
    method = Method.preset("fast-stda", xc="b3lyp", basis="6-31g", n_singlets=3, n_triplets=3,
                           charged_states=True)
    stark = method.replace(n_singlets=3, n_triplets=3)
    res = cset.resnames[0]
    refs = cset.conformers[res]
    syms = list(film.symbols[film.molecule_atoms(refs[0].molecule)])
    rec = {"load_1min": os.getloadavg()[0], "references": []}
    after = copy.deepcopy(cset)
    for n, ref in enumerate(after.conformers[res]):
        fit, cpu, wall = timed(lambda: differential_polarizability(syms, ref.positions_A, stark, steps_V_A=AFTER))
        row = {"molecule": ref.molecule, "after_cpu_s": cpu, "after_wall_s": wall, "converged": fit.converged}
        if n == 0:
            _, cpu0, wall0 = timed(lambda: differential_polarizability(syms, ref.positions_A, stark,
                                                                       steps_V_A=BEFORE))
            row.update(before_cpu_s=cpu0, before_wall_s=wall0)
        for st in ("S1", "T1"):
            row[f"{st}_max_dmu_change_D"] = float(np.max(np.abs(fit.dmu_D[st] - ref.dmu_D[st])))
            row[f"{st}_max_dalpha_change_A3"] = float(np.max(np.abs(fit.dalpha_A3[st] - ref.dalpha_A3[st])))
            row[f"{st}_dalpha_trace_before_A3"] = float(np.trace(ref.dalpha_A3[st]))
            row[f"{st}_dalpha_trace_after_A3"] = float(np.trace(fit.dalpha_A3[st]))
        ref.dalpha_A3.update(fit.dalpha_A3)
        ref.dmu_D.update(fit.dmu_D)
        rec["references"].append(row)
        print(json.dumps(row), flush=True)
    after.stark_method = {**stark.to_dict(), "steps_V_A": list(AFTER)}

    par = json.load(open(os.path.join(OUT, "parity_sitemodel.json")))
    mols = par["molecules"]
    qm = {k: np.asarray(par["qm"][k], float) for k in ("S1_shift_eV", "T1_shift_eV")}
    kw = dict(states=("S1", "T1", "cation", "anion"), radius_A=par["radius_A"], frames=[0], molecules=mols,
              progress=False)
    rec["parity"] = {}
    for label, fr in (("field response", ("S1", "T1")), ("field response for S1", ("S1",))):
        for name, s in (("before", cset), ("after", after)):
            t = film_site_energies(film, s, field_response=fr, **kw).table.set_index("molecule")
            for k in qm:
                st = stats(qm[k], t.loc[mols, k].to_numpy(float))
                rec["parity"][f"{label}|{name}|{k}"] = st
    r0 = rec["references"][0]
    print(f"\nper reference (molecule {r0['molecule']}, {len(syms)} atoms, sTDA B3LYP/6-31G), load {rec['load_1min']:.2f}")
    print(f"  two strengths (25 calcs): {r0['before_cpu_s']:7.1f} s CPU {r0['before_wall_s']:7.1f} s wall")
    print(f"  one strength  (13 calcs): {r0['after_cpu_s']:7.1f} s CPU {r0['after_wall_s']:7.1f} s wall  "
          f"ratio {r0['before_cpu_s'] / r0['after_cpu_s']:.2f} (CPU)")
    for st in ("S1", "T1"):
        print(f"  {st}: largest |ΔΔμ| {max(r[f'{st}_max_dmu_change_D'] for r in rec['references']):.3f} D, "
              f"largest |ΔΔα| {max(r[f'{st}_max_dalpha_change_A3'] for r in rec['references']):.2f} Å³")
    print(f"\n{'variant':24s} {'shift':12s} {'RMS before':>11s} {'RMS after':>10s} {'r before':>9s} {'r after':>8s}")
    for label in ("field response", "field response for S1"):
        for k in qm:
            b, a = rec["parity"][f"{label}|before|{k}"], rec["parity"][f"{label}|after|{k}"]
            print(f"{label:24s} {k:12s} {b['rms_error_eV'] * 1e3:8.1f} meV {a['rms_error_eV'] * 1e3:7.1f} meV "
                  f"{b['pearson_r']:+9.3f} {a['pearson_r']:+8.3f}")
    with open(os.path.join(OUT, "field_response_cost.json"), "w", encoding="utf-8") as fh:
        json.dump(rec, fh, indent=1)


if __name__ == "__main__":
    main()
