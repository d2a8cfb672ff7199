"""Why does the first-order charge model miss the QM S1 shifts? A measured diagnosis.

For the parity molecules (demo film, frame 0, R = 10 Å, the fast-stda QM of
``parity_sitemodel.py``) this script splits every embedded-QM shift into its
parts odd and even in the environment potential by running each cluster twice,
with the environment charges as they are (+) and with their signs flipped (-):

    odd  = (S(+) - S(-)) / 2      first, third, ... order in the potential
    even = (S(+) + S(-)) / 2      second, fourth, ... order (polarizability)

and compares
* ``odd`` with the first-order model sum (q_S1 - q_S0)·V of the reference
  copy's charges and of charges refitted at the molecule's own geometry;
* ``even`` with -1/2 F·Δα·F, where F is the environment field at the
  molecule (at the centroid, and the least-squares uniform field of the
  potential over its atoms) and Δα the S1 - S0 polarizability difference
  from a finite-field calculation of the same QM method (uniform field made
  by two distant opposite charges), both for the reference copy (rotated
  onto the molecule) and directly at the molecule's own geometry along F.

Results go to ``bench/results/diagnose_s1.json`` (resumable: finished
molecules are kept). Run: ``OMP_NUM_THREADS=1 python bench/diagnose_s1.py``
(about 45 minutes of one core; the reference Δα here uses a 0.1 V/Å step,
the library's fits 0.05 V/Å). ``python bench/diagnose_s1.py --summary`` prints
the comparison table from the stored results.
"""

from __future__ import annotations

import dataclasses
import json
import os
import sys
import time
import warnings

import numpy as np

from clusterlab import Cluster, load_film
from clusterlab.electrostatics.chargeset import StateChargeSet
from clusterlab.qm.statecharges import state_charges
from clusterlab.study.filmmodel import film_site_energies
from clusterlab.units import COULOMB_EV_A

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "results", "diagnose_s1.json")
RADIUS = 10.0
FAR_A = 2000.0


def field_cluster(symbols, pos, field_V_A):
    """The QM region in a nearly uniform field ``field_V_A`` (V/Å) made by two far charges."""
    f = np.asarray(field_V_A, float)
    mag = np.linalg.norm(f)
    c = pos.mean(axis=0)
    if mag == 0:
        return Cluster.from_arrays(symbols, pos)
    u = -f / mag                              # field points from +Q to -Q: +Q sits at c + D u
    q = mag * FAR_A**2 / (2 * COULOMB_EV_A)
    return Cluster.from_arrays(symbols, pos, env_positions=np.array([c + FAR_A * u, c - FAR_A * u]),
                               env_charges=np.array([q, -q]))


def s1(res):
    s = res.summary()
    return float(s["S1_eV"]), float(s["T1_eV"])


def kabsch(ref, mob):
    """Rotation R with (mob - c_m) ≈ (ref - c_r) @ R.T (rows), least squares."""
    a = ref - ref.mean(0)
    b = mob - mob.mean(0)
    u, _, vt = np.linalg.svd(a.T @ b)
    d = np.sign(np.linalg.det(u @ vt))
    dmat = np.diag([1, 1, d])
    return (u @ dmat @ vt).T


def env_fields(cluster):
    """Environment field at the centroid and the LSQ uniform field over the atoms (V/Å), bare charges."""
    pos = cluster.qm_positions
    c = pos.mean(0)
    d = c - cluster.env_positions
    r = np.linalg.norm(d, axis=1)
    f_c = COULOMB_EV_A * (cluster.env_charges / r**3) @ d
    dd = pos[:, None, :] - cluster.env_positions[None]
    v = COULOMB_EV_A * (cluster.env_charges[None] / np.linalg.norm(dd, axis=2)).sum(1)
    a = np.c_[np.ones(len(pos)), pos - c]
    coef = np.linalg.lstsq(a, v, rcond=None)[0]
    return f_c, -coef[1:]


