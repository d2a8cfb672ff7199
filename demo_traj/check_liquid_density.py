#!/usr/bin/env python
"""Check the doped film's force-field route on a simple liquid: NPT density against the handbook.

The route is the one of ``generate_doped.py`` (RDKit MMFF94 typing and terms,
HF/6-31G* ESP charges, its nonbonded settings, 4 fs with hydrogen mass
repartitioning): this script only calls its functions. A box of
``n_molecules`` copies of one small molecule is inserted at random at a low
density, shrunk rigidly towards the liquid density, then run NPT (Monte Carlo
barostat, Langevin thermostat); the density is sampled during production and
its mean given with a block-average standard error.

Usage::

    python demo_traj/check_liquid_density.py benzene                  # 250 molecules, 20 + 60 ps
    python demo_traj/check_liquid_density.py benzene --equil-ps 10 --prod-ps 20 --molecules 150
    python demo_traj/check_liquid_density.py toluene --vdw lj-lb      # the route before the fix
    python demo_traj/check_liquid_density.py doped-box                # 60 hosts + 4 guests, short melt-quench

Handbook densities (``LIQUIDS``) are from the CRC Handbook of Chemistry and
Physics (the values at 20 and 25 °C as quoted; see each entry).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import generate_doped as route  # noqa: E402  (the route under test)
from filmkit import AVOGADRO, box_edges_nm, density_g_cm3, place_molecules, run_schedule  # noqa: E402

# Liquids and their handbook densities (g/cm^3) at 1 atm, by temperature (K).
LIQUIDS = {
    "benzene": {"smiles": "c1ccccc1", "resname": "BNZ",
                "density_g_cm3": {293.15: 0.8765, 298.15: 0.8737},
                "source": "CRC Handbook of Chemistry and Physics (benzene: 0.8765 g/cm3 at 20 C, "
                          "0.8737 at 25 C)"},
    "toluene": {"smiles": "Cc1ccccc1", "resname": "TOL",
                "density_g_cm3": {293.15: 0.8668, 298.15: 0.8623},
                "source": "CRC Handbook of Chemistry and Physics (toluene: 0.8623 g/cm3 at 25 C, confirmed as "
                          "quoted on a reference page citing it; 0.8668 at 20 C from memory)"},
    "pyridine": {"smiles": "c1ccncc1", "resname": "PYR",
                 "density_g_cm3": {293.15: 0.9819, 298.15: 0.9782},
                 "source": "CRC Handbook of Chemistry and Physics (pyridine: 0.9819 g/cm3 at 20 C, confirmed as "
                           "quoted on a reference page; 0.9782 at 25 C from memory)"},
}
START_DENSITY = 0.35          # g/cm^3 for random insertion
SHRINK_TO = 0.80              # g/cm^3, rigid shrink before MD (below every liquid here)
SAMPLE_STEPS = 50             # density sample spacing in production (0.2 ps at 4 fs)


def handbook_density(liquid: str, temperature_K: float) -> float:
    """Handbook density (g/cm³) at ``temperature_K``, linear in T through the two tabulated points."""
    tab = LIQUIDS[liquid]["density_g_cm3"]
    (t1, d1), (t2, d2) = sorted(tab.items())
    return d1 + (d2 - d1) * (temperature_K - t1) / (t2 - t1)


def block_error(x: np.ndarray, n_blocks: int = 5) -> float:
    """Standard error of the mean of a correlated series from ``n_blocks`` block means."""
    blocks = np.array_split(np.asarray(x, dtype=float), n_blocks)
    means = np.array([b.mean() for b in blocks])
    return float(means.std(ddof=1) / np.sqrt(n_blocks))


def npt_density(species: list[dict], charges: dict, schedule: list[tuple], prod_ps: float,
                threads: int = 1, seed: int = 20261203, vdw: str | None = None,
                shrink_to_g_cm3: float = SHRINK_TO, pressure_bar: float = 1.0) -> dict:
    """Mean NPT density of a box of molecules built with the route of ``generate_doped.py``.

    Parameters
    ----------
    species : list of dict
        One species record (``generate_doped.species_from_smiles``) per molecule.
    charges : dict
        Charges (e) per species ``key``.
    schedule : list of tuple
        Phases before production, ``(name, ps, T_start_K, T_end_K, P_bar)``
        (``filmkit.run_schedule``); production runs at the last phase's end
        temperature and ``pressure_bar``.
    prod_ps : float
        Production length, sampled every ``SAMPLE_STEPS`` steps.
    threads : int
        OpenMM CPU platform threads.
    vdw : str or None
        van der Waals model (``generate_doped.VDW_MODELS``); None: the route's default.
    shrink_to_g_cm3 : float
        Rigid shrink target after random insertion at ``START_DENSITY``.

    Returns
    -------
    dict
        ``density_g_cm3`` (production mean), ``stderr_g_cm3`` (5 block means),
        the two half means, the phase log, timings (wall and CPU s) and
        ``series_g_cm3``.
    """
    import openmm as mm
    import openmm.unit as u

    vdw = route.VDW_MODEL if vdw is None else vdw
    t_wall, t_cpu = time.perf_counter(), time.process_time()
    mass = sum(sum(sp["masses"]) for sp in species)
    box_nm = (mass / AVOGADRO / START_DENSITY * 1e21) ** (1 / 3)
    rng = np.random.default_rng(seed)
    pos_A = place_molecules([sp["xyz_A"] for sp in species], box_nm * 10, rng)
    system = route.build_system(species, charges, box_nm, vdw=vdw)
    temperature_K = schedule[-1][3]
    baro = mm.MonteCarloBarostat(pressure_bar * u.bar, temperature_K * u.kelvin, 25)
    baro.setRandomNumberSeed(seed % 2 ** 31)
    system.addForce(baro)
    integ = mm.LangevinMiddleIntegrator(temperature_K * u.kelvin, 1.0 / u.picosecond, route.DT_PS * u.picoseconds)
    integ.setRandomNumberSeed(seed % 2 ** 31)
    ctx = mm.Context(system, integ, mm.Platform.getPlatformByName("CPU"), {"Threads": str(threads)})
    ctx.setPositions(pos_A / 10.0 * u.nanometer)
    mm.LocalEnergyMinimizer.minimize(ctx, 10.0, 200)
    sizes = np.array([len(sp["names"]) for sp in species])
    route.shrink_box(ctx, integ, np.concatenate([[0], np.cumsum(sizes)[:-1]]), sizes, mass,
                     shrink_to_g_cm3, 10, 50, 0)
    ctx.setVelocitiesToTemperature(schedule[0][2] * u.kelvin, seed % 2 ** 31)
    timings: dict[str, float] = {}
    log = run_schedule(ctx, integ, schedule, route.DT_PS, 1.0, mass, timings)
    integ.setTemperature(temperature_K * u.kelvin)
    ctx.setParameter(mm.MonteCarloBarostat.Temperature(), temperature_K)
    ctx.setParameter(mm.MonteCarloBarostat.Pressure(), pressure_bar)
    t_prod = time.perf_counter()
    series = []
    for _ in range(max(5, int(round(prod_ps / route.DT_PS / SAMPLE_STEPS)))):
        integ.step(SAMPLE_STEPS)
        series.append(density_g_cm3(mass, box_edges_nm(ctx)))
    series = np.array(series)
    half = len(series) // 2
    return {
        "n_molecules": len(species), "n_atoms": int(sizes.sum()), "vdw": vdw, "T_K": temperature_K,
        "P_bar": pressure_bar, "schedule": log, "prod_ps": len(series) * SAMPLE_STEPS * route.DT_PS,
        "density_g_cm3": round(float(series.mean()), 5), "stderr_g_cm3": round(block_error(series), 5),
        "first_half_g_cm3": round(float(series[:half].mean()), 5),
        "second_half_g_cm3": round(float(series[half:].mean()), 5),
        "prod_wall_s": round(time.perf_counter() - t_prod, 1),
        "wall_s": round(time.perf_counter() - t_wall, 1), "cpu_s": round(time.process_time() - t_cpu, 1),
        "threads": threads, "load_1min": round(os.getloadavg()[0], 2), "series_g_cm3": series.round(5).tolist(),
    }


def liquid_density(liquid: str = "benzene", n_molecules: int = 250, equil_ps: float = 20.0,
                   prod_ps: float = 60.0, temperature_K: float = 300.0, pressure_bar: float = 1.0,
                   threads: int = 1, seed: int = 20261203, vdw: str | None = None,
                   esp_cache: Path | None = None, verbose: bool = True) -> dict:
    """NPT density of a neat liquid built with the doped film's force-field route, against the handbook.

    The molecule is typed and parameterised by ``generate_doped.species_from_smiles``,
    its charges are ``generate_doped.esp_fit`` (HF/6-31G* ESP); ``equil_ps`` of NPT
    at ``temperature_K`` (not sampled) precede ``prod_ps`` of production
    (:func:`npt_density`).

    Returns
    -------
    dict
        The record of :func:`npt_density` plus ``liquid``, ``smiles``,
        ``handbook_g_cm3`` (at ``temperature_K``), its source and ``deviation``
        (simulated / handbook - 1).
    """
    if liquid not in LIQUIDS:
        raise ValueError(f"liquid {liquid!r} unknown; choose one of {sorted(LIQUIDS)}")
    info = LIQUIDS[liquid]
    t_cpu = time.process_time()
    sp = route.species_from_smiles(liquid, info["smiles"], info["resname"], seed=seed)
    charges = route.esp_fit(sp, esp_cache)["charges_e"]
    res = npt_density([sp] * n_molecules, {liquid: charges},
                      [("equilibrate", equil_ps, temperature_K, temperature_K, pressure_bar)], prod_ps,
                      threads=threads, seed=seed, vdw=vdw, pressure_bar=pressure_bar)
    ref = handbook_density(liquid, temperature_K)
    out = {"liquid": liquid, "smiles": info["smiles"], **res, "handbook_g_cm3": round(ref, 5),
           "handbook_source": info["source"], "deviation": round(res["density_g_cm3"] / ref - 1.0, 5),
           "cpu_s": round(time.process_time() - t_cpu, 1)}
    if verbose:
        print(json.dumps({k: v for k, v in out.items() if k not in ("series_g_cm3", "schedule")}), flush=True)
    return out


def doped_box_density(n_host: int = 60, n_guest: int = 4, hot_ps: float = 4.0, anneal_ps: float = 8.0,
                      equil_ps: float = 4.0, prod_ps: float = 12.0, threads: int = 1, seed: int = 20261203,
                      vdw: str | None = None, verbose: bool = True) -> dict:
    """NPT density of a small box of the doped film's species after a short melt-quench.

    Host and guest come from ``generate_doped.SPECIES`` with the committed
    charges of ``doped/forcefield.json`` (the ESP fits of the film); the
    schedule is the film's (hot 550 K at 2000 bar, cooling to 300 K at 1000 bar,
    300 K at 1 bar) with the given lengths, then production at 300 K, 1 bar.
    A glass made this fast is looser than a slowly made one: the number is a
    lower bound for the route's film density, comparable between vdW models.
    """
    ff = json.loads((HERE / "doped" / "forcefield.json").read_text())["species"]
    sps, charges = {}, {}
    for key, info in route.SPECIES.items():
        sps[key] = route.species_from_smiles(key, info["smiles"], info["resname"])
        atoms = ff[key]["atoms"]
        if [a["name"] for a in atoms] != sps[key]["names"]:
            raise RuntimeError(f"atom names of {key} differ from doped/forcefield.json")
        charges[key] = [a["charge_e"] for a in atoms]
    rng = np.random.default_rng(seed)
    molecules = [sps["host"]] * n_host + [sps["guest"]] * n_guest
    molecules = [molecules[i] for i in rng.permutation(len(molecules))]
    schedule = [("hot", hot_ps, 550, 550, 2000.0), ("anneal", anneal_ps, 550, 300, 1000.0),
                ("equilibrate", equil_ps, 300, 300, 1.0)]
    res = npt_density(molecules, charges, schedule, prod_ps, threads=threads, seed=seed, vdw=vdw,
                      shrink_to_g_cm3=1.0)
    res.update({"n_host": n_host, "n_guest": n_guest})
    if verbose:
        print(json.dumps({k: v for k, v in res.items() if k != "series_g_cm3"}), flush=True)
    return res


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("liquid", nargs="?", default="benzene", choices=sorted(LIQUIDS) + ["doped-box"],
                    help="a liquid of LIQUIDS, or doped-box: a small box of the doped film's host and guest")
    ap.add_argument("--molecules", type=int, default=250)
    ap.add_argument("--equil-ps", type=float, default=20.0)
    ap.add_argument("--prod-ps", type=float, default=60.0)
    ap.add_argument("--temperature", type=float, default=300.0, help="K")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--vdw", choices=sorted(route.VDW_MODELS), default=None)
    ap.add_argument("--esp-cache", type=Path,
                    default=Path(os.environ.get("TMPDIR", "/tmp")) / "clusterlab_liquid_esp.json")
    ap.add_argument("--json", type=Path, default=None, help="write the result (with the series) here")
    args = ap.parse_args(argv)
    if args.liquid == "doped-box":
        res = doped_box_density(prod_ps=args.prod_ps, threads=args.threads, vdw=args.vdw)
    else:
        res = liquid_density(args.liquid, args.molecules, args.equil_ps, args.prod_ps, args.temperature,
                             threads=args.threads, vdw=args.vdw, esp_cache=args.esp_cache)
    if args.json is not None:
        args.json.write_text(json.dumps(res, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
