"""Speed of the film-wide site-energy model against a per-molecule loop.

In one run, on the same films:
1. the demo film (all molecules, all frames) with ``film_site_energies``, with
   one thread and with two (``threads=2``);
2. two straightforward per-molecule Python loops on a subset of molecules
   (frame 0), scaled to the whole film: ``Film.carve`` + a direct Coulomb sum
   over the cluster's point charges,
   - *loop A* (the loop this benchmark always used): for each state, for each
     QM atom, the potential of all point charges;
   - *loop B* (leaner): the potential at each QM atom once, then one dot
     product per state;
   their numbers are compared with the model's;
3. a film of >= 10,000 molecules (the demo box replicated 4x4x4, one frame),
   model against loops A and B measured on molecules of that same film
   (carving scans the whole film, so each loop step costs more there).

Without ``demo_traj/`` a synthetic TIP3P-like lattice stands in (said in the
output). State charges are made up here (S0 = the film's charges; the
difference charges only set the numbers, not the cost).

Run: ``OMP_NUM_THREADS=1 python bench/bench_sitemodel.py`` (say what else runs on the machine).
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
from clusterlab.electrostatics.chargeset import StateChargeSet  # noqa: E402
from clusterlab.study.filmmodel import film_site_energies  # noqa: E402
from clusterlab.units import COULOMB_EV_A  # noqa: E402

RADIUS = 15.0
N_LOOP = 24
STATES = ("S1", "T1", "cation", "anion")


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
    """The frame-0 box tiled k x k x k times (k = ceil((n_target / n)^(1/3)))."""
    u = film.universe
    u.trajectory[0]
    n_mol = film.n_molecules
    reps = int(np.ceil((n_target / n_mol) ** (1 / 3)))
    box = u.dimensions.copy()
    if not np.allclose(box[3:], 90):
        raise SystemExit("replication here assumes an orthorhombic box")
    # whole molecules with centroids in the cell (as the model sees them), so that
    # every copy stays whole in the big box
    pos0 = film.frame_geometry(0, periodic=True).positions_A
    shifts = np.array([[i, j, k] for i in range(reps) for j in range(reps) for k in range(reps)]) * box[:3]
    big = mda.Merge(*([u.atoms] * len(shifts)))
    big.load_new(np.concatenate([pos0 + s for s in shifts])[None].astype(np.float32), format=MemoryReader,
                 dimensions=np.r_[box[:3] * reps, 90, 90, 90][None].astype(np.float32))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
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


def loop_a(film, cset, mol, frame):
    """Loop A: per state, per QM atom, the potential of all point charges."""
    c = film.carve(int(mol), RADIUS, frame=frame)
    res = str(film.molecule_resnames[mol])
    out = {}
    for st in STATES:
        dq = cset.difference(res, st)
        total = 0.0
        for a in range(len(dq)):  # per QM atom: potential of all point charges
            r = np.linalg.norm(c.env_positions - c.qm_positions[a], axis=1)
            total += dq[a] * float(np.sum(c.env_charges / r)) * COULOMB_EV_A
        out[st] = total
    return out


def loop_b(film, cset, mol, frame):
    """Loop B: the potential at each QM atom once, then a dot product per state."""
    c = film.carve(int(mol), RADIUS, frame=frame)
    res = str(film.molecule_resnames[mol])
    v = np.empty(len(c.qm_positions))
    for a in range(len(v)):
        r = np.linalg.norm(c.env_positions - c.qm_positions[a], axis=1)
        v[a] = np.sum(c.env_charges / r) * COULOMB_EV_A
    return {st: float(cset.difference(res, st) @ v) for st in STATES}


def timed(fn, *a, **kw):
    t0 = time.perf_counter()
    out = fn(*a, **kw)
    return out, time.perf_counter() - t0


def main() -> None:
    try:
        film, what = demo_film()
    except Exception as exc:  # noqa: BLE001 - fall back when the demo is absent
        print(f"(demo film not usable: {exc})")
        film, what = synthetic_film()
    cset = made_up_states(film)
    print(f"film: {what}: {film.n_molecules} molecules, {film.n_atoms} atoms, {film.n_frames} frames; "
          f"radius {RADIUS} Å, rule 'atom'; OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', '?')}, "
          f"{os.cpu_count()} CPUs, load average before {os.getloadavg()[0]:.2f}")
    film_site_energies(film, cset, radius_A=RADIUS, progress=False, frames=[0])      # warm-up

    rng = np.random.default_rng(3)
    picks = rng.choice(film.n_molecules, N_LOOP, replace=False)
    rows = {}
    # interleave: model, loops, model again, so that load changes hit both sides alike
    res1, t1 = timed(film_site_energies, film, cset, radius_A=RADIUS, progress=False)
    ref_a, ta = timed(lambda: [loop_a(film, cset, m, 0) for m in picks])
    ref_b, tb = timed(lambda: [loop_b(film, cset, m, 0) for m in picks])
    res2, t2 = timed(film_site_energies, film, cset, radius_A=RADIUS, progress=False, threads=2)
    _, t1b = timed(film_site_energies, film, cset, radius_A=RADIUS, progress=False)
    df1, df2 = res1.table, res2.table
    t1 = min(t1, t1b)
    n_rows = len(df1)
    sub = df1[df1.frame == 0].set_index("molecule")
    err_a = max(abs(sub.loc[int(m), f"{s}_shift_eV"] - r[s]) for m, r in zip(picks, ref_a) for s in r)
    err_b = max(abs(sub.loc[int(m), f"{s}_shift_eV"] - r[s]) for m, r in zip(picks, ref_b) for s in r)
    same_threads = float(np.max(np.abs(df1[[f"{s}_shift_eV" for s in STATES]].to_numpy()
                                       - df2[[f"{s}_shift_eV" for s in STATES]].to_numpy())))
    per_a, per_b = ta / N_LOOP, tb / N_LOOP
    print(f"model, all molecules x all frames ({n_rows} rows, mean env {df1.n_env_molecules.mean():.0f} molecules): "
          f"{t1:6.2f} s with 1 thread, {t2:6.2f} s with 2 (largest difference {same_threads:.1e} eV)")
    print(f"loop A (per state, per atom), {N_LOOP} molecules: {per_a * 1e3:7.2f} ms per molecule-frame; "
          f"scaled to the film {per_a * n_rows:7.1f} s; largest difference from the model {err_a:.1e} eV")
    print(f"loop B (potential once),      {N_LOOP} molecules: {per_b * 1e3:7.2f} ms per molecule-frame; "
          f"scaled to the film {per_b * n_rows:7.1f} s; largest difference from the model {err_b:.1e} eV")
    rows["demo"] = (per_a * n_rows / t1, per_b * n_rows / t1, per_a * n_rows / t2, per_b * n_rows / t2)
    # headline: the fair baseline is the lean loop B (what a skilled user would write)
    print(f"SPEED RATIO demo film (fair baseline, loop B / model): {rows['demo'][1]:6.1f}x (1 thread), "
          f"{rows['demo'][3]:6.1f}x (2 threads); against the per-state loop A: {rows['demo'][0]:6.1f}x / "
          f"{rows['demo'][2]:6.1f}x")

    big = replicate(film)
    cbig = made_up_states(big)
    resb, tb1 = timed(film_site_energies, big, cbig, radius_A=RADIUS, frames=[0], progress=False)
    dfb = resb.table
    picks_b = rng.choice(big.n_molecules, 8, replace=False)
    _, tla = timed(lambda: [loop_a(big, cbig, m, 0) for m in picks_b])
    refb, tlb = timed(lambda: [loop_b(big, cbig, m, 0) for m in picks_b])
    _, tb2 = timed(film_site_energies, big, cbig, radius_A=RADIUS, frames=[0], progress=False, threads=2)
    per_la, per_lb = tla / len(picks_b), tlb / len(picks_b)
    subb = dfb.set_index("molecule")
    err_big = max(abs(subb.loc[int(m), f"{s}_shift_eV"] - r[s]) for m, r in zip(picks_b, refb) for s in r)
    print(f"replicated film, {big.n_molecules} molecules, one frame: model {tb1:6.2f} s (1 thread), {tb2:6.2f} s "
          f"(2 threads); on that film loop A {per_la * 1e3:.1f} ms and loop B {per_lb * 1e3:.1f} ms per molecule "
          f"(scaled {per_la * len(dfb):.0f} s and {per_lb * len(dfb):.0f} s); largest difference {err_big:.1e} eV")
    print(f"SPEED RATIO >=10k film (fair baseline, loop B / model): {per_lb * len(dfb) / tb1:6.1f}x (1 thread), "
          f"{per_lb * len(dfb) / tb2:6.1f}x (2 threads); against loop A: {per_la * len(dfb) / tb1:6.1f}x / "
          f"{per_la * len(dfb) / tb2:6.1f}x")
    # a replicated box is periodic in the same way: the same shifts as the original frame 0
    same = np.allclose(subb.loc[: film.n_molecules - 1, "cation_shift_eV"].to_numpy(),
                       sub["cation_shift_eV"].to_numpy(), atol=1e-4)  # float32 coordinates
    print(f"replicated film reproduces the original frame-0 shifts: {same}; load average after "
          f"{os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
