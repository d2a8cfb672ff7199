"""Pieces shared by the demo-film generators (``generate_film.py``, ``generate_doped.py``).

Plain helpers, no force field: topology graph distances, dihedrals, random
insertion of molecules into a periodic box, a CHARMM/X-PLOR PSF writer for any
mix of species, the phase runner of a melt-quench schedule, frame collection
and the trajectory writers. Only the generators import this module (it is not
part of the clusterlab package, but uses its geometry, so install the project
first: ``pip install -e .[demo]``). OpenMM and MDAnalysis are imported inside
the functions that need them.
"""

from __future__ import annotations

from collections import deque
from pathlib import Path

import numpy as np

AVOGADRO = 6.02214076e23            # SI 2019, exact
KCAL_TO_KJ = 4.184                  # thermochemical calorie (exact by definition)


def graph_distances(n: int, bonds: list[tuple[int, int]]) -> np.ndarray:
    """Topological (bond-count) distance matrix by breadth-first search, shape (n, n)."""
    nbr: list[list[int]] = [[] for _ in range(n)]
    for i, j in bonds:
        nbr[i].append(j)
        nbr[j].append(i)
    dist = np.full((n, n), 99, dtype=int)
    for start in range(n):
        dist[start, start] = 0
        todo = deque([start])
        while todo:
            k = todo.popleft()
            for m in nbr[k]:
                if dist[start, m] == 99:
                    dist[start, m] = dist[start, k] + 1
                    todo.append(m)
    return dist


def dihedral_deg(p: np.ndarray) -> np.ndarray:
    """Dihedral angles (deg) of point quadruples, p shape (..., 4, 3)
    (:func:`clusterlab.geometry.dihedral_deg`, IUPAC sign)."""
    from clusterlab.geometry import dihedral_deg as chain_dihedral_deg

    p = np.asarray(p, dtype=np.float64)
    q = p.reshape(-1, 4, 3)
    return chain_dihedral_deg(q[:, 0], q[:, 1], q[:, 2], q[:, 3]).reshape(p.shape[:-2])


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """Uniform random rotation matrix from a random unit quaternion (Shoemake, Graphics Gems III, 1992)."""
    q = rng.normal(size=4)
    w, x, y, z = q / np.linalg.norm(q)
    return np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
                     [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
                     [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])


def place_molecules(templates: list[np.ndarray], box_A: float, rng: np.random.Generator,
                    min_dist_A: float = 2.8) -> np.ndarray:
    """Random positions and orientations without overlaps (minimum image), Å.

    ``templates`` holds one coordinate array per molecule, in the order the
    molecules are to appear; each is centred, turned at random and shifted to a
    random point until no atom is closer than ``min_dist_A`` to an atom already
    placed. Only molecules whose bounding spheres can touch are compared.
    Returns all positions stacked, shape (sum of atoms, 3).
    """
    placed: list[np.ndarray] = []
    centres, radii = [], []
    for m, xyz_A in enumerate(templates):
        centred = xyz_A - xyz_A.mean(0)
        rad = float(np.max(np.linalg.norm(centred, axis=1)))
        tries = 0
        while True:
            tries += 1
            if tries > 2000 * len(templates):
                raise RuntimeError(f"could not place molecule {m} of {len(templates)} in a {box_A:.1f} Å box")
            shift = rng.uniform(0, box_A, 3)
            cand = centred @ random_rotation(rng).T + shift
            if placed:
                dc = np.array(centres) - shift
                dc -= box_A * np.round(dc / box_A)
                near = np.flatnonzero(np.linalg.norm(dc, axis=1) < np.array(radii) + rad + min_dist_A)
                if near.size:
                    allp = np.vstack([placed[k] for k in near])
                    d = cand[:, None, :] - allp[None, :, :]
                    d -= box_A * np.round(d / box_A)
                    if np.min(np.einsum("ijk,ijk->ij", d, d)) < min_dist_A ** 2:
                        continue
            placed.append(cand)
            centres.append(shift)
            radii.append(rad)
            break
    return np.vstack(placed)


def write_psf(path: Path, molecules: list[dict], remarks: list[str], segment: str = "FILM") -> None:
    """CHARMM/X-PLOR PSF, standard column layout (I8,1X,A4,1X,A4,1X,A4,1X,A4,1X,A4,1X,2G14.6,I8).

    ``molecules`` holds one species record per molecule, in file order (the same
    dict may repeat): ``resname``, per-atom ``names``, ``types``, ``charges``,
    ``masses``, and 0-based local ``bonds``, ``angles``, ``dihedrals``,
    ``impropers`` (tuples of atom indices). One residue per molecule.
    """
    n_atoms = sum(len(s["names"]) for s in molecules)
    lines = ["PSF", "", f"{len(remarks):8d} !NTITLE"] + [f" REMARKS {r}" for r in remarks] + [
        "", f"{n_atoms:8d} !NATOM"]
    offsets = np.cumsum([0] + [len(s["names"]) for s in molecules])[:-1]
    for mol, (sp, off) in enumerate(zip(molecules, offsets)):
        for i, name in enumerate(sp["names"]):
            lines.append(f"{off + i + 1:8d} {segment:<4} {mol + 1:<4d} {sp['resname']:<4} {name:<4} "
                         f"{sp['types'][i]:<4} {sp['charges'][i]:14.6f}{sp['masses'][i]:14.4f}{0:8d}")

    def section(tag: str, label: str, key: str, per_line: int) -> None:
        flat = [tuple(int(off) + a + 1 for a in t) for sp, off in zip(molecules, offsets) for t in sp[key]]
        lines.append("")
        lines.append(f"{len(flat):8d} !{tag}: {label}")
        for s0 in range(0, len(flat), per_line):
            lines.append("".join(f"{a:8d}" for t in flat[s0:s0 + per_line] for a in t))

    section("NBOND", "bonds", "bonds", 4)
    section("NTHETA", "angles", "angles", 3)
    section("NPHI", "dihedrals", "dihedrals", 2)
    section("NIMPHI", "impropers", "impropers", 2)
    for tag, label in (("NDON", "donors"), ("NACC", "acceptors")):
        lines += ["", f"{0:8d} !{tag}: {label}"]
    lines += ["", f"{0:8d} !NNB", ""]
    path.write_text("\n".join(lines) + "\n")


