"""Fixed charges vs polarizable environment for one demo molecule, side by side in one run.

For molecule ``--molecule`` of frame 0 of the demo film (``demo_traj/``) at outer radius
``--radius``: the fixed-charge calculation, then the polarizable one at each inner radius
``--inner`` (polarizable molecules within it, fixed charges beyond). Every polarizable
calculation also runs its fixed-charge reference on the same cluster
(``Method.polarization_reference``), so the printed polarization contributions to S1, T1, IP
and EA are polarizable minus fixed on one cluster; their change with the inner radius is the
convergence the default inner radius (``clusterlab.study.tasks.DEFAULT_POLARIZABLE_RADIUS_A``)
should come from. Cost columns: wall seconds of the whole call and of its polarizable part
(SCF + response + ions; the vacuum calculation is reused from the fixed-charge call and the
fixed-charge reference starts from its density and vectors), and the number of induced dipoles.

Run:  OMP_NUM_THREADS=2 python bench/bench_polarizable.py [--basis 6-31g] [--inner 4 6 8] [--radius 10]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--molecule", type=int, default=0)
    ap.add_argument("--radius", type=float, default=10.0)
    ap.add_argument("--inner", type=float, nargs="+", default=[4.0, 6.0, 8.0])
    ap.add_argument("--basis", default="6-31g")
    ap.add_argument("--xc", default="b3lyp")
    ap.add_argument("--states", type=int, default=2, help="singlets and triplets each")
    args = ap.parse_args()

    import clusterlab as cl

    here = os.path.join(os.path.dirname(__file__), "..", "demo_traj")
    film = cl.load_film(os.path.join(here, "bithiophene_film.psf"), os.path.join(here, "bithiophene_film.xtc"))
    fixed_m = cl.Method(xc=args.xc, basis=args.basis, grid_level=2, response_grid_level=1,
                        n_singlets=args.states, n_triplets=args.states, charged_states=True)
    pol_m = fixed_m.replace(environment="polarizable")
    print(f"molecule {args.molecule}, frame 0, outer radius {args.radius:g} Å; {fixed_m.describe()}")

    t = time.perf_counter()
    base = cl.excitations(film.carve(args.molecule, args.radius), fixed_m)
    t_fixed = time.perf_counter() - t
    s = base.summary()
    print(f"\nfixed charges: {base.meta['provenance']['n_charges']} charges, {t_fixed:.1f} s; "
          f"S1 {s['S1_eV']:.3f}  T1 {s['T1_eV']:.3f}  IP {s['IP_eV']:.3f}  EA {s['EA_eV']:.3f} eV")
    head = (f"{'inner Å':>7} {'dipoles':>7} {'wall s':>7} {'pol. s':>7} {'x fixed':>7} "
            f"{'dS1':>8} {'dT1':>8} {'dIP':>8} {'dEA':>8}   (polarizable - fixed, eV)")
    print("\n" + head)
    for r_in in args.inner:
        cluster = film.carve(args.molecule, args.radius, polarizable_radius=min(r_in, args.radius))
        t = time.perf_counter()
        res = cl.excitations(cluster, pol_m, vacuum=base, guess=base)  # vacuum reused, warm starts
        wall = time.perf_counter() - t
        tm = res.meta["timings_s"]
        pol_s = wall - tm.get("fixed_charges", 0.0)
        p = res.summary()
        print(f"{r_in:7.1f} {res.n_polarizable:7d} {wall:7.1f} {pol_s:7.1f} {pol_s / t_fixed:7.1f} "
              f"{p['S1_polarization_eV']:+8.3f} {p['T1_polarization_eV']:+8.3f} "
              f"{p['IP_polarization_eV']:+8.3f} {p['EA_polarization_eV']:+8.3f}   converged={res.converged}")
    print("\n'x fixed': the polarizable part's wall time over the whole fixed-charge call (vacuum included).")


if __name__ == "__main__":
    main()
