"""Carving speed: one radius-30 Å cluster in a film of >= 10,000 molecules.

Compares, in one run on the same film and frame:
- clusterlab's carve (KD-tree + lattice-image enumeration), split into the
  once-per-frame preparation (make whole, wrap) and the per-cluster carve;
- a brute-force all-pairs minimum-image reference (every film atom against
  every central atom, numpy), which is also used to check the answer.

The film is the demo film replicated to >= 10,000 molecules when
``demo_traj/`` is present, else a synthetic lattice of TIP3P-like molecules.

Run: ``python bench/bench_carve.py``
"""

from __future__ import annotations

import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))
import MDAnalysis as mda  # noqa: E402
from MDAnalysis.coordinates.memory import MemoryReader  # noqa: E402

from clusterlab import film_from_universe, load_film  # noqa: E402

ROOT = os.path.join(os.path.dirname(__file__), "..")
RADIUS = 30.0


def replicated_demo(n_target: int = 10_000):
    from clusterlab.demo import demo_paths

    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(top, traj)
    u = film.universe
    n_mol = film.n_molecules
    reps = int(np.ceil((n_target / n_mol) ** (1 / 3)))
    nx, ny, nz = reps, reps, int(np.ceil(n_target / (n_mol * reps * reps)))
    box = u.dimensions.copy()
    if not np.allclose(box[3:], 90):
        raise SystemExit("replication here assumes an orthorhombic demo box")
    pos0 = u.atoms.positions.copy()
    shifts = np.array([[i, j, k] for i in range(nx) for j in range(ny) for k in range(nz)]) * box[:3]
    pos = np.concatenate([pos0 + s for s in shifts])
    big = mda.Merge(*([u.atoms] * len(shifts)))
    big.load_new(pos[None].astype(np.float32), format=MemoryReader,
                 dimensions=np.r_[box[:3] * [nx, ny, nz], 90, 90, 90][None].astype(np.float32))
    return film_from_universe(big, name="demo x%d" % len(shifts)), f"demo film replicated {nx}x{ny}x{nz}"


def synthetic(n_side: int = 22):
    from conftest import build_water_universe, lattice_centres

    box = np.array([3.1 * n_side] * 3 + [90.0] * 3)
    u, _ = build_water_universe(lattice_centres(n_side, 0.2, np.random.default_rng(0)), box)
    return film_from_universe(u), f"synthetic TIP3P-like lattice {n_side}^3"


def brute_force_members(film, center: int, radius: float) -> set[tuple[int, ...]]:
    """All-pairs minimum-image reference (valid for radius < half the box)."""
    geo = film.frame_geometry(0)
    box = geo.box[:3]
    pos = geo.positions_A
    c = pos[film.molecule_atoms(center)]
    d2min = np.full(len(pos), np.inf)
    for a in c:  # every central atom against every film atom
        v = pos - a
        v -= box * np.round(v / box)
        d2min = np.minimum(d2min, np.einsum("ij,ij->i", v, v))
    mol_min = np.full(film.n_molecules, np.inf)
    np.minimum.at(mol_min, film.molecule_of_atom, d2min)
    mol_min[center] = np.inf
    return set(np.flatnonzero(mol_min <= radius**2).tolist())


def main() -> None:
    try:
        film, what = replicated_demo()
    except Exception as exc:  # noqa: BLE001 - fall back when the demo is absent
        print(f"(demo film not usable: {exc}; using a synthetic film)")
        film, what = synthetic()
    print(f"film: {what}: {film.n_molecules} molecules, {film.n_atoms} atoms")
    box = film.box(0)
    print(f"box: {box[:3].round(1).tolist()} Å; radius {RADIUS} Å (half box {box[:3].min() / 2:.1f} Å)")

    t0 = time.perf_counter()
    film.frame_geometry(0)
    t_prep = time.perf_counter() - t0

    centers = np.random.default_rng(1).choice(film.n_molecules, 5, replace=False)
    t_carve, t_brute = [], []
    for c in centers:
        t0 = time.perf_counter()
        cl = film.carve(int(c), RADIUS)
        t_carve.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ref = brute_force_members(film, int(c), RADIUS)
        t_brute.append(time.perf_counter() - t0)
        got = set(np.unique(cl.env_molecules).tolist())
        if got != ref:
            raise SystemExit(f"MISMATCH for molecule {c}: {len(got)} vs {len(ref)} molecules")
    tc, tb = float(np.median(t_carve)), float(np.median(t_brute))
    print(f"frame preparation (once per frame): {t_prep * 1e3:8.1f} ms")
    print(f"carve, median of {len(centers)}:          {tc * 1e3:8.1f} ms  ({cl.n_env_molecules} molecules, {cl.n_charges} charges)")
    print(f"brute-force all-pairs reference:    {tb * 1e3:8.1f} ms")
    print(f"speed ratio brute/carve:            {tb / tc:8.1f}x  (same answers for all {len(centers)} clusters)")
    print(f"first carve of a frame incl. preparation: {(t_prep + tc) * 1e3:.1f} ms")


if __name__ == "__main__":
    main()