def density_g_cm3(mass_amu: float, box_nm: np.ndarray) -> float:
    """Density (g/cm³) of ``mass_amu`` in an orthorhombic box with edges ``box_nm``."""
    vol_cm3 = float(np.prod(box_nm)) * 1e-21
    return mass_amu / AVOGADRO / vol_cm3


def box_edges_nm(ctx) -> np.ndarray:
    """Edge lengths (nm) of the current orthorhombic box of an OpenMM Context."""
    import openmm.unit as u

    a, b, c = ctx.getState().getPeriodicBoxVectors(asNumpy=True).value_in_unit(u.nanometer)
    return np.array([a[0], b[1], c[2]])


def run_schedule(ctx, integ, schedule: list[tuple], dt_ps: float, scale: float, total_mass_amu: float,
                 timings: dict) -> list[dict]:
    """Run the melt-quench phases ``(name, ps, T_start_K, T_end_K, P_bar)`` in an OpenMM Context.

    The Context must hold a MonteCarloBarostat. A phase whose temperature
    changes runs in 16 equal chunks with the temperature stepped linearly from
    start to end; a constant phase in 4 chunks. ``scale`` shortens every phase
    (quick checks). Wall times go into ``timings`` as ``"<name>_s"``; returns
    one log record per phase (with the density at its end).
    """
    import time

    import openmm as mm
    import openmm.unit as u

    log = []
    for name, ps, t_a, t_b, p_bar in schedule:
        t0 = time.perf_counter()
        ctx.setParameter(mm.MonteCarloBarostat.Pressure(), p_bar)
        nsteps = max(10, int(round(ps * scale / dt_ps)))
        nchunk = 16 if t_a != t_b else 4
        for k in range(nchunk):
            temp = t_a + (t_b - t_a) * k / max(1, nchunk - 1)
            integ.setTemperature(temp * u.kelvin)
            ctx.setParameter(mm.MonteCarloBarostat.Temperature(), temp)
            integ.step(nsteps // nchunk)
        timings[f"{name}_s"] = time.perf_counter() - t0
        log.append({"phase": name, "ps": ps * scale, "T_K": [t_a, t_b], "P_bar": p_bar,
                    "density_end_g_cm3": round(density_g_cm3(total_mass_amu, box_edges_nm(ctx)), 4),
                    "wall_s": round(timings[f"{name}_s"], 1)})
        print("  ", log[-1], flush=True)
    return log


def collect_frames(ctx, integ, n_frames: int, steps_per_frame: int) -> tuple[np.ndarray, np.ndarray]:
    """Production: ``n_frames`` frames ``steps_per_frame`` apart, every atom wrapped into [0, L).

    Returns positions (n_frames, n_atoms, 3) Å and boxes (n_frames, 6) (Å, deg).
    """
    import openmm.unit as u

    frames, boxes = [], []
    for _ in range(n_frames):
        integ.step(steps_per_frame)
        st = ctx.getState(getPositions=True)
        a, b, c = st.getPeriodicBoxVectors(asNumpy=True).value_in_unit(u.nanometer)
        box_A = np.array([a[0], b[1], c[2]]) * 10.0
        p = st.getPositions(asNumpy=True).value_in_unit(u.nanometer) * 10.0
        frames.append(p - box_A * np.floor(p / box_A))      # wrap every atom into [0, L)
        boxes.append(np.concatenate([box_A, [90.0, 90.0, 90.0]]))
    return np.array(frames), np.array(boxes)


def write_trajectory(psf: Path, frames: np.ndarray, boxes: np.ndarray, dt_ps: float,
                     xtc: Path, pdb: Path) -> None:
    """Write the frames as a compressed XTC and frame 0 as a PDB, with the PSF's topology."""
    import MDAnalysis as mda
    from MDAnalysis.coordinates.memory import MemoryReader

    un = mda.Universe(str(psf))
    un.load_new(np.asarray(frames, dtype=np.float32), format=MemoryReader,
                dimensions=np.asarray(boxes, dtype=np.float32), dt=dt_ps)
    with mda.Writer(str(xtc), un.atoms.n_atoms) as w:
        for _ts in un.trajectory:
            w.write(un.atoms)
    un.trajectory[0]
    un.atoms.write(str(pdb))
