#!/usr/bin/env python
"""Generate the second demo film: a doped host:guest emission layer from an OpenMM run.

Scenario (invented): the "Thornbury green-emitter layer study" wants an
amorphous emission layer of a polar carbazole host doped with a twisted
donor-acceptor emitter. This script builds it as a periodic cubic box of
1,500 molecules, runs a melt-quench schedule and writes into ``demo_traj/doped/``

* ``doped_film.psf``      topology (CHARMM/X-PLOR PSF): charges, masses, names,
  MMFF atom types, bonds, angles, dihedrals, impropers; one residue per molecule,
  ``HCZ`` (host) and ``GDA`` (guest);
* ``doped_film.xtc``      production frames, every atom wrapped into the box;
* ``doped_film.pdb``      frame 0;
* ``forcefield.json``     every force-field number and its source;
* ``build_record.json``   composition, schedule, densities, timings, checks, versions.

The force field is built by a general route from a SMILES string: RDKit
(embedding, MMFF94 optimisation, MMFF94 parameters) -> OpenMM native forces
(:func:`species_from_smiles`, :func:`add_species`), with OPLS-AA Lennard-Jones
terms between molecules by default (``VDW_MODEL``; MMFF94's own van der Waals
makes liquids far too light, see ``check_liquid_density.py``); charges are ESP fits to a
PySCF Hartree-Fock density (:func:`esp_fit`). Shared pieces (placement, PSF
writer, phase runner, trajectory writer) live in ``filmkit.py``.

Usage::

    python demo_traj/generate_doped.py --quick --out /tmp/doped_check   # small box, short run
    python demo_traj/generate_doped.py --measure                        # steps/s of the full box
    python demo_traj/generate_doped.py                                  # the committed film
    python demo_traj/generate_doped.py --guest-check                    # vacuum S1/T1 of the guest

Units: OpenMM works in nm, kJ/mol, ps; MMFF94 in Å, kcal/mol, md/Å (bond),
md Å/rad^2 (angle, out-of-plane); conversions are written out where used.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

from filmkit import (AVOGADRO, KCAL_TO_KJ, collect_frames, density_g_cm3, dihedral_deg, graph_distances,
                     place_molecules, run_schedule, write_psf, write_trajectory)

HERE = Path(__file__).resolve().parent
OUT = HERE / "doped"
STEM = "doped_film"
SEED = 20261202
SCENARIO = "Thornbury green-emitter layer study (invented): host:guest emission layer"

# The two species. SMILES are written by hand from the structures.
SPECIES = {
    "host": {"resname": "HCZ", "label": "9-(4-cyanophenyl)-9H-carbazole, C19H12N2",
             "smiles": "N#Cc1ccc(cc1)-n1c2ccccc2c2ccccc21", "formula": {"C": 19, "H": 12, "N": 2}},
    "guest": {"resname": "GDA",
              "label": "10-[4-(4,6-diphenyl-1,3,5-triazin-2-yl)phenyl]-10H-phenoxazine, C33H22N4O",
              "smiles": "c1ccc(cc1)-c1nc(nc(n1)-c1ccccc1)-c1ccc(cc1)N1c2ccccc2Oc2ccccc21",
              "formula": {"C": 33, "H": 22, "N": 4, "O": 1}},
}
N_HOST, N_GUEST = 1400, 100                 # 1,500 molecules, 6.7 % guest by number
N_HOST_QUICK, N_GUEST_QUICK = 56, 4
N_FRAMES = 10

# Standard atomic weights (IUPAC 2021 abridged values), g/mol.
MASS = {"H": 1.008, "C": 12.011, "N": 14.007, "O": 15.999}
# MMFF94 unit conversions (Halgren, J. Comput. Chem. 17, 490 (1996)):
#   bond      E = 143.9325 kb/2 dr^2 (1 + cs dr + 7/12 cs^2 dr^2), kb in md/Å, dr in Å  -> kcal/mol
#   angle     E = 0.043844 ka/2 dtheta^2, dtheta in degrees; 0.043844 (180/pi)^2 = 143.9325 per rad^2
#   torsion   E = 1/2 [V1 (1 + cos phi) + V2 (1 - cos 2 phi) + V3 (1 + cos 3 phi)], kcal/mol
#   out-of-plane  E = 0.043844 koop/2 chi^2 (Wilson angle chi in degrees)
MDYN_A_TO_KCAL = 143.9325
MMFF_SCALE_14_COULOMB = 0.75               # MMFF94: 1-4 electrostatics scaled by 0.75, vdW unscaled
# ESP charges: Hartree-Fock/6-31G* (spherical d: the potential code takes spherical basis sets) with
# density fitting, PySCF; shell fit points
# (1.4-2.0 x vdW radii, Singh & Kollman) and the constrained fit of clusterlab.electrostatics.espfit.
ESP_BASIS = "6-31g*"
# MD settings
DT_PS = 0.004                               # 4 fs with hydrogen mass repartitioning and X-H constraints
HMR_H_MASS = 3.024                          # H mass after repartitioning (amu); the heavy atom gives 2.016
CUTOFF_NM = 0.9
START_DENSITY = 0.25                        # g/cm^3: random insertion of these flat molecules jams near 0.3
# Densification: the Monte Carlo barostat compresses a loose gas of these molecules far too slowly
# (measured: 0.25 -> 0.32 g/cm^3 in 10 ps at 600 K and 4000 bar), so the box is first shrunk
# directly: SHRINK_CYCLES cycles, each scaling the box and the molecular centroids (molecules move
# rigidly) by one common factor followed by a short minimisation, up to SHRINK_DENSITY; then MD
# with the barostat takes over. (MD steps at 600 K between the cycles made the run blow up at
# 4 fs, so there are none: SHRINK_STEPS = 0.)
SHRINK_DENSITY = 1.15                       # g/cm^3
SHRINK_CYCLES = 30
SHRINK_MIN_ITER = 20
SHRINK_STEPS = 0                            # MD steps per cycle
SHRINK_T_K = 600
# (phase, ps, T start K, T end K, P bar); --ps-scale and --wall-min shorten every length
SCHEDULE = [("hot", 4, 550, 550, 2000.0),            # hot, pressure kept up: settle after the shrink
            ("anneal", 16, 550, 300, 1000.0),      # linear cooling in 16 temperature steps, under pressure
            ("equilibrate", 6, 300, 300, 1.0)]
FRAME_PS = 1.0                              # production: N_FRAMES frames FRAME_PS apart, NPT 300 K, 1 bar


# --------------------------------------------------------------------------
# SMILES -> molecule with MMFF94 parameters
def species_from_smiles(key: str, smiles: str, resname: str, seed: int = SEED) -> dict:
    """One species: RDKit embedding + MMFF94 optimisation and its MMFF94 terms.

    Returns a dict with ``resname``, ``symbols``, ``names`` (element + running
    number), ``types`` (``M`` + MMFF94 numeric type), ``masses``, ``xyz_A``
    (MMFF94-optimised geometry), ``bonds`` / ``angles`` / ``dihedrals`` /
    ``impropers`` (0-based tuples, for the PSF) and ``terms`` (the parameters).
    """
    from rdkit import Chem
    from rdkit.Chem import AllChem

    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    if AllChem.EmbedMolecule(mol, randomSeed=seed) != 0:
        raise RuntimeError(f"RDKit could not embed {key} ({smiles})")
    props = AllChem.MMFFGetMoleculeProperties(mol)
    if props is None:
        raise RuntimeError(f"MMFF94 has no parameters for {key} ({smiles})")
    if AllChem.MMFFOptimizeMolecule(mol, maxIters=20000) != 0:
        raise RuntimeError(f"MMFF94 optimisation of {key} did not converge")
    ff = AllChem.MMFFGetMoleculeForceField(mol, props)
    xyz = np.array(mol.GetConformer().GetPositions(), dtype=float)
    symbols = [a.GetSymbol() for a in mol.GetAtoms()]
    count: dict[str, int] = {}
    names = []
    for s in symbols:
        count[s] = count.get(s, 0) + 1
        names.append(f"{s}{count[s]}")
    nbr = [[n.GetIdx() for n in a.GetNeighbors()] for a in mol.GetAtoms()]
    bonds, angles, torsions, oops = [], [], [], []
    for b in mol.GetBonds():
        i, j = b.GetBeginAtomIdx(), b.GetEndAtomIdx()
        _, kb, r0 = props.GetMMFFBondStretchParams(mol, i, j)
        bonds.append((i, j, float(r0), float(kb)))
    theta0 = {}
    for c in range(len(symbols)):
        for ia in range(len(nbr[c])):
            for ib in range(ia + 1, len(nbr[c])):
                a, b_ = nbr[c][ia], nbr[c][ib]
                _, ka, th = props.GetMMFFAngleBendParams(mol, a, c, b_)
                angles.append((a, c, b_, float(th), float(ka)))
                theta0[(a, c, b_)] = theta0[(b_, c, a)] = float(th)
    for j, k, *_ in bonds:
        for i in nbr[j]:
            for l in nbr[k]:
                if i in (j, k) or l in (j, k) or i == l:
                    continue
                if theta0[(i, j, k)] > 170 or theta0[(j, k, l)] > 170:
                    continue                       # no torsion about a linear centre (MMFF94 rule)
                p = props.GetMMFFTorsionParams(mol, i, j, k, l)
                if p is None:
                    continue
                torsions.append((i, j, k, l, float(p[1]), float(p[2]), float(p[3])))
    for c in range(len(symbols)):
        if len(nbr[c]) == 3:
            a, b_, d = nbr[c]
            koop = props.GetMMFFOopBendParams(mol, a, c, b_, d)
            if koop:
                oops.append((a, b_, c, d, float(koop)))
    vdw = []
    for i in range(len(symbols)):
        r_star, eps = props.GetMMFFVdWParams(i, i)[:2]
        vdw.append((float(r_star), float(eps)))
    return {
        "key": key, "resname": resname, "smiles": smiles, "symbols": symbols, "names": names,
        "types": [f"M{props.GetMMFFAtomType(i)}" for i in range(len(symbols))],
        "masses": [MASS[s] for s in symbols], "xyz_A": xyz, "neighbours": nbr,
        "mmff_energy_kcal": float(ff.CalcEnergy()),
        "bonds": [b[:2] for b in bonds], "angles": [a[:3] for a in angles],
        "dihedrals": [t[:4] for t in torsions], "impropers": [o[:4] for o in oops],
        "terms": {"bonds": bonds, "angles": angles, "torsions": torsions, "oops": oops, "vdw": vdw},
    }


# --------------------------------------------------------------------------
# ESP charges
def esp_fit(sp: dict, cache: Path | None) -> dict:
    """ESP charges (e, total 0) of one species at its MMFF94 geometry, with diagnostics.

    HF/6-31G* (spherical d), density fitting for the SCF only; potential of the
    density on the shell points and the constrained least-squares fit of
    ``clusterlab.qm.esp.esp_charges`` / ``clusterlab.electrostatics.espfit``.
    ``dipole_qm_D`` is the dipole of the same HF density (nuclei + electrons),
    ``dipole_fit_D`` the dipole of the fitted charges. Cached in ``cache`` by
    species, basis and geometry.
    """
    key = hashlib.sha1(json.dumps([sp["smiles"], ESP_BASIS, np.round(sp["xyz_A"], 4).tolist()]).encode()
                       ).hexdigest()[:16]
    store = json.loads(cache.read_text()) if cache is not None and cache.exists() else {}
    if key in store:
        return store[key]
    from pyscf import gto, scf

    sys.path.insert(0, str(HERE.parent))
    from clusterlab.qm.esp import esp_charges

    t0 = time.perf_counter()
    mol = gto.M(atom=list(zip(sp["symbols"], sp["xyz_A"].tolist())), basis=ESP_BASIS, cart=False,
                unit="Angstrom", verbose=0, max_memory=4000)
    mf = scf.RHF(mol).density_fit().run(conv_tol=1e-8)
    if not mf.converged:
        raise RuntimeError(f"HF/{ESP_BASIS} SCF of {sp['key']} did not converge")
    fit = esp_charges(mol, mf.make_rdm1(), grid="shells", total_charge=0.0)
    q = np.round(fit.charges_e, 6)
    q[int(np.argmax(np.abs(q)))] -= q.sum()                 # exactly neutral after rounding
    rec = {"charges_e": q.tolist(), "n_points": int(len(fit.points_A)), "rrms": float(fit.rrms),
           "energy_Eh": float(mf.e_tot), "nao": int(mol.nao_nr()),
           "dipole_fit_D": fit.dipole_fit_D.tolist(), "dipole_qm_D": fit.dipole_qm_D.tolist(),
           "wall_s": round(time.perf_counter() - t0, 1),
           "method": f"RHF/{ESP_BASIS} (spherical d), density-fitted SCF (PySCF default auxiliary basis), "
                     "exact three-centre potential integrals; shell points and fit of clusterlab.electrostatics.espfit"}
    if cache is not None:
        store[key] = rec
        cache.write_text(json.dumps(store))
    return rec


# --------------------------------------------------------------------------
# OpenMM system
def kj(kcal: float) -> float:
    return kcal * KCAL_TO_KJ


def lj_sigma_eps(sp: dict) -> list[tuple[float, float]]:
    """Lennard-Jones (sigma nm, epsilon kJ/mol) per atom from MMFF94's buffered 14-7 R*, eps.

    An approximation: the 12-6 curve is given the 14-7 curve's minimum position
    R* (sigma = R*/2^(1/6)) and depth eps of the like-atom pair; unlike pairs use
    OpenMM's Lorentz-Berthelot rule instead of MMFF94's own combining rule.
    """
    return [(r / 2 ** (1 / 6) / 10.0, kj(e)) for r, e in sp["terms"]["vdw"]]


def liquid_lj(sp: dict) -> list[tuple[float, float]]:
    """Lennard-Jones (sigma nm, epsilon kJ/mol) per atom from ``LIQUID_LJ`` by MMFF94 type.

    H atoms take ``HA`` on an aromatic carbon and ``HC`` on an sp3 carbon. An
    MMFF type without an entry is a ``KeyError`` that names it (add a row).
    """
    out = []
    for i, t in enumerate(sp["types"]):
        num = int(t[1:])
        if sp["symbols"][i] == "H":
            (c,) = sp["neighbours"][i]
            kind = {"CA": "HA", "CT": "HC"}.get(MMFF_TO_LIQUID.get(int(sp["types"][c][1:]), ""))
        else:
            kind = MMFF_TO_LIQUID.get(num)
        if kind is None:
            raise KeyError(f"{sp['key']} atom {sp['names'][i]} (MMFF type {t}) has no LIQUID_LJ type; "
                           f"known MMFF types: {sorted(MMFF_TO_LIQUID)} and H on them")
        sig_A, eps_kcal = LIQUID_LJ[kind]
        out.append((sig_A / 10.0, kj(eps_kcal)))
    return out


# van der Waals models of the route (see the README of demo_traj/doped for the density check):
#   "lj-lb"     Lennard-Jones 12-6 from each atom's like-pair MMFF94 R*, eps; unlike pairs by Lorentz-Berthelot
#               (OpenMM NonbondedForce; the route of the first doped film)
#   "lj-mmff"   Lennard-Jones 12-6 with the R*_ij, eps_ij of MMFF94's own combining rule for every pair
#   "mmff-14-7" MMFF94's buffered 14-7 with its own combining rule (Halgren, J. Am. Chem. Soc. 114, 7827 (1992))
#   "lj-liquid" Lennard-Jones 12-6 between molecules from a condensed-phase table (OPLS-AA values by MMFF atom
#               type, LIQUID_LJ); inside a molecule every pair keeps "lj-lb" (NonbondedForce exceptions with
#               full Coulomb beyond 1-4), so one molecule alone has the same energy surface as with "lj-lb"
#               (the MMFF torsions and the guest's D-A twist go with it); Lorentz-Berthelot; NonbondedForce
# "lj-mmff" and "mmff-14-7" are a CustomNonbondedForce over MMFF atom-type pairs (same cutoff, long-range
# correction), their 1-4 pairs a CustomBondForce.
VDW_MODELS = {
    "lj-lb": None,
    "lj-liquid": None,
    "lj-mmff": "eps*((rs/r)^12 - 2*(rs/r)^6)",
    "mmff-14-7": "eps*(1.07*rs/(r + 0.07*rs))^7*(1.12*rs^7/(r^7 + 0.12*rs^7) - 2)",
}
VDW_DESCRIPTION = {
    "lj-lb": "Lennard-Jones 12-6 with sigma = R*/2^(1/6) and epsilon = eps of MMFF's buffered 14-7 like-pair "
             "(same minimum position and depth; approximation); Lorentz-Berthelot for unlike pairs",
    "lj-liquid": "between molecules: Lennard-Jones 12-6 of OPLS-AA atom types (sigma_A, epsilon_kcal; values "
                 "from memory), Lorentz-Berthelot; inside a molecule (1-4 and beyond): the MMFF-mapped 12-6 of "
                 "lj-lb (intramolecular_sigma_A, intramolecular_epsilon_kcal), 1-4 unscaled",
    "lj-mmff": "Lennard-Jones 12-6 with each pair's R*_ij, eps_ij from MMFF94's combining rule",
    "mmff-14-7": "MMFF94 buffered 14-7 with MMFF94's combining rule (RDKit's pair parameters)",
}
VDW_MODEL = "lj-liquid"          # the route's default since the liquid-density check (doped/README.md)
# Lennard-Jones (sigma Å, epsilon kcal/mol) of "lj-liquid", OPLS-AA atom types (Jorgensen, Maxwell,
# Tirado-Rives, J. Am. Chem. Soc. 118, 11225 (1996) and the OPLS-AA papers it builds on; values from
# memory), fitted to liquid densities and heats of vaporisation; keyed by OPLS-AA type name.
LIQUID_LJ = {
    "CA": (3.55, 0.070),    # aromatic C (benzene, also 5-ring aromatic C)
    "HA": (2.42, 0.030),    # H on aromatic C
    "CT": (3.50, 0.066),    # sp3 C
    "HC": (2.50, 0.030),    # H on sp3 C
    "CZ": (3.30, 0.066),    # nitrile C
    "NZ": (3.20, 0.170),    # nitrile N
    "NB": (3.25, 0.170),    # aromatic N, 6-ring (pyridine, triazine)
    "NA": (3.25, 0.170),    # aromatic N with three bonds (pyrrole, carbazole)
    "NT": (3.30, 0.170),    # amine N (also a tri-aryl amine N)
    "OS": (2.90, 0.140),    # ether O (also aryl ether)
}
# MMFF94 numeric atom type -> OPLS-AA type of LIQUID_LJ (H by the type of its carbon)
MMFF_TO_LIQUID = {1: "CT", 37: "CA", 63: "CA", 64: "CA", 4: "CZ", 42: "NZ", 38: "NB", 39: "NA", 40: "NT",
                  6: "OS"}


def mmff_pair_table(species: list[dict]) -> tuple[dict[str, int], np.ndarray, np.ndarray]:
    """MMFF94 van der Waals R*_ij (nm) and eps_ij (kJ/mol) for every pair of MMFF atom types present.

    RDKit types one molecule holding a copy of each distinct species (MMFF typing
    is local, so the types equal each species' own) and gives each pair's
    parameters by MMFF94's combining rule, donor-acceptor scaling included
    (``GetMMFFVdWParams``, the scaled pair). Returns the type -> class index
    map and the (n, n) tables.
    """
    from rdkit import Chem
    from rdkit.Chem import AllChem

    distinct = list({sp["smiles"]: sp for sp in species}.values())
    mol = Chem.AddHs(Chem.MolFromSmiles(distinct[0]["smiles"]))
    for sp in distinct[1:]:
        mol = Chem.CombineMols(mol, Chem.AddHs(Chem.MolFromSmiles(sp["smiles"])))
    props = AllChem.MMFFGetMoleculeProperties(mol)
    types = [t for sp in distinct for t in sp["types"]]
    if [f"M{props.GetMMFFAtomType(i)}" for i in range(mol.GetNumAtoms())] != types:
        raise RuntimeError("MMFF94 typing of the combined species differs from the species' own")
    first = {}
    for i, t in enumerate(types):
        first.setdefault(t, i)
    classes = {t: k for k, t in enumerate(first)}
    n = len(classes)
    r_nm, eps_kj = np.zeros((n, n)), np.zeros((n, n))
    for ta, a in first.items():
        for tb, b in first.items():
            p = props.GetMMFFVdWParams(a, b)
            r_nm[classes[ta], classes[tb]] = p[2] / 10.0
            eps_kj[classes[ta], classes[tb]] = kj(p[3])
    return classes, r_nm, eps_kj


def new_system(box_nm: float, vdw: str = VDW_MODEL, species: list[dict] | None = None):
    """Empty periodic OpenMM system and its forces (bond, angle, torsion, PME nonbonded, vdW).

    ``vdw`` is a key of ``VDW_MODELS``; the custom models need ``species``
    (every species that will be added) for their pair table.
    """
    import openmm as mm
    import openmm.unit as u

    if vdw not in VDW_MODELS:
        raise ValueError(f"vdw model {vdw!r} unknown; choose one of {sorted(VDW_MODELS)}")
    system = mm.System()
    system.setDefaultPeriodicBoxVectors(mm.Vec3(box_nm, 0, 0), mm.Vec3(0, box_nm, 0), mm.Vec3(0, 0, box_nm))
    forces = {"bond": mm.HarmonicBondForce(), "angle": mm.HarmonicAngleForce(),
              "torsion": mm.PeriodicTorsionForce(), "nonbonded": mm.NonbondedForce()}
    nb = forces["nonbonded"]
    nb.setNonbondedMethod(mm.NonbondedForce.PME)
    nb.setCutoffDistance(CUTOFF_NM * u.nanometer)
    nb.setEwaldErrorTolerance(5e-4)
    nb.setUseDispersionCorrection(True)                    # isotropic tail correction (common practice)
    if VDW_MODELS[vdw] is not None:
        if not species:
            raise ValueError(f"vdw model {vdw!r} needs the species list for its pair table")
        classes, r_nm, eps_kj = mmff_pair_table(species)
        n = len(classes)
        expr = VDW_MODELS[vdw]
        pair = mm.CustomNonbondedForce(f"{expr}; rs = rtab(c1, c2); eps = etab(c1, c2)")
        pair.addPerParticleParameter("c")
        pair.addTabulatedFunction("rtab", mm.Discrete2DFunction(n, n, r_nm.T.ravel().tolist()))
        pair.addTabulatedFunction("etab", mm.Discrete2DFunction(n, n, eps_kj.T.ravel().tolist()))
        pair.setNonbondedMethod(mm.CustomNonbondedForce.CutoffPeriodic)
        pair.setCutoffDistance(CUTOFF_NM * u.nanometer)
        pair.setUseLongRangeCorrection(True)                # same isotropic tail correction
        near = mm.CustomBondForce(expr)                      # 1-4 pairs, unscaled (MMFF94)
        near.addPerBondParameter("rs")
        near.addPerBondParameter("eps")
        forces.update({"vdw": pair, "vdw14": near})
        forces["vdw_table"] = (classes, r_nm, eps_kj)
    for f in forces.values():
        if isinstance(f, mm.Force):
            system.addForce(f)
    forces["model"] = vdw
    return system, forces


def add_species(system, forces: dict, sp: dict, charges_e: list[float], hmr: bool = True) -> None:
    """Append one molecule of species ``sp`` (MMFF94-derived terms) to an OpenMM system.

    * bonds: harmonic about MMFF r0, k = 143.9325 kb kcal/mol/Å^2 (OpenMM's
      ``k/2 dr^2`` is MMFF's quadratic term; its cubic/quartic terms are dropped);
      X-H bonds are constraints at r0.
    * angles: harmonic about MMFF theta0, k = 143.9325 ka kcal/mol/rad^2 (also
      for the linear nitrile angle, where MMFF uses 143.9325 ka (1 + cos theta),
      the same curvature at 180 deg); MMFF stretch-bend terms are dropped.
    * torsions: MMFF V1..V3 as ``k (1 + cos(n phi - delta))``: V1/2 (n 1, delta 0),
      V2/2 (n 2, delta 180), V3/2 (n 3, delta 0).
    * out-of-plane: the three MMFF Wilson-angle terms of a trivalent centre are
      replaced by one improper torsion ``k (1 - cos 2 phi)`` with the same
      small-angle curvature when phi is taken equal to chi (an approximation):
      2 k = 3 x 143.9325 koop / 2.
    * nonbonded: ESP charges; 1-2 and 1-3 pairs excluded; 1-4 Coulomb x 0.75,
      1-4 van der Waals unscaled (MMFF94). van der Waals by ``forces["model"]``
      (``VDW_MODELS``): ``lj-lb`` LJ from :func:`lj_sigma_eps`; ``lj-liquid``
      :func:`liquid_lj` between molecules and :func:`lj_sigma_eps` for every pair
      inside the molecule (exceptions, full Coulomb beyond 1-4); the custom
      models from the MMFF94 pair table (:func:`mmff_pair_table`), 1-4 pairs in
      a CustomBondForce.
    * hydrogen mass repartitioning: each H gets 3.024 amu, its heavy atom 2.016 less.
    """
    off = system.getNumParticles()
    terms = sp["terms"]
    masses = list(sp["masses"])
    if hmr:
        for i, j, *_ in terms["bonds"]:
            for h, heavy in ((i, j), (j, i)):
                if sp["symbols"][h] == "H":
                    masses[heavy] -= HMR_H_MASS - masses[h]
                    masses[h] = HMR_H_MASS
    custom = "vdw" in forces
    split = forces.get("model") == "lj-liquid"               # intramolecular pairs keep the MMFF-mapped LJ
    lj14 = lj_sigma_eps(sp)                                  # 1-4 pairs of the LJ models
    lj = [(0.1, 0.0)] * len(masses) if custom else (liquid_lj(sp) if split else lj14)
    nb = forces["nonbonded"]
    for i, m in enumerate(masses):
        system.addParticle(m)
        nb.addParticle(float(charges_e[i]), lj[i][0], lj[i][1])
    if custom:
        classes, r_nm, eps_kj = forces["vdw_table"]
        cls = [classes[t] for t in sp["types"]]
        for c in cls:
            forces["vdw"].addParticle([float(c)])
    for i, j, r0, kb in terms["bonds"]:
        if "H" in (sp["symbols"][i], sp["symbols"][j]):
            system.addConstraint(off + i, off + j, r0 / 10.0)
        else:
            forces["bond"].addBond(off + i, off + j, r0 / 10.0, kj(MDYN_A_TO_KCAL * kb) * 100.0)
    for a, c, b, th, ka in terms["angles"]:
        forces["angle"].addAngle(off + a, off + c, off + b, np.radians(th), kj(MDYN_A_TO_KCAL * ka))
    tor = forces["torsion"]
    for i, j, k, l, v1, v2, v3 in terms["torsions"]:
        for n, v, phase in ((1, v1, 0.0), (2, v2, np.pi), (3, v3, 0.0)):
            if v != 0.0:
                tor.addTorsion(off + i, off + j, off + k, off + l, n, phase, kj(v / 2))
    for a, b, c, d, koop in terms["oops"]:
        tor.addTorsion(off + a, off + b, off + c, off + d, 2, np.pi, kj(3 * MDYN_A_TO_KCAL * koop / 4))
    n = len(masses)
    gd = graph_distances(n, sp["bonds"])
    for i in range(n):
        for j in range(i + 1, n):
            if gd[i, j] <= 2:
                nb.addException(off + i, off + j, 0.0, 1.0, 0.0)
            elif gd[i, j] == 3:
                nb.addException(off + i, off + j, MMFF_SCALE_14_COULOMB * charges_e[i] * charges_e[j],
                                0.5 * (lj14[i][0] + lj14[j][0]), 0.0 if custom else np.sqrt(lj14[i][1] * lj14[j][1]))
                if custom:
                    forces["vdw14"].addBond(off + i, off + j, [r_nm[cls[i], cls[j]], eps_kj[cls[i], cls[j]]])
            elif split:                                          # full Coulomb, MMFF-mapped LJ (Lorentz-Berthelot)
                nb.addException(off + i, off + j, charges_e[i] * charges_e[j],
                                0.5 * (lj14[i][0] + lj14[j][0]), np.sqrt(lj14[i][1] * lj14[j][1]))
            if custom and gd[i, j] <= 3:
                forces["vdw"].addExclusion(off + i, off + j)


def shrink_box(ctx, integ, starts: np.ndarray, sizes: np.ndarray, total_mass: float, target_g_cm3: float,
               cycles: int, min_iter: int, steps: int) -> list[float]:
    """Compress the box to ``target_g_cm3`` by rescaling it and the molecular centroids in ``cycles`` steps.

    Molecules (atoms ``starts[m]`` .. ``starts[m] + sizes[m] - 1``, kept whole by
    OpenMM's unwrapped positions) move rigidly with their centroid; after each
    rescaling a short minimisation (``min_iter`` iterations) removes the new
    contacts and ``steps`` MD steps follow. Returns the density after each cycle.
    """
    import openmm as mm
    import openmm.unit as u

    mol_of_atom = np.repeat(np.arange(len(starts)), sizes)
    out = []
    for c in range(cycles):
        st = ctx.getState(getPositions=True)
        pos = st.getPositions(asNumpy=True).value_in_unit(u.nanometer)
        L = st.getPeriodicBoxVectors(asNumpy=True).value_in_unit(u.nanometer)[0][0]
        dens = density_g_cm3(total_mass, np.array([L, L, L]))
        f = (dens / target_g_cm3) ** (1.0 / (3 * (cycles - c)))
        cen = np.zeros((len(starts), 3))
        np.add.at(cen, mol_of_atom, pos)
        cen /= sizes[:, None]
        pos = pos + (f - 1.0) * cen[mol_of_atom]
        ctx.setPeriodicBoxVectors(mm.Vec3(L * f, 0, 0), mm.Vec3(0, L * f, 0), mm.Vec3(0, 0, L * f))
        ctx.setPositions(pos * u.nanometer)
        mm.LocalEnergyMinimizer.minimize(ctx, 10.0, min_iter)
        if steps:
            integ.step(steps)
        out.append(round(density_g_cm3(total_mass, np.array([L * f] * 3)), 4))
    return out


def build_system(species: list[dict], charges: dict, box_nm: float, vdw: str = VDW_MODEL):
    """OpenMM system of the molecules in ``species`` (one record per molecule, file order)."""
    system, forces = new_system(box_nm, vdw, species)
    for sp in species:
        add_species(system, forces, sp, charges[sp["key"]])
    return system


# --------------------------------------------------------------------------
def guest_torsions(sp: dict) -> dict:
    """Atom quadruples (0-based) of the guest's donor-acceptor torsions.

    ``donor``: C(phenoxazine)-N-C(phenylene)-C(phenylene), about the N-aryl bond;
    ``acceptor``: C(phenylene)-C(phenylene)-C(triazine)-N(triazine).
    """
    sym, nbr = sp["symbols"], sp["neighbours"]
    gd = graph_distances(len(sym), sp["bonds"])
    o = sym.index("O")
    n_d = next(i for i, s in enumerate(sym) if s == "N" and len(nbr[i]) == 3)     # the amine N
    c_pxz = next(c for c in nbr[n_d] if gd[c, o] == 2)                            # phenoxazine C next to N
    c_ph = next(c for c in nbr[n_d] if gd[c, o] > 2)                              # phenylene C on N
    c_ph2 = next(x for x in nbr[c_ph] if x != n_d)
    trz = [i for i, s in enumerate(sym) if s == "C" and sum(sym[x] == "N" for x in nbr[i]) == 2]
    c_trz = min(trz, key=lambda i: gd[i, n_d])                                    # triazine C on the phenylene
    c_para = next(x for x in nbr[c_trz] if sym[x] == "C")
    c_para2 = next(x for x in nbr[c_para] if x != c_trz)
    n_trz = next(x for x in nbr[c_trz] if sym[x] == "N")
    return {"donor": [c_pxz, n_d, c_ph, c_ph2], "acceptor": [c_para2, c_para, c_trz, n_trz]}


def twist_deg(phi_deg: np.ndarray) -> np.ndarray:
    """Twist away from coplanar rings, 0..90 deg (a ring torsion phi and 180 - phi are the same twist)."""
    a = np.abs(phi_deg)
    return np.minimum(a, 180.0 - a)


def whole(pos: np.ndarray, box: np.ndarray, first: np.ndarray) -> np.ndarray:
    """Positions (n_frames, n_atoms, 3) made whole per molecule: minimum image from each molecule's first atom."""
    out = pos.copy()
    for f in range(len(pos)):
        ref = pos[f, first]
        d = pos[f] - ref
        d -= box[f, :3] * np.round(d / box[f, :3])
        out[f] = ref + d
    return out


def guest_check(sp: dict) -> dict:
    """Vacuum S1/T1 of the guest at its MMFF94 geometry, clusterlab's ``fast-refined`` preset."""
    sys.path.insert(0, str(HERE.parent))
    from clusterlab import Cluster, Method, excitations

    t0 = time.perf_counter()
    r = excitations(Cluster.from_arrays(sp["symbols"], sp["xyz_A"]), Method.preset("fast-refined"),
                    vacuum=False)
    s1, t1 = r.s1, r.t1
    return {"method": "fast-refined preset (B3LYP/6-31G, DF, sTDA refined by two full-TDA subspace steps)",
            "geometry": "MMFF94-optimised (the force field's reference geometry)", "environment": "none (vacuum)",
            "S1_eV": round(s1.energy_eV, 4), "T1_eV": round(t1.energy_eV, 4),
            "dEST_eV": round(r.delta_est_eV, 4), "S1_osc": round(s1.osc_strength, 5),
            "S1_ct_distance_A": round(s1.ct_distance_A, 3), "T1_ct_distance_A": round(t1.ct_distance_A, 3),
            "converged": bool(r.converged), "wall_s": round(time.perf_counter() - t0, 1),
            "threads": os.environ.get("OMP_NUM_THREADS", "")}


# --------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small box and a 20x shorter schedule")
    ap.add_argument("--measure", action="store_true", help="only measure MD steps/s of the full box")
    ap.add_argument("--guest-check", action="store_true",
                    help="vacuum excitation check of the guest; merged into OUT/build_record.json")
    ap.add_argument("--ps-scale", type=float, default=1.0, help="multiply every phase length")
    ap.add_argument("--wall-min", type=float, default=None,
                    help="fit the schedule to this many minutes of MD: after measuring steps/s on the "
                         "full system, shorten every phase by one common factor (at most 1)")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--vdw", choices=sorted(VDW_MODELS), default=VDW_MODEL,
                    help="van der Waals model (see VDW_MODELS; the first committed film used lj-lb)")
    ap.add_argument("--out", type=Path, default=OUT)
    ap.add_argument("--esp-cache", type=Path,
                    default=Path(os.environ.get("TMPDIR", "/tmp")) / "clusterlab_doped_esp.json")
    args = ap.parse_args(argv)
    os.environ.setdefault("OMP_NUM_THREADS", str(args.threads))
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    sps = {k: species_from_smiles(k, v["smiles"], v["resname"]) for k, v in SPECIES.items()}
    if args.guest_check:
        rec_path = args.out / "build_record.json"
        res = guest_check(sps["guest"])
        print(json.dumps(res, indent=1))
        rec = json.loads(rec_path.read_text()) if rec_path.exists() else {}
        rec["guest_check"] = res
        args.out.mkdir(parents=True, exist_ok=True)
        rec_path.write_text(json.dumps(rec, indent=1) + "\n")
        return 0

    import openmm as mm
    import openmm.unit as u

    esp = {}
    for k, sp in sps.items():
        t0 = time.perf_counter()
        esp[k] = esp_fit(sp, args.esp_cache)
        timings[f"esp_{k}_s"] = time.perf_counter() - t0
        print(f"  ESP {k}: rrms {esp[k]['rrms']:.3f}, |mu| fit {np.linalg.norm(esp[k]['dipole_fit_D']):.2f} D, "
              f"QM {np.linalg.norm(esp[k]['dipole_qm_D']):.2f} D ({esp[k]['wall_s']} s)", flush=True)
    charges = {k: esp[k]["charges_e"] for k in sps}

    n_host, n_guest = (N_HOST_QUICK, N_GUEST_QUICK) if args.quick else (N_HOST, N_GUEST)
    molecules = [sps["host"]] * n_host + [sps["guest"]] * n_guest
    total_mass = sum(sum(sp["masses"]) for sp in molecules)
    box0_nm = (total_mass / AVOGADRO / START_DENSITY * 1e21) ** (1 / 3)
    rng = np.random.default_rng(SEED)
    order = rng.permutation(len(molecules))                # insert in random order (guests spread out)
    t0 = time.perf_counter()
    placed = place_molecules([molecules[i]["xyz_A"] for i in order], box0_nm * 10, rng)
    sizes = np.array([len(molecules[i]["names"]) for i in order])
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    pos_A = np.empty_like(placed)                          # back to file order (hosts, then guests)
    file_starts = np.concatenate([[0], np.cumsum([len(sp["names"]) for sp in molecules])[:-1]])
    for slot, i in enumerate(order):
        pos_A[file_starts[i]:file_starts[i] + sizes[slot]] = placed[starts[slot]:starts[slot] + sizes[slot]]
    timings["placement_s"] = time.perf_counter() - t0
    print(f"  placed {len(molecules)} molecules ({len(pos_A)} atoms) in a {box0_nm * 10:.1f} Å box "
          f"({START_DENSITY} g/cm^3) in {timings['placement_s']:.0f} s", flush=True)

    system = build_system(molecules, charges, box0_nm, vdw=args.vdw)
    baro = mm.MonteCarloBarostat(1.0 * u.bar, 300 * u.kelvin, 25)
    baro.setRandomNumberSeed(SEED % 2 ** 31)
    system.addForce(baro)
    integ = mm.LangevinMiddleIntegrator(300 * u.kelvin, 1.0 / u.picosecond, DT_PS * u.picoseconds)
    integ.setRandomNumberSeed(SEED % 2 ** 31)
    ctx = mm.Context(system, integ, mm.Platform.getPlatformByName("CPU"), {"Threads": str(args.threads)})
    ctx.setPositions(pos_A / 10.0 * u.nanometer)
    t0 = time.perf_counter()
    mm.LocalEnergyMinimizer.minimize(ctx, 10.0, 150)      # loose start without overlaps: a short relief
    timings["minimise_s"] = time.perf_counter() - t0
    ctx.setVelocitiesToTemperature(SCHEDULE[0][2] * u.kelvin, SEED % 2 ** 31)
    integ.setTemperature(SCHEDULE[0][2] * u.kelvin)
    t0 = time.perf_counter()
    integ.step(100)
    steps_per_s = 100 / (time.perf_counter() - t0)
    print(f"  {steps_per_s:.2f} steps/s ({steps_per_s * DT_PS * 86400 / 1000:.1f} ns/day) "
          f"on {args.threads} threads, {len(pos_A)} atoms", flush=True)
    if args.measure:
        return 0

    t0 = time.perf_counter()
    integ.setTemperature(SHRINK_T_K * u.kelvin)
    ctx.setParameter(mm.MonteCarloBarostat.Pressure(), 4000.0)          # no expansion while shrinking
    ctx.setParameter(mm.MonteCarloBarostat.Temperature(), SHRINK_T_K)
    shrink_log = shrink_box(ctx, integ, file_starts, np.array([len(sp["names"]) for sp in molecules]),
                            total_mass, SHRINK_DENSITY, SHRINK_CYCLES, SHRINK_MIN_ITER,
                            SHRINK_STEPS)
    timings["shrink_s"] = time.perf_counter() - t0
    print(f"  shrunk to {shrink_log[-1]} g/cm^3 in {timings['shrink_s']:.0f} s", flush=True)
    ctx.setVelocitiesToTemperature(SCHEDULE[0][2] * u.kelvin, (SEED + 1) % 2 ** 31)
    prod_scale = 0.05 if args.quick else 1.0               # production frames stay FRAME_PS apart
    scale = prod_scale * args.ps_scale
    phases_ps, prod_ps = sum(ph[1] for ph in SCHEDULE), N_FRAMES * FRAME_PS * prod_scale
    if args.wall_min is not None:
        scale = min(scale, (args.wall_min * 60 * steps_per_s * DT_PS - prod_ps) / phases_ps)
    print(f"  phase scale {scale:.3f}: {phases_ps * scale:.1f} ps before production, {prod_ps:.1f} ps production",
          flush=True)
    log = run_schedule(ctx, integ, SCHEDULE, DT_PS, scale, total_mass, timings)
    t0 = time.perf_counter()
    steps_per_frame = max(10, int(round(FRAME_PS * prod_scale / DT_PS)))
    frames, boxes = collect_frames(ctx, integ, N_FRAMES, steps_per_frame)
    timings["production_s"] = time.perf_counter() - t0
    frame_ps = steps_per_frame * DT_PS
    np.savez(Path(os.environ.get("TMPDIR", "/tmp")) / "doped_film_frames.npz", frames=frames, boxes=boxes)
    md_wall = sum(v for k, v in timings.items() if not k.startswith(("esp_", "placement")))

    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    psf = out / f"{STEM}.psf"
    psf_mols = [dict(sp, charges=charges[sp["key"]]) for sp in molecules]
    write_psf(psf, psf_mols, ["host:guest emission layer demo film (invented scenario), clusterlab demo_traj",
                              "MMFF94-derived terms; charges HF/6-31G* ESP fits; see forcefield.json",
                              "written by demo_traj/generate_doped.py"])
    write_trajectory(psf, frames, boxes, frame_ps, out / f"{STEM}.xtc", out / f"{STEM}.pdb")

    # analysis of the frames
    dens = [density_g_cm3(total_mass, b[:3] / 10.0) for b in boxes]
    first = file_starts
    pos = whole(frames, boxes, np.repeat(first, [len(sp["names"]) for sp in molecules]))
    tq = guest_torsions(sps["guest"])
    g0 = first[n_host:]
    tw = {name: twist_deg(dihedral_deg(pos[:, g0[:, None] + np.array(idx)[None, :], :]))
          for name, idx in tq.items()}
    rec_path = out / "build_record.json"
    old = json.loads(rec_path.read_text()) if rec_path.exists() else {}
    record = {
        "scenario": SCENARIO, "quick": bool(args.quick), "seed": SEED,
        "composition": {k: {"resname": sps[k]["resname"], "label": SPECIES[k]["label"],
                            "smiles": SPECIES[k]["smiles"], "n_molecules": n,
                            "atoms_per_molecule": len(sps[k]["names"]),
                            "molar_mass_g_mol": round(sum(sps[k]["masses"]), 3)}
                        for k, n in (("host", n_host), ("guest", n_guest))},
        "molecule_order": "hosts first (ids 0..n_host-1), then guests; inserted at random positions in random order",
        "n_atoms": int(len(pos_A)), "n_frames": N_FRAMES, "frame_spacing_ps": frame_ps,
        "guest_fraction_by_number": round(n_guest / (n_host + n_guest), 4),
        "schedule_scale": round(scale, 4), "schedule": log, "production": {"ensemble": "NPT", "T_K": 300, "P_bar": 1.0,
                                        "ps": N_FRAMES * frame_ps},
        "start_density_g_cm3": START_DENSITY,
        "shrink": {"target_g_cm3": SHRINK_DENSITY, "cycles": SHRINK_CYCLES, "min_iter": SHRINK_MIN_ITER,
                   "md_steps_per_cycle": SHRINK_STEPS, "T_K": SHRINK_T_K, "density_after_cycle": shrink_log,
                   "wall_s": round(timings["shrink_s"], 1)},
        "density_g_cm3_production_mean": round(float(np.mean(dens)), 4),
        "density_g_cm3_production_range": [round(min(dens), 4), round(max(dens), 4)],
        "box_A_frame0": np.round(boxes[0][:3], 3).tolist(),
        "guest_torsions_atoms": tq,
        "guest_twist_deg": {k: {"mean": round(float(v.mean()), 2), "std": round(float(v.std()), 2),
                                "min": round(float(v.min()), 2), "max": round(float(v.max()), 2)}
                            for k, v in tw.items()},
        "steps_per_s_full_system": round(steps_per_s, 2),
        "timings_s": {k: round(v, 1) for k, v in timings.items()},
        "md_wall_s": round(md_wall, 1), "total_wall_s": round(time.perf_counter() - t_start, 1),
        "openmm_platform": "CPU", "threads": args.threads, "vdw_model": args.vdw,
        "versions": {"openmm": mm.__version__, "rdkit": _rdkit_version(), "numpy": np.__version__,
                     "python": sys.version.split()[0]},
        "wrapping": "every atom wrapped into [0, L) per frame; molecules are broken across box faces",
    }
    if "guest_check" in old:
        record["guest_check"] = old["guest_check"]
    ff = forcefield_record(sps, esp, args.vdw)
    (out / "forcefield.json").write_text(json.dumps(ff, indent=1) + "\n")
    rec_path.write_text(json.dumps(record, indent=1) + "\n")
    print(json.dumps({k: v for k, v in record.items() if k != "schedule"}, indent=1))
    return 0


def _rdkit_version() -> str:
    import rdkit

    return rdkit.__version__


def forcefield_record(sps: dict, esp: dict, vdw: str = VDW_MODEL) -> dict:
    """Every force-field number of the run with its source, per species."""
    out = {
        "description": "Force field of the clusterlab doped demo film (MMFF94-derived terms for OpenMM); "
                       "units as labelled.",
        "source": "MMFF94 parameters as assigned by RDKit (MMFFGetMoleculeProperties): Halgren, "
                  "J. Comput. Chem. 17, 490-519 (1996) and following papers",
        "functional_form": {
            "bond": "k/2 (r - r0)^2, k = 143.9325 kb kcal/mol/A^2 (MMFF quadratic term; cubic/quartic dropped)",
            "angle": "k/2 (theta - theta0)^2, k = 143.9325 ka kcal/mol/rad^2 (0.043844 (180/pi)^2 = 143.9325)",
            "stretch_bend": "omitted",
            "torsion": "sum_n k_n (1 + cos(n phi - delta_n)): k1 = V1/2 (0), k2 = V2/2 (180 deg), k3 = V3/2 (0); "
                       "none about linear centres",
            "out_of_plane": "one improper k (1 - cos 2 phi) per trivalent centre, 2k = 3 x 143.9325 koop/2 "
                            "(curvature of MMFF's three Wilson terms with phi taken as chi; approximation)",
            "vdw_model": vdw,
            "vdw": VDW_DESCRIPTION[vdw],
            "scale_14": {"coulomb": MMFF_SCALE_14_COULOMB, "lj": 1.0},
            "exclusions": "1-2 and 1-3 pairs",
            "electrostatics": "plain Coulomb with ESP charges (MMFF's own bond-increment charges and "
                              "distance-buffered Coulomb are not used)"},
        "md": {"electrostatics": f"PME, cutoff {CUTOFF_NM} nm, Ewald tolerance 5e-4",
               "lj": f"cutoff {CUTOFF_NM} nm, long-range dispersion correction",
               "constraints": "X-H bonds at MMFF r0", "timestep_fs": DT_PS * 1000,
               "hydrogen_mass_repartitioning": f"H {HMR_H_MASS} amu, taken from the bonded heavy atom",
               "integrator": "Langevin middle, friction 1/ps", "barostat": "Monte Carlo, isotropic, every 25 steps"},
        "species": {},
    }
    for k, sp in sps.items():
        t = sp["terms"]
        nm = sp["names"]
        lj_mmff = lj_sigma_eps(sp)
        lj = liquid_lj(sp) if vdw == "lj-liquid" else lj_mmff
        out["species"][k] = {
            "resname": sp["resname"], "smiles": sp["smiles"], "label": SPECIES[k]["label"],
            "geometry": "RDKit ETKDG embedding (seed %d), MMFF94 optimisation" % SEED,
            "mmff_energy_kcal": round(sp["mmff_energy_kcal"], 4),
            "reference_geometry_A": np.round(sp["xyz_A"], 5).tolist(),
            "atoms": [{"name": nm[i], "element": sp["symbols"][i], "type": sp["types"][i],
                       "mass_amu": sp["masses"][i], "charge_e": esp[k]["charges_e"][i],
                       "mmff_R_star_A": round(t["vdw"][i][0], 5), "mmff_eps_kcal": round(t["vdw"][i][1], 6),
                       "sigma_A": round(lj[i][0] * 10, 5), "epsilon_kcal": round(lj[i][1] / KCAL_TO_KJ, 6),
                       "intramolecular_sigma_A": round(lj_mmff[i][0] * 10, 5),
                       "intramolecular_epsilon_kcal": round(lj_mmff[i][1] / KCAL_TO_KJ, 6)}
                      for i in range(len(nm))],
            "charges_source": {k2: v for k2, v in esp[k].items() if k2 != "charges_e"},
            "bonds": [{"atoms": [nm[i], nm[j]], "r0_A": round(r0, 4), "kb_md_A": kb} for i, j, r0, kb in t["bonds"]],
            "angles": [{"atoms": [nm[a], nm[c], nm[b]], "theta0_deg": round(th, 3), "ka_md_A_rad2": ka}
                       for a, c, b, th, ka in t["angles"]],
            "torsions": [{"atoms": [nm[i], nm[j], nm[kk], nm[l]], "V_kcal": [v1, v2, v3]}
                         for i, j, kk, l, v1, v2, v3 in t["torsions"]],
            "out_of_plane": [{"atoms": [nm[a], nm[b], nm[c], nm[d]], "centre": nm[c], "koop_md_A_rad2": ko}
                             for a, b, c, d, ko in t["oops"]],
        }
    return out


if __name__ == "__main__":
    raise SystemExit(main())
