"""Shared fixtures: small synthetic films built in memory with known truth."""

from __future__ import annotations

import os

import MDAnalysis as mda
import numpy as np
import pytest

os.environ.setdefault("OMP_NUM_THREADS", "1")

#: a bent triatomic "molecule" with TIP3P charges and geometry
#: (Jorgensen et al., J. Chem. Phys. 79, 926 (1983)): r(OH) = 0.9572 Å, HOH = 104.52°
TIP3P_Q = np.array([-0.834, 0.417, 0.417])
_theta = np.deg2rad(104.52) / 2
TIP3P_XYZ = np.array([[0.0, 0.0, 0.0],
                      [0.9572 * np.sin(_theta), 0.9572 * np.cos(_theta), 0.0],
                      [-0.9572 * np.sin(_theta), 0.9572 * np.cos(_theta), 0.0]])


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    q = rng.normal(size=4)
    q /= np.linalg.norm(q)
    a, b, c, d = q
    return np.array([
        [a * a + b * b - c * c - d * d, 2 * (b * c - a * d), 2 * (b * d + a * c)],
        [2 * (b * c + a * d), a * a - b * b + c * c - d * d, 2 * (c * d - a * b)],
        [2 * (b * d - a * c), 2 * (c * d + a * b), a * a - b * b - c * c + d * d],
    ])


def build_water_universe(centres_frac: np.ndarray, box: np.ndarray, *, seed: int = 0,
                         bonds: bool = True, n_frames: int = 1, wrap: bool = True,
                         resname: str = "WAT"):
    """A Universe of TIP3P-like molecules at given fractional centres.

    Returns ``(universe, truth)`` where ``truth[f]`` holds the unwrapped
    (whole) coordinates of frame f before wrapping atoms into the box.
    """
    from MDAnalysis.lib.mdamath import triclinic_vectors

    rng = np.random.default_rng(seed)
    n_mol = len(centres_frac)
    n_atoms = 3 * n_mol
    h = triclinic_vectors(box).astype(float)
    u = mda.Universe.empty(n_atoms, n_residues=n_mol, atom_resindex=np.repeat(np.arange(n_mol), 3),
                           trajectory=True)
    u.add_TopologyAttr("names", ["OW", "HW1", "HW2"] * n_mol)
    u.add_TopologyAttr("types", ["OW", "HW", "HW"] * n_mol)
    u.add_TopologyAttr("elements", ["O", "H", "H"] * n_mol)
    u.add_TopologyAttr("resnames", [resname] * n_mol)
    u.add_TopologyAttr("resids", np.arange(1, n_mol + 1))
    u.add_TopologyAttr("masses", [15.999, 1.008, 1.008] * n_mol)
    u.add_TopologyAttr("charges", np.tile(TIP3P_Q, n_mol))
    if bonds:
        b = [(3 * i, 3 * i + 1) for i in range(n_mol)] + [(3 * i, 3 * i + 2) for i in range(n_mol)]
        u.add_TopologyAttr("bonds", b)
    frames, truth = [], []
    for f in range(n_frames):
        pos = []
        for c in centres_frac:
            cart = np.asarray(c) @ h + rng.normal(scale=0.05, size=3) * f
            pos.append(cart + (TIP3P_XYZ - TIP3P_XYZ.mean(0)) @ random_rotation(rng).T)
        pos = np.vstack(pos)
        truth.append(pos.copy())
        if wrap:
            frac = pos @ np.linalg.inv(h)
            frac -= np.floor(frac)
            pos = frac @ h
        frames.append(pos)
    from MDAnalysis.coordinates.memory import MemoryReader

    u.load_new(np.array(frames, dtype=np.float32), format=MemoryReader,
               dimensions=np.tile(np.asarray(box, dtype=np.float32), (n_frames, 1)))
    return u, truth


def lattice_centres(n: int, jitter: float, rng: np.random.Generator) -> np.ndarray:
    g = (np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).reshape(-1, 3) + 0.5) / n
    return g + rng.uniform(-jitter, jitter, size=g.shape) / n


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
