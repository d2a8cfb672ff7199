"""Speed of the film-wide site-energy model against a per-molecule loop.

In one run, on the same films:
1. the demo film (all molecules, all frames) with ``film_site_energies``;
2. a film of >= 10,000 molecules (the demo box replicated, one frame);
3. a straightforward per-molecule Python loop (``Film.carve`` + a direct
   Coulomb sum over the cluster's point charges) on a subset of molecules,
   scaled to the whole film; its numbers are also compared with the model's.

Without ``demo_traj/`` a synthetic TIP3P-like lattice stands in (said in the
output). State charges are made up here (S0 = the film's charges; the
difference charges only set the numbers, not the cost).

Run: ``OMP_NUM_THREADS=2 python bench/bench_sitemodel.py``
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
from clusterlab.electrostatics.sitemodel import StateChargeSet, film_site_energies  # noqa: E402
from clusterlab.units import COULOMB_EV_A  # noqa: E402

RADIUS = 15.0
N_LOOP = 24


def demo_film():
    from clusterlab.demo import demo_paths

    top, traj = demo_paths()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_film(top, traj), "demo film"


def synthetic_film(n_side=7, n_frames=20):
    from conftest import build_water_universe, lattice_centres

    box = np.array([3.1 * n_side] * 3 + [90.0] * 3)
    u, _ = build_water_universe(lattice_centres(n_side, 0.2, np.random.default_rng(0)), box, n_frames=n_frames)
    return film_from_universe(u), f"synthetic TIP3P-like lattice {n_side}^3 (demo film absent)"


def replicate(film, n_target=10_000):
    u = film.universe
    u.trajectory[0]
    n_mol = film.n_molecules
    reps = int(np.ceil((n_target / n_mol) ** (1 / 3)))
    box = u.dimensions.copy()
    if not np.allclose(box[3:], 90):
        raise SystemExit("replication here assumes an orthorhombic box")
    pos0 = u.atoms.positions.copy()
    shifts = np.array([[i, j, k] for i in range(reps) for j in range(reps) for k in range(reps)]) * box[:3]
    big = mda.Merge(*([u.atoms] * len(shifts)))
    big.load_new(np.concatenate([pos0 + s for s in shifts])[None].astype(np.float32), format=MemoryReader,
                 dimensions=np.r_[box[:3] * reps, 90, 90, 90][None].astype(np.float32))
    return film_from_universe(big, name=f"replicated x{len(shifts)}")


def made_up_states(film):
    out = {}
    for res in np.unique(film.molecule_resnames):
        mol = int(np.flatnonzero(film.molecule_resnames == res)[0])
        q0 = film.charges[film.molecule_atoms(mol)]
        n = len(q0)
        ramp = np.linspace(-1, 1, n) * 0.1
        out[str(res)] = {"S0": q0, "S1": q0 + ramp, "T1": q0 + 0.8 * ramp,
                         "cation": q0 + 1.0 / n, "anion": q0 - 1.0 / n}
    return StateChargeSet.from_arrays(out, method="made-up")


def loop_shift(film, cset, mol, frame):
    c = film.carve(int(mol), RADIUS, frame=frame)
    res = str(film.molecule_resnames[mol])
    out = {}
    for st in ("S1", "T1", "cation", "anion"):
        dq = cset.difference(res, st)
        total = 0.0
        for a in range(len(dq)):  # per QM atom: potential of all point charges
            r = np.linalg.norm(c.env_positions - c.qm_positions[a], axis=1)
            total += dq[a] * float(np.sum(c.env_charges / r)) * COULOMB_EV_A
        out[st] = total
    return out


def main() -> None:
    try:
        film, what = demo_film()
    except Exception as exc:  # noqa: BLE001 - fall back when the demo is absent
        print(f"(demo film not usable: {exc})")
        film, what = synthetic_film()
    cset = made_up_states(film)
    print(f"film: {what}: {film.n_molecules} molecules, {film.n_atoms} atoms, {film.n_frames} frames; "
          f"radius {RADIUS} Å, rule 'atom', threads OMP={os.environ.get('OMP_NUM_THREADS', '?')}")

    t0 = time.perf_counter()
    df = film_site_energies(film, radius=RADIUS, charges=cset, progress=False)
    t_model = time.perf_counter() - t0
    per_mol = t_model / len(df)
    print(f"model, all molecules x all frames ({len(df)} rows): {t_model:8.2f} s "
          f"({per_mol * 1e3:.3f} ms per molecule-frame; mean env {df.n_env_molecules.mean():.0f} molecules)")

    rng = np.random.default_rng(3)
    picks = rng.choice(film.n_molecules, N_LOOP, replace=False)
    t0 = time.perf_counter()
    ref = [loop_shift(film, cset, m, 0) for m in picks]
    t_loop = (time.perf_counter() - t0) / N_LOOP
    sub = df[df.frame == 0].set_index("molecule")
    err = max(abs(sub.loc[int(m), f"{s}_shift_eV"] - r[s]) for m, r in zip(picks, ref) for s in r)
    print(f"per-molecule loop (carve + direct sum), {N_LOOP} molecules: {t_loop * 1e3:8.1f} ms per molecule-frame; "
          f"largest difference from the model {err:.2e} eV")
    print(f"loop scaled to the whole film and all frames: {t_loop * len(df):8.1f} s")
    print(f"SPEED RATIO loop/model: {t_loop / per_mol:8.1f}x")

    big = replicate(film)
    t0 = time.perf_counter()
    dfb = film_site_energies(big, radius=RADIUS, charges=made_up_states(big), frames=[0], progress=False)
    t_big = time.perf_counter() - t0
    print(f"replicated film, {big.n_molecules} molecules, one frame: {t_big:8.2f} s "
          f"({t_big / len(dfb) * 1e3:.3f} ms per molecule); loop estimate {t_loop * len(dfb):.0f} s, "
          f"ratio {t_loop * len(dfb) / t_big:.1f}x")
    # a replicated box is periodic in the same way: the same shifts as the original frame 0
    same = np.allclose(dfb.set_index("molecule").loc[: film.n_molecules - 1, "cation_shift_eV"].to_numpy(),
                       sub["cation_shift_eV"].to_numpy(), atol=1e-4)  # float32 coordinates
    print(f"replicated film reproduces the original frame-0 shifts: {same}")


if __name__ == "__main__":
    main()
