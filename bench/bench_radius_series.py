"""Radius-series benchmark: a user's straightforward PySCF loop vs
clusterlab's chained series, side by side in one run.

Baseline ("plain loop"): for each radius, a fresh embedded B3LYP TDA with
PySCF defaults (no density fitting, SCF and response on the default grid
level 3, cold SCF and Davidson starts, PySCF's own TDA solver and BLAS
kernel), plus one vacuum calculation. It runs in a Python process that
imports only NumPy and PySCF, as a user's script would.
clusterlab: :func:`clusterlab.qm.excitation_series` in a second process:
response kernel on grid level 1 (SCF grid stays 3), classic Davidson with
the previous radius's vectors as guess, the previous density as SCF guess,
the vacuum calculation done once, and PySCF's bundled OpenBLAS loaded with
the kernel that suits the CPU (``clusterlab.blas``). A third process runs
the same series with that BLAS choice switched off
(``CLUSTERLAB_BLAS_TUNING=0``) to show what the other levers give alone.

Uses the demo film (``demo_traj/``) through ``clusterlab.load_film`` and
``Film.carve`` when both exist; otherwise a synthetic cluster (thiophene
surrounded by TIP3P-like point-charge waters on a jittered lattice). The
output says which was used. Prints the speed ratios and the largest
difference of any excitation energy.

Run:  OMP_NUM_THREADS=2 python bench/bench_radius_series.py [--basis 6-31g] [--radii 5 6 8 10 12]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))


def thiophene():
    """Planar thiophene (approximate geometry, Å)."""
    sym = ["S", "C", "C", "C", "C", "H", "H", "H", "H"]
    pos = np.array([[0.0, 1.19, 0.0], [1.23, -0.05, 0.0], [0.71, -1.30, 0.0], [-0.71, -1.30, 0.0],
                    [-1.23, -0.05, 0.0], [2.27, 0.22, 0.0], [1.31, -2.20, 0.0], [-1.31, -2.20, 0.0],
                    [-2.27, 0.22, 0.0]])
    return sym, pos


def synthetic_series(radii, seed=0):
    from scipy.spatial.transform import Rotation

    from clusterlab import Cluster

    rng = np.random.default_rng(seed)
    sym, pos = thiophene()
    a = np.radians(104.52 / 2)
    w = np.array([[0, 0, 0], [0.9572 * np.sin(a), 0.9572 * np.cos(a), 0], [-0.9572 * np.sin(a), 0.9572 * np.cos(a), 0]])
    g = np.arange(-14, 14.01, 3.1)
    sites = np.array([[x, y, z] for x in g for y in g for z in g]) + rng.uniform(-0.4, 0.4, (len(g) ** 3, 3))
    sites = sites[np.min(np.linalg.norm(sites[:, None] - pos[None], axis=-1), axis=1) > 3.0]
    waters = [Rotation.random(random_state=int(rng.integers(1 << 30))).apply(w) + s for s in sites]
    dist = np.linalg.norm(sites - pos.mean(0), axis=1)
    out = []
    for r in radii:
        sel = [wt for wt, d in zip(waters, dist) if d <= r]
        env = np.vstack(sel) if sel else np.zeros((0, 3))
        q = np.tile([-0.834, 0.417, 0.417], len(sel))
        out.append(Cluster.from_arrays(sym, pos, env, q, radius_A=float(r), rule="synthetic-water-shell"))
    return out, "synthetic: thiophene in TIP3P-like point-charge waters"


def demo_series(radii):
    """Clusters of demo-film molecule 0 (frame 0) at the given radii, or None."""
    try:
        from clusterlab import load_film
        from clusterlab.demo import demo_paths

        top, traj = demo_paths()
    except Exception:  # noqa: BLE001 - no demo film: use the synthetic case
        return None
    try:
        film = load_film(top, traj)
        return [film.carve(0, r, frame=0) for r in radii], f"demo film {os.path.basename(top)} molecule 0 frame 0"
    except Exception as exc:  # noqa: BLE001 - fall back to the synthetic case
        print(f"(demo film present but not usable: {exc}; using the synthetic cluster)")
        return None


def plain_loop(data, basis, nstates):
    """What a user writes with PySCF defaults (this process imports no clusterlab)."""
    from pyscf import dft, gto, qmmm
    from pyscf.data.nist import HARTREE2EV

    energies = []
    mol = gto.M(atom=[(str(s), tuple(p)) for s, p in zip(data["qm_symbols"], data["qm_positions"])], basis=basis,
                verbose=0)
    vac = dft.RKS(mol, xc="b3lyp").run()
    td = vac.TDA()
    td.nstates = nstates
    td.kernel()
    for k in range(len(data["radii"])):
        pos, q = data[f"env_positions_{k}"], data[f"env_charges_{k}"]
        mf = dft.RKS(mol, xc="b3lyp")
        if len(q):
            mf = qmmm.mm_charge(mf, pos, q, radii=np.full(len(q), 1.0), unit="Angstrom")
        mf.run()
        td = mf.TDA()
        td.nstates = nstates
        td.kernel()
        energies.append((np.asarray(td.e) * HARTREE2EV).tolist())
    return energies


def clusterlab_series(data, basis, nstates):
    from clusterlab import Cluster, blas_status
    from clusterlab.qm import Method, excitation_series

    clusters = [Cluster.from_arrays([str(s) for s in data["qm_symbols"]], data["qm_positions"],
                                    data[f"env_positions_{k}"], data[f"env_charges_{k}"], radius_A=float(r))
                for k, r in enumerate(data["radii"])]
    m = Method(xc="b3lyp", basis=basis, density_fit=False, grid_level=3, response_grid_level=1,
               n_singlets=nstates, n_triplets=0, charge_smearing_A=1.0)
    series = excitation_series(clusters, m)
    return [[s.energy_eV for s in r.singlets] for r in series], blas_status()["coretype"] or "default"


def side(which, path, basis, nstates):
    """Run one side in this (fresh) process and print its result as JSON."""
    import json

    data = dict(np.load(path, allow_pickle=False))
    t = time.perf_counter()
    if which == "plain":
        energies, blas = plain_loop(data, basis, nstates), "PySCF default"
    else:
        energies, blas = clusterlab_series(data, basis, nstates)
    print("RESULT " + json.dumps({"seconds": time.perf_counter() - t, "energies": energies, "blas": blas}))


def run_side(which, path, args, env_extra=None):
    import json
    import subprocess

    env = dict(os.environ, **(env_extra or {}))
    cmd = [sys.executable, __file__, "--side", which, "--data", path, "--basis", args.basis,
           "--states", str(args.states)]
    out = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
    lines = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")]
    if out.returncode != 0 or not lines:
        raise SystemExit(f"side {which} failed:\n{out.stderr[-3000:]}")
    return json.loads(lines[-1][7:])


def main():
    import tempfile

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--basis", default="6-31g")
    ap.add_argument("--radii", type=float, nargs="+", default=[5, 6, 8, 10, 12])
    ap.add_argument("--states", type=int, default=3)
    ap.add_argument("--side", choices=["plain", "clusterlab"], help=argparse.SUPPRESS)
    ap.add_argument("--data", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.side:
        side(args.side, args.data, args.basis, args.states)
        return
    found = demo_series(args.radii)
    clusters, which = found if found else synthetic_series(args.radii)
    print(f"system: {which}; {clusters[0].n_qm_atoms} QM atoms; charges per radius "
          f"{[c.n_charges for c in clusters]}; basis {args.basis}; {args.states} singlets (TDA)")
    print(f"threads: OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}")
    arrays = {"qm_symbols": np.array(clusters[0].qm_symbols), "qm_positions": clusters[0].qm_positions,
              "radii": np.array([c.radius_A for c in clusters])}
    for k, c in enumerate(clusters):
        arrays[f"env_positions_{k}"] = c.env_positions
        arrays[f"env_charges_{k}"] = c.env_charges
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "clusters.npz")
        np.savez(path, **arrays)
        plain = run_side("plain", path, args)
        cl = run_side("clusterlab", path, args)
        cl_noblas = run_side("clusterlab", path, args, {"CLUSTERLAB_BLAS_TUNING": "0"})
    diffs = []
    for c, p, e in zip(clusters, plain["energies"], cl["energies"]):
        d = np.max(np.abs(np.array(e) - np.array(p[: len(e)])))
        diffs.append(d)
        print(f"  radius {c.radius_A:5.1f} Å: plain S1 {p[0]:.4f} eV, clusterlab S1 {e[0]:.4f} eV, "
              f"max |dE| {d * 1e3:.3f} meV")
    d_nb = max(np.max(np.abs(np.array(a) - np.array(b))) for a, b in zip(cl["energies"], cl_noblas["energies"]))
    print(f"plain PySCF loop                  : {plain['seconds']:7.1f} s  (BLAS: {plain['blas']})")
    print(f"clusterlab series                 : {cl['seconds']:7.1f} s  (BLAS kernel: {cl['blas']})")
    print(f"clusterlab series, BLAS choice off: {cl_noblas['seconds']:7.1f} s  (same energies within "
          f"{d_nb * 1e3:.3f} meV)")
    print(f"speed ratio                       : {plain['seconds'] / cl['seconds']:.2f}x (target >= 2); "
          f"without the BLAS choice {plain['seconds'] / cl_noblas['seconds']:.2f}x")
    print(f"largest |dE|                      : {max(diffs) * 1e3:.3f} meV (target <= 1 meV)")


if __name__ == "__main__":
    main()