def summary() -> None:
    """Print the decomposition table from the stored results."""
    d = json.load(open(OUT))["molecules"]
    mols = list(d)
    g = (lambda k: np.array([d[m][k] for m in mols]))
    qm, qf = g("S1_shift"), g("S1_shift_flipped")
    odd, even = (qm - qf) / 2, (qm + qf) / 2

    def line(name, y, x):
        r = np.corrcoef(x, y)[0, 1]
        print(f"{name:42s} RMS {1e3 * np.sqrt(np.mean((y - x) ** 2)):5.1f} meV  mean {1e3 * np.mean(y - x):+5.1f}"
              f"  r {r:+.2f}")

    print(f"molecules {mols}; QM S1 shift std {1e3 * qm.std():.1f} meV; odd part std {1e3 * odd.std():.1f}, "
          f"even part std {1e3 * even.std():.1f} (mean {1e3 * even.mean():+.1f}) meV")
    line("first order, reference copy's charges", g("model_S1_ref"), qm)
    line("first order, own-geometry charges", g("model_S1_own"), qm)
    line("  ... against the odd part", g("model_S1_own"), odd)
    line("relaxed dipole term (finite field) vs odd", (g("ff_S1_plus") - g("ff_S1_minus")) / 2, odd)
    line("-1/2 F.dα.F, own geometry, vs even", g("stark2_own_lsq"), even)
    line("-1/2 F.dα.F, reference tensor turned, vs even", g("stark2_ref_lsq"), even)
    line("own geometry in the uniform LSQ field (QM)", g("ff_S1_plus"), qm)
    line("S1 followed vs S1 lowest (QM)", g("S1_followed_shift"), qm)


