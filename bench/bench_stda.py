"""Benchmark: simplified TDA against full TDA on one embedded 46-atom dye.

The molecule is an invented push-pull dye, an amino-decapentaene-carbaldehyde
H2N-(CH=CH)10-CHO (46 atoms), built planar with standard bond lengths
("common practice": C=C 1.35, C-C 1.45, C-H 1.08, C-N 1.37, C=O 1.22,
N-H 1.01 Å, 120° angles), embedded in a few hundred random point charges
(neutral overall) between 3 and 12 Å from its atoms.

One SCF (B3LYP), then the S1/T1 step four times on the same embedded
orbitals: PySCF's full TDA (its own solver), clusterlab's full TDA (classic
Davidson), the published sTDA and clusterlab's "stda-refined" model (sTDA
and Koopmans vectors, Rayleigh-Ritz, one correction step with the full TDA
operator). Prints the SCF time, the excited-state step times, their ratios,
and the S1/T1 differences. Demo-film environment shifts: ``stda_shifts.py``.

Usage::

    OMP_NUM_THREADS=2 python bench/bench_stda.py [--basis sto-3g] [--n-states 3]
        [--n-charges 300] [--seed 7]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

from clusterlab.qm import Method
from clusterlab.qm.calc import _tdscf_states
from clusterlab.qm.stda import stda_response
from clusterlab.units import HARTREE_TO_EV
from pyscf import dft, gto, qmmm  # after clusterlab: its BLAS kernel choice applies to both sides


def push_pull_dye(n_vinyl: int = 10) -> list[tuple[str, np.ndarray]]:
    """H2N-(CH=CH)n-CHO, planar zig-zag in the xy plane (Å)."""
    cc2, cc1, ch, cn, co, nh = 1.35, 1.45, 1.08, 1.37, 1.22, 1.01

    def step(p, r, deg):
        t = np.radians(deg)
        return p + r * np.array([np.cos(t), np.sin(t), 0.0])

    atoms: list[tuple[str, np.ndarray]] = []
    n = np.zeros(3)
    atoms += [("N", n), ("H", step(n, nh, 150)), ("H", step(n, nh, 270))]
    prev, up = n, True
    bonds = [cn] + [cc2, cc1] * n_vinyl  # N-C, then C=C, C-C alternating
    for k, r in enumerate(bonds):
        direction = 30 if up else -30
        c = step(prev, r, direction)
        atoms.append(("C", c))
        # H perpendicular-ish to the chain, on the outer side of the zig-zag
        atoms.append(("H", step(c, ch, 90 if up else -90)))
        prev, up = c, not up
    # terminal C=O replaces the last C's chain continuation
    direction = 30 if up else -30
    atoms.append(("O", step(prev, co, direction)))
    return atoms


def random_charges(xyz_A: np.ndarray, n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """n point charges (pairs of +-q) 3-12 Å from the nearest atom."""
    rng = np.random.default_rng(seed)
    lo, hi = xyz_A.min(0) - 12.0, xyz_A.max(0) + 12.0
    pos: list[np.ndarray] = []
    while len(pos) < n:
        p = rng.uniform(lo, hi, size=(4 * n, 3))
        d = np.min(np.linalg.norm(p[:, None, :] - xyz_A[None], axis=-1), axis=1)
        pos.extend(p[(d > 3.0) & (d < 12.0)])
    coords = np.array(pos[:n])
    q = rng.uniform(0.1, 0.6, size=n // 2)
    charges = np.concatenate([q, -q, np.zeros(n % 2)])
    return coords, rng.permutation(charges)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--basis", default="sto-3g")
    ap.add_argument("--n-states", type=int, default=3)
    ap.add_argument("--n-charges", type=int, default=300)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--grid-level", type=int, default=1, help="PySCF DFT grid level")
    args = ap.parse_args(argv)

    atoms = push_pull_dye(10)
    xyz = np.array([p for _, p in atoms])
    mol = gto.M(atom=[(s, tuple(p)) for s, p in atoms], basis=args.basis, verbose=0)
    env_xyz, env_q = random_charges(xyz, args.n_charges, args.seed)
    print(f"molecule: H2N-(CH=CH)10-CHO, {mol.natm} atoms, {mol.nao} basis functions "
          f"({args.basis}), {len(env_q)} point charges (net {env_q.sum():+.2e} e); "
          f"OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}", flush=True)

    mf = qmmm.mm_charge(dft.RKS(mol, xc="b3lyp"), env_xyz, env_q, unit="Angstrom")
    mf.conv_tol = 1e-8
    mf.grids.level = args.grid_level
    t = time.perf_counter()
    mf.run()
    t_scf = time.perf_counter() - t
    print(f"SCF (embedded)        {t_scf:8.2f} s", flush=True)
    if not mf.converged:
        print("SCF did not converge", file=sys.stderr)
        return 1

    res: dict[str, dict[str, np.ndarray]] = {"tda": {}, "stda": {}}
    t = time.perf_counter()
    for kind in ("singlet", "triplet"):
        td = mf.TDA()
        td.singlet = kind == "singlet"
        td.nstates = args.n_states
        td.kernel()
        res["tda"][kind] = np.asarray(td.e) * HARTREE_TO_EV
        print(f"  full TDA {kind} done at {time.perf_counter() - t:.1f} s", flush=True)
        if kind == "singlet":
            res["tda"]["f"] = np.asarray(td.oscillator_strength())
    t_tda = time.perf_counter() - t

    t = time.perf_counter()
    extra = {}
    for kind in ("singlet", "triplet"):
        st = stda_response(mf, kind, args.n_states)
        res["stda"][kind] = st.energies_Eh * HARTREE_TO_EV
        extra[kind] = st.extra
        if kind == "singlet":
            res["stda"]["f"] = st.osc_strength
    t_stda = time.perf_counter() - t

    timings = {}
    for model in ("tda", "stda-refined"):
        m = Method(xc="b3lyp", basis=args.basis, n_singlets=args.n_states, n_triplets=args.n_states,
                   excited=model, response_grid_level=None, grid_level=args.grid_level)
        t = time.perf_counter()
        for kind in ("singlet", "triplet"):
            rs = _tdscf_states(mf, mf, m, kind, args.n_states, None)
            res.setdefault("cl-" + model, {})[kind] = rs.energies_Eh * HARTREE_TO_EV
        timings[model] = time.perf_counter() - t

    print(f"full TDA, PySCF solver        S+T step {t_tda:8.2f} s")
    print(f"full TDA, clusterlab Davidson S+T step {timings['tda']:8.2f} s   "
          f"({t_tda / timings['tda']:.1f}x faster than PySCF's solver)")
    print(f"stda-refined                  S+T step {timings['stda-refined']:8.2f} s   "
          f"({t_tda / timings['stda-refined']:.1f}x faster than PySCF's solver)")
    print(f"sTDA (published)              S+T step {t_stda:8.3f} s")
    print(f"speed ratio TDA/sTDA  {t_tda / t_stda:8.1f} x   (target >= 20x)")
    for kind in ("singlet", "triplet"):
        e = extra[kind]
        print(f"sTDA {kind}: {e['n_primary']} primary + {e['n_secondary']} secondary of "
              f"{e['n_csf_total']} CSFs")
    s1, t1 = res["tda"]["singlet"][0], res["tda"]["triplet"][0]
    print(f"S1/T1 full TDA (PySCF)  {s1:.3f} / {t1:.3f} eV, dEST {s1 - t1:.3f} eV")
    for model in ("cl-tda", "cl-stda-refined", "stda"):
        s1m, t1m = res[model]["singlet"][0], res[model]["triplet"][0]
        label = {"cl-tda": "full TDA (clusterlab)", "stda": "sTDA", "cl-stda-refined": "stda-refined"}[model]
        print(f"S1/T1 {label:22s} {s1m:.3f} / {t1m:.3f} eV, diff {s1m - s1:+.4f} / {t1m - t1:+.4f} eV, "
              f"dEST {s1m - t1m:.3f} eV")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
