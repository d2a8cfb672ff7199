"""Benchmark: the MO-basis TDA operator's set-up built once per SCF and shared
by singlets and triplets, against one set-up per spin (the behaviour before),
side by side on the same converged SCF in one run.

Site: one host molecule (residue HCZ, 33 atoms) of the doped demo film, frame
``--frame``, cut radius ``--radius`` (fixed point charges), preset
``fast-large`` (B3LYP/6-31G, density fitting, SCF and response grid 1, refined
sTDA on the MO-basis operator with its 1 Eh window, 3 singlets + 3 triplets).

Two measurements per side (``per-spin``: every solve builds its own set-up;
``shared``: the calculation's one set-up):

* **set-up**: the operators of both spins built (``calc._tda_operator``) and
  applied once to one vector, minus one later product (what the set-up adds;
  the orbitals on the grid are filled in by the first product);
* **response**: ``solve_states`` for the singlets and then the triplets, as
  ``calculate`` runs them, with the energies of both sides compared.

Wall and CPU seconds (this process, all threads) are printed beside the load
average, since the machine may be shared. Writes
``bench/results/kernel_sharing.json``.

Usage::

    OMP_NUM_THREADS=1 nice -n 19 python bench/kernel_sharing.py [--molecule 0] [--radius 8] [--repeats 1]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time
import warnings

import numpy as np

import clusterlab as cl
from clusterlab.demo import doped_demo_paths
from clusterlab.qm import Method
from clusterlab.qm import calc as qcalc
from clusterlab.qm import mokernel
from clusterlab.qm.engine import cluster_embedding
from clusterlab.units import HARTREE_TO_EV

HERE = os.path.dirname(os.path.abspath(__file__))
KINDS = (("singlet", True), ("triplet", False))


def _cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


class _Clock:
    def __enter__(self):
        self.t, self.c = time.perf_counter(), _cpu()
        return self

    def __exit__(self, *exc):
        self.wall_s, self.cpu_s = time.perf_counter() - self.t, _cpu() - self.c


class _PartTimer:
    """Wall seconds spent inside PySCF's cache_xc_kernel and in the fitted blocks (while active)."""

    def __init__(self):
        from pyscf.dft import numint

        self.seconds = {"cache_xc_kernel": 0.0, "fitted_blocks": 0.0}
        self._orig = [(numint.NumInt, "cache_xc_kernel"), (mokernel, "_fitted_blocks")]
        self._saved = [getattr(o, name) for o, name in self._orig]

    def _wrap(self, fn, key):
        def timed(*a, **kw):
            t = time.perf_counter()
            try:
                return fn(*a, **kw)
            finally:
                self.seconds[key] += time.perf_counter() - t
        return timed

    def __enter__(self):
        for (owner, name), fn, key in zip(self._orig, self._saved, self.seconds):
            setattr(owner, name, self._wrap(fn, key))
        return self

    def __exit__(self, *exc):
        for (owner, name), fn in zip(self._orig, self._saved):
            setattr(owner, name, fn)


