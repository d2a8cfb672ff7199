#!/usr/bin/env python
"""Generate the demo film: an amorphous 2,2'-bithiophene film from a short OpenMM run.

Scenario (invented): the "Larkspur hole-transport interlayer study" wants a thin
vapour-deposited-like layer of 2,2'-bithiophene (C8H6S2) under a model anode.
This script builds that layer as a small periodic box, runs a short molecular-
dynamics schedule and writes

* ``bithiophene_film.psf``  topology: charges, masses, bonds, angles, dihedrals,
  impropers, one residue ``BTH`` per molecule (CHARMM/X-PLOR PSF, standard
  column layout, written here by hand);
* ``bithiophene_film.xtc``  20 production frames, every atom wrapped into the
  box (molecules are broken across the box faces, as plain MD output is);
* ``bithiophene_film.pdb``  frame 0 for molecular viewers;
* ``forcefield.json``       every force-field number used, with its source;
* ``build_record.json``     schedule, densities, box, timings, versions.

Only this script needs OpenMM (``pip install -e .[demo]``); clusterlab itself
never imports it. Run from anywhere: ``python demo_traj/generate_film.py``.
Options: ``--quick`` runs a very short schedule (for checking the script),
``--threads N`` sets the OpenMM CPU threads (default 2).

Units: OpenMM works in nm, kJ/mol, ps; the tables below are in the units of
their sources (Å, kcal/mol, degrees) and are converted once, where used.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

from filmkit import (AVOGADRO, KCAL_TO_KJ, collect_frames, density_g_cm3, dihedral_deg, graph_distances,
                     place_molecules, run_schedule, write_psf, write_trajectory)

HERE = Path(__file__).resolve().parent
STEM = "bithiophene_film"
SEED = 20240611                      # fixed seed: placement, velocities, thermostat, barostat
N_MOLECULES = 256
N_FRAMES = 20

# --------------------------------------------------------------------------
# Geometry of one thiophene ring (planar, C2v), from the microwave structure of
# thiophene: Bak, Christensen, Hansen-Nygaard, Rastrup-Andersen,
# J. Mol. Spectrosc. 7, 58 (1961) -- values from memory.
R_SC_A = 1.714          # S1-C2
R_CC_DOUBLE_A = 1.370   # C2=C3
R_CC_SINGLE_A = 1.423   # C3-C4
R_CH_A = 1.078          # C-H (mean of alpha/beta C-H, from memory)
ANG_CSC_DEG = 92.2      # C5-S1-C2
ANG_SCC_DEG = 111.5     # S1-C2-C3
# Inter-ring bond of 2,2'-bithiophene: gas electron diffraction,
# Samdal, Samuelsen, Volden, Synth. Met. 59, 259 (1993) -- from memory.
R_INTER_A = 1.456

# Atom order of one molecule (ring A then ring B, ring B = inversion image of A):
#  0 S1A 1 C2A 2 C3A 3 C4A 4 C5A 5 H3A 6 H4A 7 H5A, 8..15 the same for ring B.
NAMES = ["S1A", "C2A", "C3A", "C4A", "C5A", "H3A", "H4A", "H5A",
         "S1B", "C2B", "C3B", "C4B", "C5B", "H3B", "H4B", "H5B"]
ELEMENTS = [n[0] for n in NAMES]
# Own type names: SR ring S, CJ junction C (C2), CB beta C (C3, C4), CA alpha C-H (C5), HR ring H.
TYPES = ["SR", "CJ", "CB", "CB", "CA", "HR", "HR", "HR"] * 2
# Standard atomic weights (IUPAC 2021 abridged values), g/mol.
MASS = {"S": 32.06, "C": 12.011, "H": 1.008}
_RING = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 0), (2, 5), (3, 6), (4, 7)]
BONDS = _RING + [(i + 8, j + 8) for i, j in _RING] + [(1, 9)]


def build_molecule() -> np.ndarray:
    """Planar anti 2,2'-bithiophene (S-C2-C2'-S = 180 deg), shape (16, 3), Å.

    The ring is built symmetric about the S...C3-C4 midline from the bond
    lengths and the two ring angles above; C3-C4 closes the ring. Hydrogens and
    the inter-ring bond bisect the exterior angle at their ring atom
    (common practice for a standard geometry).
    """
    half = np.radians(ANG_CSC_DEG / 2)
    s = np.array([0.0, 0.0])
    c2 = np.array([-R_SC_A * np.sin(half), R_SC_A * np.cos(half)])
    c5 = np.array([+R_SC_A * np.sin(half), R_SC_A * np.cos(half)])
    u = (s - c2) / np.linalg.norm(s - c2)          # direction C2 -> S
    a = np.radians(ANG_SCC_DEG)                     # rotate C2->S towards the ring interior
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    c3 = c2 + R_CC_DOUBLE_A * (rot @ u)
    c4 = np.array([-c3[0], c3[1]])
    ring = {"S": s, "C2": c2, "C3": c3, "C4": c4, "C5": c5}
    nbrs = {"C2": ("S", "C3"), "C3": ("C2", "C4"), "C4": ("C3", "C5"), "C5": ("C4", "S")}

    def outward(atom: str) -> np.ndarray:
        p = ring[atom]
        b = sum((p - ring[n]) / np.linalg.norm(p - ring[n]) for n in nbrs[atom])
        return b / np.linalg.norm(b)

    h3 = c3 + R_CH_A * outward("C3")
    h4 = c4 + R_CH_A * outward("C4")
    h5 = c5 + R_CH_A * outward("C5")
    half_a = np.array([s, c2, c3, c4, c5, h3, h4, h5])
    # Put the C2 substituent direction on +x with C2 at x = -R_INTER/2, then invert.
    d = outward("C2")                               # C2 -> C2' direction, put on +x
    ang = np.arctan2(d[1], d[0])
    r2 = np.array([[np.cos(-ang), -np.sin(-ang)], [np.sin(-ang), np.cos(-ang)]])
    half_a = (half_a - c2) @ r2.T + np.array([-R_INTER_A / 2, 0.0])
    half_a = np.column_stack([half_a, np.zeros(8)])
    return np.vstack([half_a, -half_a])


# --------------------------------------------------------------------------
# Force field.  Functional forms follow OPLS-AA: E_bond = K (r - r0)^2,
# E_angle = K (theta - theta0)^2, Fourier torsions, geometric combining rules
# for sigma and epsilon, 1-4 Coulomb and LJ scaled by 0.5.
# Jorgensen, Maxwell, Tirado-Rives, J. Am. Chem. Soc. 118, 11225 (1996).
# Lennard-Jones (sigma Å, epsilon kcal/mol), OPLS-AA aromatic/thiophene types:
LJ = {
    "S": (3.55, 0.250),   # thiophene S, OPLS-AA -- from memory
    "C": (3.55, 0.070),   # aromatic C (CA), OPLS-AA, JACS 118, 11225 (1996) -- from memory
    "H": (2.42, 0.030),   # aromatic H (HA), OPLS-AA, JACS 118, 11225 (1996) -- from memory
}
# Bond force constants K (kcal/mol/Å^2), OPLS-AA/AMBER-style aromatic values:
K_BOND = {
    frozenset("CC"): 469.0,   # CA-CA aromatic, OPLS-AA -- from memory (also used for the inter-ring bond)
    frozenset("CS"): 250.0,   # CA-S thiophene -- from memory
    frozenset("CH"): 367.0,   # CA-HA, OPLS-AA -- from memory (constrained in the run: HBonds)
}
# Angle force constants K (kcal/mol/rad^2):
K_ANGLE = {
    "CCC": 63.0,   # CA-CA-CA, OPLS-AA -- from memory (also ring C-C-C and exterior C-C-C at the junction)
    "SCC": 63.0,   # S-CA-CA, taken equal to CA-CA-CA -- common practice
    "CSC": 74.0,   # CA-S-CA -- from memory
    "CCH": 35.0,   # CA-CA-HA, OPLS-AA -- from memory
    "SCH": 35.0,   # S-CA-HA, taken equal to CA-CA-HA -- common practice
}
# Ring torsions: OPLS-AA X-CA-CA-X, V2 = 7.25 kcal/mol, E = V2/2 (1 - cos 2 phi) -- from memory;
# reused for the ring C-S bonds (common practice for a planar heteroaromatic ring).
V2_RING = 7.25
# Out-of-plane (improper) for ring H and the junction C: OPLS-AA aromatic improper,
# V2 = 2.2 kcal/mol, E = V2/2 (1 - cos 2 phi) -- from memory.
V2_IMPROPER = 2.2
# Inter-ring torsion target profile of isolated 2,2'-bithiophene, E(phi) in kcal/mol
# relative to the anti-gauche minimum, phi = S-C2-C2'-S (0 syn, 180 anti):
# high-level ab initio estimates, Raos, Famulari, Marcon, Chem. Phys. Lett. 379, 364 (2003)
# -- anchor values from memory (minima near 148 and 42 deg, 90-deg barrier about 1.9 kcal/mol).
TORSION_TARGET = [(0.0, 1.6), (42.0, 0.5), (90.0, 1.9), (148.0, 0.0), (180.0, 0.15)]


def molecule_terms(xyz_A: np.ndarray) -> dict:
    """Bonds, angles, ring torsions and impropers of one molecule with equilibrium values."""
    n = len(NAMES)
    nbr: list[list[int]] = [[] for _ in range(n)]
    for i, j in BONDS:
        nbr[i].append(j)
        nbr[j].append(i)
    bonds = [(i, j, float(np.linalg.norm(xyz_A[i] - xyz_A[j])),
              K_BOND[frozenset(ELEMENTS[i] + ELEMENTS[j])]) for i, j in BONDS]
    angles = []
    for c in range(n):
        for a_i in range(len(nbr[c])):
            for b_i in range(a_i + 1, len(nbr[c])):
                a, b = nbr[c][a_i], nbr[c][b_i]
                v1, v2 = xyz_A[a] - xyz_A[c], xyz_A[b] - xyz_A[c]
                theta = np.degrees(np.arccos(v1 @ v2 / np.linalg.norm(v1) / np.linalg.norm(v2)))
                ends = "".join(sorted(ELEMENTS[a] + ELEMENTS[b], key="SCH".index))
                key = {"CC": "CCC", "SC": "SCC", "CH": "CCH", "SH": "SCH"}[ends]
                if ELEMENTS[c] == "S":
                    key = "CSC"
                angles.append((a, c, b, float(theta), K_ANGLE[key]))
    ring_torsions, inter = [], []
    for j, k in BONDS:
        for i in nbr[j]:
            for l in nbr[k]:
                if i in (j, k) or l in (j, k) or i == l:
                    continue
                if {j, k} == {1, 9}:
                    inter.append((i, j, k, l))
                else:
                    ring_torsions.append((i, j, k, l))
    impropers = [(nbr[c][0], nbr[c][1], c, nbr[c][2]) for c in range(n) if len(nbr[c]) == 3]
    return {"bonds": bonds, "angles": angles, "ring_torsions": ring_torsions,
            "inter_ring_torsions": inter, "impropers": impropers}


# --------------------------------------------------------------------------
# ESP charges: HF/6-31G* (Cartesian d), Merz-Kollman/Singh-Kollman style fit:
# points on 4 shells at 1.4, 1.6, 1.8, 2.0 x vdW radius, about 1 point/Å^2,
# least squares with the total charge constrained by a Lagrange multiplier.
# Singh & Kollman, J. Comput. Chem. 5, 129 (1984); Besler, Merz, Kollman,
# J. Comput. Chem. 11, 431 (1990).  vdW radii (Å) of the MK scheme: H 1.20, C 1.50,
# S 1.75 (S value from memory).
MK_RADII_A = {"H": 1.20, "C": 1.50, "S": 1.75}
MK_SHELLS = (1.4, 1.6, 1.8, 2.0)
MK_DENSITY_PER_A2 = 1.0


def esp_charges(xyz_A: np.ndarray, equivalent: list[int]) -> tuple[np.ndarray, dict]:
    """Fit atomic charges (e) to the HF/6-31G* electrostatic potential of one molecule.

    ``equivalent[i]`` is the index of the symmetry class of atom i; atoms in one
    class share one fitted charge (symmetry averaging built into the fit).
    """
    from pyscf import df, gto, scf
    from pyscf.data.nist import BOHR

    mol = gto.M(atom=[(e, p) for e, p in zip(ELEMENTS, xyz_A)], basis="6-31g*",
                cart=True, unit="Angstrom", verbose=0)
    mf = scf.RHF(mol).run(conv_tol=1e-8)
    if not mf.converged:
        raise RuntimeError("HF/6-31G* SCF for the ESP fit did not converge")
    dm = mf.make_rdm1()
    pts = []
    rng = np.random.default_rng(SEED)
    for scale in MK_SHELLS:
        rad = np.array([MK_RADII_A[e] * scale for e in ELEMENTS])
        for i, p in enumerate(xyz_A):           # Fibonacci sphere, randomly turned per atom
            npt = max(8, int(4 * np.pi * rad[i] ** 2 * MK_DENSITY_PER_A2))
            k = np.arange(npt) + 0.5
            z, phi = 1 - 2 * k / npt, np.pi * (1 + 5 ** 0.5) * k + rng.uniform(0, 2 * np.pi)
            sph = np.column_stack([np.sqrt(1 - z * z) * np.cos(phi), np.sqrt(1 - z * z) * np.sin(phi), z])
            cand = p + rad[i] * sph
            d = np.linalg.norm(cand[:, None, :] - xyz_A[None, :, :], axis=2)
            pts.append(cand[np.all(d >= rad[None, :] - 1e-9, axis=1)])
    pts_A = np.vstack(pts)
    pts_B = pts_A / BOHR
    xyz_B = xyz_A / BOHR
    v_nuc = (mol.atom_charges()[None, :] / np.linalg.norm(pts_B[:, None] - xyz_B[None], axis=2)).sum(1)
    v_el = np.empty(len(pts_B))
    for s0 in range(0, len(pts_B), 400):          # chunks keep the 3-index integrals small
        fake = gto.fakemol_for_charges(pts_B[s0:s0 + 400])
        fake.cart = mol.cart
        v_el[s0:s0 + 400] = np.einsum("ijp,ij->p", df.incore.aux_e2(mol, fake), dm)
    v = v_nuc - v_el                                # hartree/e
    inv_r = 1.0 / np.linalg.norm(pts_B[:, None] - xyz_B[None], axis=2)   # (npts, natoms), 1/bohr
    classes = sorted(set(equivalent))
    m = np.zeros((len(equivalent), len(classes)))
    for i, c in enumerate(equivalent):
        m[i, classes.index(c)] = 1.0
    a = inv_r @ m                                   # design matrix in class charges
    ncl = len(classes)
    lhs = np.zeros((ncl + 1, ncl + 1))
    lhs[:ncl, :ncl] = a.T @ a
    lhs[:ncl, ncl] = lhs[ncl, :ncl] = m.sum(0)      # total charge constraint row/column
    rhs = np.concatenate([a.T @ v, [0.0]])
    q = m @ np.linalg.solve(lhs, rhs)[:ncl]
    resid = v - inv_r @ q
    info = {"method": "RHF/6-31G* (Cartesian d), PySCF", "energy_Eh": float(mf.e_tot),
            "n_points": int(len(pts_B)), "rms_esp_Eh": float(np.sqrt(np.mean(resid ** 2))),
            "rrms": float(np.sqrt(np.mean(resid ** 2) / np.mean(v ** 2))),
            "qm_dipole_D": float(np.linalg.norm(mf.dip_moment(verbose=0)))}
    return q, info


# --------------------------------------------------------------------------
def kj(kcal: float) -> float:
    return kcal * KCAL_TO_KJ


def build_system(charges_e: np.ndarray, terms: dict, torsion_fourier: list[tuple[int, float, float]],
                 n_mol: int, box_nm: float, periodic: bool = True, exact_geometric: bool = True):
    """OpenMM System of ``n_mol`` bithiophene molecules (16 atoms each, consecutive).

    ``exact_geometric=True`` evaluates the intermolecular Lennard-Jones pairs with
    a CustomNonbondedForce and the OPLS geometric rule for sigma. ``False`` puts the
    Lennard-Jones parameters in OpenMM's NonbondedForce, whose built-in rule is
    Lorentz-Berthelot (arithmetic sigma, geometric epsilon); for this molecule the
    two rules differ only for H-C and H-S pairs (sigma 2.985 vs 2.931 Å, 1.8 %).
    The 1-4 pairs always use the geometric rule (explicit exceptions). The
    NonbondedForce path is about 4x faster on OpenMM's CPU platform (measured
    106 vs 25 steps/s for this film on 2 shared cores), so the demo run uses it.
    """
    import openmm as mm
    import openmm.unit as u

    sys_ = mm.System()
    n = len(NAMES)
    bond_f, ang_f, tor_f = mm.HarmonicBondForce(), mm.HarmonicAngleForce(), mm.PeriodicTorsionForce()
    nb = mm.NonbondedForce()
    lj = mm.CustomNonbondedForce("4*eps*((sig/r)^12-(sig/r)^6); sig=sqrt(sig1*sig2); eps=sqrt(eps1*eps2)")
    lj.addPerParticleParameter("sig")
    lj.addPerParticleParameter("eps")
    if not exact_geometric:
        nb.setUseDispersionCorrection(True)         # isotropic tail correction (common practice)
    if periodic:
        nb.setNonbondedMethod(mm.NonbondedForce.PME)
        nb.setCutoffDistance(1.0 * u.nanometer)     # 1.0 nm cutoff (common practice)
        nb.setEwaldErrorTolerance(5e-4)             # OpenMM default (common practice)
        lj.setNonbondedMethod(mm.CustomNonbondedForce.CutoffPeriodic)
        lj.setCutoffDistance(1.0 * u.nanometer)
        lj.setUseLongRangeCorrection(True)          # isotropic tail correction (common practice)
        sys_.setDefaultPeriodicBoxVectors(mm.Vec3(box_nm, 0, 0), mm.Vec3(0, box_nm, 0), mm.Vec3(0, 0, box_nm))
    else:
        nb.setNonbondedMethod(mm.NonbondedForce.NoCutoff)
        lj.setNonbondedMethod(mm.CustomNonbondedForce.NoCutoff)
    gd = graph_distances(n, BONDS)
    for mol in range(n_mol):
        off = mol * n
        for i in range(n):
            sys_.addParticle(MASS[ELEMENTS[i]])
            sig, eps = LJ[ELEMENTS[i]]
            if exact_geometric:
                nb.addParticle(float(charges_e[i]), 1.0, 0.0)
            else:
                nb.addParticle(float(charges_e[i]), sig / 10.0, kj(eps))
            lj.addParticle([sig / 10.0, kj(eps)])
        for i, j, r0, k in terms["bonds"]:
            if "H" in (ELEMENTS[i], ELEMENTS[j]) and periodic:
                sys_.addConstraint(off + i, off + j, r0 / 10.0)   # HBonds constraints
            else:
                bond_f.addBond(off + i, off + j, r0 / 10.0, 2 * kj(k) * 100.0)
        for a, c, b, th, k in terms["angles"]:
            ang_f.addAngle(off + a, off + c, off + b, np.radians(th), 2 * kj(k))
        for i, j, k, l in terms["ring_torsions"]:
            tor_f.addTorsion(off + i, off + j, off + k, off + l, 2, np.pi, kj(V2_RING / 2))
        for i, j, c, l in terms["impropers"]:
            tor_f.addTorsion(off + i, off + j, off + c, off + l, 2, np.pi, kj(V2_IMPROPER / 2))
        for per, k, phase in torsion_fourier:       # inter-ring term on S-C2-C2'-S only
            tor_f.addTorsion(off + 0, off + 1, off + 9, off + 8, per, phase, kj(k))
        for i in range(n):
            for j in range(i + 1, n):
                if gd[i, j] <= 3:
                    lj.addExclusion(off + i, off + j)
                    if gd[i, j] == 3:                # 1-4 pair: Coulomb and LJ scaled by 0.5
                        si, ei = LJ[ELEMENTS[i]]
                        sj, ej = LJ[ELEMENTS[j]]
                        nb.addException(off + i, off + j, 0.5 * charges_e[i] * charges_e[j],
                                        np.sqrt(si * sj) / 10.0, 0.5 * kj(np.sqrt(ei * ej)))
                    else:
                        nb.addException(off + i, off + j, 0.0, 1.0, 0.0)
    for f in (bond_f, ang_f, tor_f, nb) + ((lj,) if exact_geometric else ()):
        sys_.addForce(f)
    return sys_


def fit_inter_ring_torsion(xyz_A: np.ndarray, charges_e: np.ndarray, terms: dict,
                           exact_geometric: bool = True):
    """Fourier terms on S-C2-C2'-S so that a rigid scan of one molecule follows TORSION_TARGET.

    The MM energy of a rigid rotation without the inter-ring term (1-4 and 1-5
    nonbonded pairs across the bond) is subtracted from the target; the rest is
    fitted with cos(n phi), n = 1..4.  Returns [(n, k_kcal, phase_rad)] and a report.
    """
    import openmm as mm
    import openmm.unit as u

    phis = np.arange(0.0, 181.0, 10.0)
    target = np.interp(phis, *zip(*TORSION_TARGET))        # used only for the report
    # A smooth target: cosine series through the anchor points (5 anchors, n = 0..4).
    anc_phi, anc_e = np.array(TORSION_TARGET).T
    basis = lambda ph: np.cos(np.radians(ph)[:, None] * np.arange(5)[None, :])
    coef_t = np.linalg.solve(basis(anc_phi), anc_e)
    target = basis(phis) @ coef_t
    sys_ = build_system(charges_e, terms, [], 1, 0.0, periodic=False, exact_geometric=exact_geometric)
    ctx = mm.Context(sys_, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    axis = xyz_A[9] - xyz_A[1]
    axis /= np.linalg.norm(axis)
    e_mm = []
    for ph in phis:
        t = np.radians(180.0 - ph)                          # rotate ring B from anti
        kx = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
        rot = np.eye(3) + np.sin(t) * kx + (1 - np.cos(t)) * kx @ kx
        p = xyz_A.copy()
        p[8:] = (p[8:] - p[9]) @ rot.T + p[9]
        ctx.setPositions(p / 10.0 * u.nanometer)
        e_mm.append(ctx.getState(getEnergy=True).getPotentialEnergy().value_in_unit(u.kilocalorie_per_mole))
    e_mm = np.array(e_mm) - min(e_mm)
    resid = target - e_mm
    coef, *_ = np.linalg.lstsq(basis(phis), resid, rcond=None)
    terms_out = []
    for n_per in range(1, 5):                               # c cos(n phi) = |c| (1 + cos(n phi - d)) - |c|
        c = float(coef[n_per])
        terms_out.append((n_per, abs(c), 0.0 if c >= 0 else float(np.pi)))
    e_fit = e_mm + basis(phis)[:, 1:] @ coef[1:]
    e_fit -= e_fit.min()
    report = {"phi_deg": phis.tolist(), "target_kcal": np.round(target - target.min(), 4).tolist(),
              "mm_rigid_without_term_kcal": np.round(e_mm, 4).tolist(),
              "mm_rigid_with_term_kcal": np.round(e_fit, 4).tolist()}
    return terms_out, report


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="very short schedule, to check the script")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--out", type=Path, default=HERE)
    ap.add_argument("--exact-geometric", action="store_true",
                    help="exact OPLS geometric sigma for intermolecular LJ pairs (about 4x slower on CPU)")
    args = ap.parse_args(argv)
    os.environ.setdefault("OMP_NUM_THREADS", str(args.threads))
    import openmm as mm
    import openmm.unit as u
    import MDAnalysis as mda

    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    rng = np.random.default_rng(SEED)
    xyz = build_molecule()
    terms = molecule_terms(xyz)
    equivalent = list(range(8)) * 2                          # ring B atom i+8 ~ ring A atom i (C2h)
    print("ESP fit (HF/6-31G*) ...", flush=True)
    t0 = time.perf_counter()
    q, esp_info = esp_charges(xyz, equivalent)
    q = np.round(q, 6)
    q[1] -= q[:8].sum()                                     # make each ring exactly neutral after rounding
    q[9] = q[1]                                              # (rings are neutral by inversion symmetry)
    timings["esp_fit_s"] = time.perf_counter() - t0
    print("  charges:", dict(zip(NAMES[:8], q[:8].round(4))), esp_info, flush=True)
    fourier, torsion_report = fit_inter_ring_torsion(xyz, q, terms, exact_geometric=args.exact_geometric)
    print("  inter-ring Fourier terms (n, k kcal/mol, phase):", fourier, flush=True)

    n_mol = N_MOLECULES
    mol_mass = sum(MASS[e] for e in ELEMENTS)
    total_mass = n_mol * mol_mass
    start_density = 0.50                                     # g/cm^3, random insertion still succeeds here
    box0_nm = (total_mass / AVOGADRO / start_density * 1e21) ** (1 / 3)
    t0 = time.perf_counter()
    pos_A = place_molecules([xyz] * n_mol, box0_nm * 10, rng)
    timings["placement_s"] = time.perf_counter() - t0
    print(f"  placed {n_mol} molecules in a {box0_nm * 10:.2f} Å box ({start_density} g/cm^3)", flush=True)
    system = build_system(q, terms, fourier, n_mol, box0_nm, exact_geometric=args.exact_geometric)
    baro = mm.MonteCarloBarostat(1.0 * u.bar, 300 * u.kelvin, 10)
    baro.setRandomNumberSeed(SEED % 2 ** 31)
    system.addForce(baro)
    integ = mm.LangevinMiddleIntegrator(300 * u.kelvin, 1.0 / u.picosecond, 0.002 * u.picoseconds)
    integ.setRandomNumberSeed(SEED % 2 ** 31)
    platform = mm.Platform.getPlatformByName("CPU")
    ctx = mm.Context(system, integ, platform, {"Threads": str(args.threads)})
    ctx.setPositions(pos_A / 10.0 * u.nanometer)
    t0 = time.perf_counter()
    mm.LocalEnergyMinimizer.minimize(ctx, 10.0, 2000)
    timings["minimise_s"] = time.perf_counter() - t0

    scale = 0.05 if args.quick else 1.0
    # (phase, ps, T start K, T end K, P bar)
    schedule = [("compress", 20, 450, 450, 2000.0),       # hot, high pressure: squeeze the loose start
                ("relax_hot", 10, 450, 450, 1.0),
                ("anneal", 20, 450, 300, 1.0),            # linear cooling in 15 temperature steps
                ("equilibrate", 20, 300, 300, 1.0)]
    frame_ps = 2.0                                        # production: 20 frames, 2 ps apart, NPT 300 K
    ctx.setVelocitiesToTemperature(450 * u.kelvin, SEED % 2 ** 31)
    log = run_schedule(ctx, integ, schedule, 0.002, scale, total_mass, timings)

    t0 = time.perf_counter()
    steps_per_frame = max(10, int(round(frame_ps * scale / 0.002)))
    frames, boxes = collect_frames(ctx, integ, N_FRAMES, steps_per_frame)
    timings["production_s"] = time.perf_counter() - t0
    print(f"  production done in {timings['production_s']:.0f} s", flush=True)
    np.savez(Path(os.environ.get("TMPDIR", "/tmp")) / "bithiophene_film_frames.npz",
             frames=np.array(frames), boxes=np.array(boxes), charges=q)   # safety copy of the raw result
    md_wall = sum(v for k, v in timings.items() if k not in ("esp_fit_s", "placement_s"))

    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    psf = out / f"{STEM}.psf"
    species = {"resname": "BTH", "names": NAMES, "types": TYPES, "charges": q,
               "masses": [MASS[e] for e in ELEMENTS], "bonds": [b[:2] for b in terms["bonds"]],
               "angles": [a[:3] for a in terms["angles"]],
               "dihedrals": terms["ring_torsions"] + terms["inter_ring_torsions"],
               "impropers": terms["impropers"]}
    write_psf(psf, [species] * n_mol, ["2,2'-bithiophene demo film (invented scenario), clusterlab demo_traj",
                                       "charges: HF/6-31G* ESP fit; see forcefield.json",
                                       "written by demo_traj/generate_film.py"])
    write_trajectory(psf, frames, boxes, frame_ps * scale, out / f"{STEM}.xtc", out / f"{STEM}.pdb")

    dens = [density_g_cm3(total_mass, b[:3] / 10.0) for b in boxes]
    fr = np.array(frames).reshape(N_FRAMES, n_mol, 16, 3)
    # torsions from whole molecules (unwrap ring B relative to its partner atom, minimum image)
    quad = fr[:, :, [0, 1, 9, 8], :]
    bx = np.array(boxes)[:, None, None, :3]
    quad = quad[:, :, :1] + (lambda d: d - bx * np.round(d / bx))(quad - quad[:, :, :1])
    phi = np.abs(dihedral_deg(quad))
    record = {
        "scenario": "Larkspur hole-transport interlayer study (invented): amorphous 2,2'-bithiophene film",
        "n_molecules": n_mol, "atoms_per_molecule": 16, "n_frames": N_FRAMES,
        "frame_spacing_ps": frame_ps * scale, "quick": bool(args.quick), "seed": SEED,
        "schedule": log, "production": {"ensemble": "NPT", "T_K": 300, "P_bar": 1.0,
                                        "ps": N_FRAMES * frame_ps * scale},
        "density_g_cm3_production_mean": round(float(np.mean(dens)), 4),
        "density_g_cm3_production_range": [round(min(dens), 4), round(max(dens), 4)],
        "box_A_frame0": np.round(boxes[0][:3], 3).tolist(),
        "S-C-C-S_abs_deg_mean": round(float(phi.mean()), 2),
        "S-C-C-S_abs_deg_std": round(float(phi.std()), 2),
        "fraction_syn_like_below_90deg": round(float((phi < 90).mean()), 4),
        "timings_s": {k: round(v, 1) for k, v in timings.items()},
        "md_wall_s": round(md_wall, 1), "total_wall_s": round(time.perf_counter() - t_start, 1),
        "openmm_platform": "CPU", "threads": args.threads,
        "versions": {"openmm": mm.__version__, "MDAnalysis": mda.__version__,
                     "numpy": np.__version__, "python": sys.version.split()[0]},
        "wrapping": "every atom wrapped into [0, L) per frame; molecules are broken across box faces",
    }
    ff = {
        "description": "Force field of the clusterlab bithiophene demo film; units as labelled.",
        "functional_form": {"bond": "K (r - r0)^2", "angle": "K (theta - theta0)^2",
                            "torsion": "k (1 + cos(n phi - phase))", "lj": "4 eps ((sig/r)^12 - (sig/r)^6)",
                            "combining": "geometric for sigma and epsilon (OPLS)", "scale_14": {"coulomb": 0.5, "lj": 0.5},
                            "combining_in_this_run": ("geometric for all pairs (CustomNonbondedForce)" if args.exact_geometric
                                                      else "geometric for 1-4 pairs; Lorentz-Berthelot for all other "
                                                           "pairs (OpenMM NonbondedForce); differs only for H-C/H-S sigma"),
                            "source": "OPLS-AA conventions: Jorgensen, Maxwell, Tirado-Rives, JACS 118, 11225 (1996)"},
        "atoms": [{"name": NAMES[i], "element": ELEMENTS[i], "type": TYPES[i], "mass_amu": MASS[ELEMENTS[i]],
                   "charge_e": float(q[i]), "sigma_A": LJ[ELEMENTS[i]][0], "epsilon_kcal": LJ[ELEMENTS[i]][1]}
                  for i in range(16)],
        "lj_source": "OPLS-AA (JACS 118, 11225, 1996) aromatic C/H and thiophene S; values from memory",
        "charges_source": {"scheme": "ESP fit, Merz-Kollman/Singh-Kollman style shells", "shells_x_vdw": MK_SHELLS,
                           "vdw_radii_A": MK_RADII_A, "points_per_A2": MK_DENSITY_PER_A2,
                           "constraint": "total charge 0; atoms i and i+8 share one charge", **esp_info,
                           "refs": "Singh & Kollman, J. Comput. Chem. 5, 129 (1984); "
                                   "Besler, Merz, Kollman, J. Comput. Chem. 11, 431 (1990)"},
        "bonds": [{"atoms": [NAMES[i], NAMES[j]], "r0_A": round(r0, 4), "K_kcal_A2": k,
                   "constrained": "H" in (ELEMENTS[i], ELEMENTS[j])} for i, j, r0, k in terms["bonds"]],
        "angles": [{"atoms": [NAMES[a], NAMES[c], NAMES[b]], "theta0_deg": round(th, 3), "K_kcal_rad2": k}
                   for a, c, b, th, k in terms["angles"]],
        "ring_torsions": {"V2_kcal": V2_RING, "form": "V2/2 (1 - cos 2 phi)", "n_terms": len(terms["ring_torsions"]),
                          "source": "OPLS-AA X-CA-CA-X, from memory; reused for ring C-S bonds (common practice)"},
        "impropers": {"V2_kcal": V2_IMPROPER, "form": "V2/2 (1 - cos 2 phi)",
                      "atoms": [[NAMES[x] for x in t] for t in terms["impropers"]],
                      "source": "OPLS-AA aromatic improper, from memory"},
        "inter_ring_torsion": {"dihedral": ["S1A", "C2A", "C2B", "S1B"],
                               "terms": [{"n": n_, "k_kcal": round(k_, 5), "phase_deg": round(np.degrees(ph_), 1)}
                                         for n_, k_, ph_ in fourier],
                               "target_anchors_deg_kcal": TORSION_TARGET,
                               "target_source": "Raos, Famulari, Marcon, Chem. Phys. Lett. 379, 364 (2003); "
                                                "anchor values from memory",
                               "fit": torsion_report},
        "geometry_source": "thiophene microwave structure, Bak et al., J. Mol. Spectrosc. 7, 58 (1961); "
                           "inter-ring 1.456 A, Samdal et al., Synth. Met. 59, 259 (1993); both from memory",
        "reference_geometry_A": np.round(xyz, 5).tolist(),
        "md": {"electrostatics": "PME, cutoff 1.0 nm, Ewald tolerance 5e-4",
               "lj": "cutoff 1.0 nm, long-range dispersion correction", "constraints": "X-H bonds",
               "timestep_fs": 2.0, "integrator": "Langevin middle, friction 1/ps",
               "barostat": "Monte Carlo, isotropic, every 25 steps"},
    }
    (out / "forcefield.json").write_text(json.dumps(ff, indent=1) + "\n")
    (out / "build_record.json").write_text(json.dumps(record, indent=1) + "\n")
    print(json.dumps(record, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
