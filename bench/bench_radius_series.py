"""Radius-series benchmark: a user's straightforward PySCF loop vs
clusterlab's chained series, side by side in one run.

Baseline ("plain loop"): for each radius, a fresh embedded B3LYP TDA with
PySCF defaults (no density fitting, SCF and response on the default grid
level 3, cold SCF and Davidson starts), plus one vacuum calculation.
clusterlab: :func:`clusterlab.qm.excitation_series` with density fitting,
a response grid of level 1 (SCF grid stays 3), the vacuum/previous density
as SCF guess and the previous response vectors as Davidson guess.

Uses the demo film (``demo_traj/``) through ``clusterlab.load_film`` and
``Film.carve`` when both exist; otherwise a synthetic cluster (thiophene
surrounded by TIP3P-like point-charge waters on a jittered lattice). The
output says which was used. Prints the speed ratio and the largest
difference of any excitation energy.

Run:  OMP_NUM_THREADS=1 python bench/bench_radius_series.py [--basis 6-31g] [--radii 4 6 8 10 12]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

from clusterlab import Cluster  # noqa: E402
from clusterlab.qm import Method, excitation_series  # noqa: E402
from clusterlab.units import HARTREE_TO_EV  # noqa: E402


def thiophene():
    """Planar thiophene (approximate geometry, Å)."""
    sym = ["S", "C", "C", "C", "C", "H", "H", "H", "H"]
    pos = np.array([[0.0, 1.19, 0.0], [1.23, -0.05, 0.0], [0.71, -1.30, 0.0], [-0.71, -1.30, 0.0],
                    [-1.23, -0.05, 0.0], [2.27, 0.22, 0.0], [1.31, -2.20, 0.0], [-1.31, -2.20, 0.0],
                    [-2.27, 0.22, 0.0]])
    return sym, pos


def synthetic_series(radii, seed=0):
    from scipy.spatial.transform import Rotation

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


def plain_loop(clusters, basis, nstates):
    """What a user writes with PySCF defaults."""
    from pyscf import dft, gto, qmmm

    energies = []
    c0 = clusters[0]
    mol = gto.M(atom=[(s, tuple(p)) for s, p in zip(c0.qm_symbols, c0.qm_positions)], basis=basis, verbose=0)
    vac = dft.RKS(mol, xc="b3lyp").run()
    td = vac.TDA()
    td.nstates = nstates
    td.kernel()
    for c in clusters:
        mf = dft.RKS(mol, xc="b3lyp")
        if c.n_charges:
            mf = qmmm.mm_charge(mf, c.env_positions, c.env_charges, radii=np.full(c.n_charges, 1.0), unit="Angstrom")
        mf.run()
        td = mf.TDA()
        td.nstates = nstates
        td.kernel()
        energies.append(np.asarray(td.e) * HARTREE_TO_EV)
    return energies


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--basis", default="6-31g")
    ap.add_argument("--radii", type=float, nargs="+", default=[5, 6, 8, 10, 12])
    ap.add_argument("--states", type=int, default=3)
    args = ap.parse_args()
    found = demo_series(args.radii)
    clusters, which = found if found else synthetic_series(args.radii)
    print(f"system: {which}; {clusters[0].n_qm_atoms} QM atoms; charges per radius "
          f"{[c.n_charges for c in clusters]}; basis {args.basis}; {args.states} singlets (TDA)")
    print(f"threads: OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}")
    t = time.perf_counter()
    plain = plain_loop(clusters, args.basis, args.states)
    t_plain = time.perf_counter() - t
    m = Method(xc="b3lyp", basis=args.basis, density_fit=True, grid_level=3, response_grid_level=1,
               n_singlets=args.states, n_triplets=0, charge_smearing_A=1.0)
    t = time.perf_counter()
    series = excitation_series(clusters, m)
    t_cl = time.perf_counter() - t
    diffs = []
    for c, p, r in zip(clusters, plain, series):
        e = np.array([s.energy_eV for s in r.singlets])
        diffs.append(np.max(np.abs(e - p[: len(e)])))
        print(f"  radius {c.radius_A:5.1f} Å: plain S1 {p[0]:.4f} eV, clusterlab S1 {e[0]:.4f} eV "
              f"(shift {r.s1.shift_eV:+.4f}), max |dE| {diffs[-1] * 1e3:.3f} meV")
    print(f"plain PySCF loop : {t_plain:7.1f} s")
    print(f"clusterlab series: {t_cl:7.1f} s")
    print(f"speed ratio      : {t_plain / t_cl:.2f}x (target >= 2)")
    print(f"largest |dE|     : {max(diffs) * 1e3:.3f} meV (target <= 1 meV)")


if __name__ == "__main__":
    main()