def _side(mf, method: Method, shared: bool, n: int) -> dict:
    """Set-up and response timings of one side on the converged ``mf``."""
    real_share = qcalc._share
    if not shared:
        qcalc._share = lambda _mf: qcalc._ResponseShare()  # noqa: E731 - a fresh set-up at every solve
    try:
        vars(mf).pop(qcalc._SHARE_ATTR, None)
        mf_resp = qcalc._response_scf(mf, method)
        n_solve = n + qcalc.EXTRA_ROOTS
        setup = {"wall_s": 0.0, "cpu_s": 0.0}
        parts = _PartTimer()
        for _kind, singlet in KINDS:
            td = mf_resp.TDA()
            td.singlet = singlet
            with _Clock() as built, parts:
                vind, hdiag, window = qcalc._tda_operator(td, mf, mf_resp, method, singlet, n_solve)
                x = np.zeros((1, len(hdiag)))
                x[0, int(np.argmin(hdiag))] = 1.0
                vind(x)
            with _Clock() as again:
                vind(x)
            setup["wall_s"] += built.wall_s - again.wall_s
            setup["cpu_s"] += built.cpu_s - again.cpu_s
            del vind
        share = vars(mf).get(qcalc._SHARE_ATTR)
        held_MB = share.setup.held_MB() if share is not None and share.setup is not None else None
        vars(mf).pop(qcalc._SHARE_ATTR, None)
        energies = {}
        with _Clock() as resp:
            for kind, _singlet in KINDS:
                energies[kind] = qcalc.solve_states(mf, method, kind, n).energies_Eh * HARTREE_TO_EV
        vars(mf).pop(qcalc._SHARE_ATTR, None)
    finally:
        qcalc._share = real_share
    return {"setup_wall_s": setup["wall_s"], "setup_cpu_s": setup["cpu_s"],
            "setup_parts_wall_s": dict(parts.seconds), "response_wall_s": resp.wall_s,
            "response_cpu_s": resp.cpu_s, "energies_eV": {k: v.tolist() for k, v in energies.items()},
            "window_pairs": [window.n_pairs, int((mf.mo_occ > 0).sum() * (mf.mo_occ == 0).sum())],
            "shared_setup_MB": held_MB, "load_average_after": os.getloadavg()[0]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--molecule", type=int, default=0, help="host molecule id (0-1399)")
    ap.add_argument("--radius", type=float, default=8.0)
    ap.add_argument("--frame", type=int, default=0)
    ap.add_argument("--repeats", type=int, default=2, help="per-spin/shared pairs, alternating")
    ap.add_argument("--out", default=os.path.join(HERE, "results", "kernel_sharing.json"))
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    film = cl.load_film(*doped_demo_paths())
    c = film.carve(args.molecule, args.radius, frame=args.frame)
    method = Method.preset("fast-large")
    n = method.n_singlets
    mol = qcalc.build_molecule(c.qm_symbols, c.qm_positions, method, charge=c.qm_charge)
    mf = qcalc.make_scf(mol, method, cluster_embedding(c, method))
    with _Clock() as scf:
        ok, _route = qcalc.run_scf(mf, method)
    if not ok:
        print("SCF not converged", file=sys.stderr)
        return 1
    print(f"molecule {args.molecule}: {c.n_qm_atoms} QM atoms, {mol.nao} AO, {c.n_charges} charges, "
          f"{len(mf.grids.weights)} grid points; SCF {scf.wall_s:.1f} s wall, {scf.cpu_s:.1f} s CPU; threads "
          f"{os.environ.get('OMP_NUM_THREADS', 'default')}; {method.describe()}", flush=True)
    runs: dict[str, list[dict]] = {"per-spin": [], "shared": []}
    for _ in range(args.repeats):
        for side in ("per-spin", "shared"):
            r = _side(mf, method, side == "shared", n)
            runs[side].append(r)
            print(f"  {side:8s}: set-up {r['setup_wall_s']:6.2f} s wall {r['setup_cpu_s']:6.2f} s CPU; singlets+"
                  f"triplets {r['response_wall_s']:6.2f} s wall {r['response_cpu_s']:6.2f} s CPU; load "
                  f"{r['load_average_after']:.2f}; set-up parts (wall s) "
                  + str({k: round(v, 2) for k, v in r["setup_parts_wall_s"].items()}), flush=True)

    def mean(side, key):
        return float(np.mean([r[key] for r in runs[side]]))

    diff_eV = max(float(np.max(np.abs(np.subtract(a["energies_eV"][k], b["energies_eV"][k]))))
                  for a in runs["per-spin"] for b in runs["shared"] for k in ("singlet", "triplet"))
    summary = {"molecule": args.molecule, "n_qm_atoms": c.n_qm_atoms, "n_ao": mol.nao, "n_charges": c.n_charges,
               "grid_points": len(mf.grids.weights), "radius_A": args.radius, "frame": args.frame,
               "threads": os.environ.get("OMP_NUM_THREADS"), "method": method.to_dict(), "runs": runs,
               "largest_energy_difference_eV": diff_eV, "versions": cl.software_versions()}
    for key in ("setup_wall_s", "setup_cpu_s", "response_wall_s", "response_cpu_s"):
        summary[f"ratio_{key}"] = mean("per-spin", key) / mean("shared", key)
    print(f"ratio per-spin/shared: set-up wall {summary['ratio_setup_wall_s']:.2f}x CPU "
          f"{summary['ratio_setup_cpu_s']:.2f}x; singlets+triplets wall {summary['ratio_response_wall_s']:.2f}x CPU "
          f"{summary['ratio_response_cpu_s']:.2f}x; largest energy difference {diff_eV:.1e} eV; shared set-up held "
          f"{sum(runs['shared'][0]['shared_setup_MB'].values()):.0f} MB "
          + str({k: round(v, 1) for k, v in runs['shared'][0]['shared_setup_MB'].items()}))
    os.makedirs(os.path.dirname(args.out), exist_ok=True)
    with open(args.out, "w") as fh:
        json.dump(summary, fh, indent=1, default=float)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