def main() -> None:
    if "--summary" in sys.argv:
        summary()
        return
    from clusterlab.demo import demo_paths
    from clusterlab.qm.engine import excitations
    from clusterlab.qm.method import Method

    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(top, traj)
    method = Method.preset("fast-stda", n_singlets=3, n_triplets=3)
    cset = StateChargeSet.load(os.path.join(HERE, "results", "sitemodel_charges.json"))
    done = json.load(open(OUT)) if os.path.exists(OUT) else {"molecules": {}}
    geo = film.frame_geometry(0, periodic=True)
    ref_mol = cset.reference["BTH"]["molecule"]
    ref_pos = geo.positions_A[film.molecule_atoms(ref_mol)]
    syms = list(film.symbols[film.molecule_atoms(ref_mol)])

    # --- finite-field Δα of the reference copy (same QM method) ---
    if "dalpha_ref" not in done:
        t0 = time.perf_counter()
        h = 0.1  # V/Å
        vac = excitations(field_cluster(syms, ref_pos, [0, 0, 0]), method)
        e0 = np.array(s1(vac))
        dirs = [np.eye(3)[k] for k in range(3)] + [(np.eye(3)[a] + np.eye(3)[b]) / np.sqrt(2)
                                                   for a, b in ((0, 1), (0, 2), (1, 2))]
        curv = []
        lin = []
        for u in dirs:
            ep = np.array(s1(excitations(field_cluster(syms, ref_pos, h * u), method, vacuum=vac, guess=vac)))
            em = np.array(s1(excitations(field_cluster(syms, ref_pos, -h * u), method, vacuum=vac, guess=vac)))
            curv.append(-(ep + em - 2 * e0) / h**2)       # u·Δα·u  (eV Å^2/V^2), S1 and T1
            lin.append(-(ep - em) / (2 * h))              # u·Δμ   (e Å)
            print(f"  field dir {np.round(u, 2)}: u.dα.u S1 {curv[-1][0]:.3f} T1 {curv[-1][1]:.3f} eÅ²/V", flush=True)
        curv = np.array(curv)
        tens = {}
        for k, name in enumerate(("S1", "T1")):
            c = curv[:, k]
            t = np.diag(c[:3])
            for (a, b), v in zip(((0, 1), (0, 2), (1, 2)), c[3:]):
                t[a, b] = t[b, a] = v - 0.5 * (c[a] + c[b])
            tens[name] = t.tolist()
        done["dalpha_ref"] = {"tensor_eA2_per_V": tens, "dmu_eA": np.array(lin).tolist(), "h_V_A": h,
                              "seconds": time.perf_counter() - t0}
        json.dump(done, open(OUT, "w"), indent=1)
    dal = {k: np.array(v) for k, v in done["dalpha_ref"]["tensor_eA2_per_V"].items()}
    print("Δα(S1) eigenvalues (e Å²/V):", np.round(np.linalg.eigvalsh(dal["S1"]), 2),
          " -> Å³:", np.round(np.linalg.eigvalsh(dal["S1"]) * COULOMB_EV_A, 1))

    mols = [int(m) for m in sys.argv[1:] if not m.startswith("-")] or [57, 146, 156, 171, 197, 212, 226, 235]
    model = film_site_energies(film, cset, states=("S1", "T1"), radius_A=RADIUS, frames=[0], molecules=mols,
                               progress=False).table.set_index("molecule")
    for m in mols:
        if str(m) in done["molecules"]:
            continue
        t0 = time.perf_counter()
        c = film.carve(m, RADIUS, frame=0)
        flipped = dataclasses.replace(c, env_charges=-c.env_charges)
        rp = excitations(c, method)
        rm = excitations(flipped, method, vacuum=rp, guess=rp)
        sp, sm = rp.summary(), rm.summary()
        f_c, f_lsq = env_fields(c)
        own = c.qm_positions
        rot = kabsch(ref_pos, own)
        da = rot @ dal["S1"] @ rot.T
        dat = rot @ dal["T1"] @ rot.T
        # own-geometry uniform-field second-order energy along the LSQ field
        vac0 = rp  # carries the vacuum calculation of this QM region
        e0 = np.array([sp["S1_vacuum_eV"], sp["T1_vacuum_eV"]])
        ep = np.array(s1(excitations(field_cluster(c.qm_symbols, own, f_lsq), method, vacuum=vac0, guess=vac0)))
        em = np.array(s1(excitations(field_cluster(c.qm_symbols, own, -f_lsq), method, vacuum=vac0, guess=vac0)))
        # own-geometry S1 charges (the reference fit's method, full TDA)
        sc = state_charges(c.qm_symbols, own, method.replace(excited="tda", grid_level=1, density_fit=True),
                           states=("S0", "S1", "T1"), transition=False)
        v_at = COULOMB_EV_A * (c.env_charges[None] /
                               np.linalg.norm(own[:, None] - c.env_positions[None], axis=2)).sum(1)
        row = {
            "S1_shift": sp["S1_shift_eV"], "S1_shift_flipped": sm["S1_shift_eV"],
            "S1_followed_shift": sp["S1_followed_shift_eV"], "S1_followed_shift_flipped": sm["S1_followed_shift_eV"],
            "T1_shift": sp["T1_shift_eV"], "T1_shift_flipped": sm["T1_shift_eV"],
            "S1_osc": sp["S1_osc"], "S1_vacuum": float(e0[0]),
            "model_S1_ref": float(model.loc[m, "S1_shift_eV"]), "model_T1_ref": float(model.loc[m, "T1_shift_eV"]),
            "model_S1_own": float(sc.difference("S1") @ v_at), "model_T1_own": float(sc.difference("T1") @ v_at),
            "dmu_S1_own_D": (sc.dipole_qm_D["S1"] - sc.dipole_qm_D["S0"]).tolist(),
            "field_centroid_V_A": f_c.tolist(), "field_lsq_V_A": f_lsq.tolist(),
            "stark2_ref_centroid": float(-0.5 * f_c @ da @ f_c), "stark2_ref_lsq": float(-0.5 * f_lsq @ da @ f_lsq),
            "stark2_T1_ref_lsq": float(-0.5 * f_lsq @ dat @ f_lsq),
            "ff_S1_plus": float(ep[0] - e0[0]), "ff_S1_minus": float(em[0] - e0[0]),
            "ff_T1_plus": float(ep[1] - e0[1]), "ff_T1_minus": float(em[1] - e0[1]),
            "seconds": time.perf_counter() - t0,
        }
        row["stark2_own_lsq"] = 0.5 * (row["ff_S1_plus"] + row["ff_S1_minus"])
        done["molecules"][str(m)] = row
        json.dump(done, open(OUT, "w"), indent=1)
        odd = 0.5 * (row["S1_shift"] - row["S1_shift_flipped"])
        even = 0.5 * (row["S1_shift"] + row["S1_shift_flipped"])
        print(f"mol {m}: QM {row['S1_shift']:+.4f} odd {odd:+.4f} even {even:+.4f} | model1 ref "
              f"{row['model_S1_ref']:+.4f} own {row['model_S1_own']:+.4f} | stark2 ref {row['stark2_ref_lsq']:+.4f} "
              f"own {row['stark2_own_lsq']:+.4f} | {row['seconds']:.0f} s", flush=True)


if __name__ == "__main__":
    main()
