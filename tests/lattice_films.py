"""Constructed films of several species: charge-pair "dipole" molecules on a
simple cubic lattice, with random orientations and a random species layout.

Each molecule has three atoms on a line: a negative end ``-q`` at
``-d/2``, a neutral centre atom and a positive end ``+q`` at ``+d/2``
(``q = p / d``), bonded centre-to-ends, one residue per molecule with the
species name as residue name. Centres sit on the lattice nodes
``(i + 1/2) a`` of a cubic box of ``n a``; each frame draws new orientations
(independent realisations of the same layout). The centroid of a molecule is
its centre atom.

:func:`cation_charge_set` gives, per species, S0 charges ``(-q, 0, +q)`` and
"cation" charges ``(-q, +1, +q)``: the cation shift of the film model is then
the electrostatic potential of the environment's dipoles at the site
(times one elementary charge), the quantity of the dipolar-disorder model.
"""

from __future__ import annotations

from dataclasses import dataclass

import MDAnalysis as mda
import numpy as np

from clusterlab.electrostatics.chargeset import StateChargeSet
from clusterlab.units import DEBYE_E_A


@dataclass(frozen=True)
class DipoleSpecies:
    """One species of a constructed lattice film."""

    name: str
    dipole_D: float
    count: int
    #: elements of the negative end, the centre and the positive end
    elements: tuple[str, str, str] = ("N", "C", "O")


def lattice_nodes(n: int, spacing_A: float) -> np.ndarray:
    """The n³ node positions (Å), x slowest."""
    g = (np.arange(n) + 0.5) * spacing_A
    return np.stack(np.meshgrid(g, g, g, indexing="ij"), -1).reshape(-1, 3)


def random_unit_vectors(m: int, rng: np.random.Generator) -> np.ndarray:
    v = rng.normal(size=(m, 3))
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def dipole_lattice_universe(n: int, spacing_A: float, species: list[DipoleSpecies], *, n_frames: int = 1,
                            separation_A: float = 1.0, seed: int = 0) -> tuple[mda.Universe, np.ndarray]:
    """A Universe of ``n**3`` dipole molecules; returns ``(universe, species name per site)``.

    The counts of ``species`` must add up to ``n**3``; sites are given species
    at random (reproducible by ``seed``).
    """
    n_mol = n ** 3
    if sum(s.count for s in species) != n_mol:
        raise ValueError(f"species counts {[s.count for s in species]} do not add up to {n_mol} sites")
    rng = np.random.default_rng(seed)
    kind = rng.permutation(np.repeat(np.arange(len(species)), [s.count for s in species]))
    names = np.array([species[k].name for k in kind])
    q = np.array([species[k].dipole_D * DEBYE_E_A / separation_A for k in kind])
    u = mda.Universe.empty(3 * n_mol, n_residues=n_mol, atom_resindex=np.repeat(np.arange(n_mol), 3),
                           trajectory=True)
    u.add_TopologyAttr("names", ["QN", "QC", "QP"] * n_mol)
    u.add_TopologyAttr("elements", [e for k in kind for e in species[k].elements])
    u.add_TopologyAttr("resnames", names.tolist())
    u.add_TopologyAttr("resids", np.arange(1, n_mol + 1))
    u.add_TopologyAttr("charges", np.stack([-q, np.zeros(n_mol), q], axis=1).ravel())
    u.add_TopologyAttr("bonds", [(3 * i + 1, 3 * i) for i in range(n_mol)]
                       + [(3 * i + 1, 3 * i + 2) for i in range(n_mol)])
    nodes = lattice_nodes(n, spacing_A)
    frames = []
    for _ in range(n_frames):
        half = 0.5 * separation_A * random_unit_vectors(n_mol, rng)
        frames.append(np.stack([nodes - half, nodes, nodes + half], axis=1).reshape(-1, 3))
    from MDAnalysis.coordinates.memory import MemoryReader

    box = np.array([n * spacing_A] * 3 + [90.0] * 3, dtype=np.float32)
    u.load_new(np.array(frames, dtype=np.float32), format=MemoryReader, dimensions=np.tile(box, (n_frames, 1)))
    return u, names


def cation_charge_set(species: list[DipoleSpecies], *, separation_A: float = 1.0) -> StateChargeSet:
    """Per species: S0 ``(-q, 0, +q)`` and cation ``(-q, +1, +q)`` charges (e)."""
    out = {}
    for s in species:
        q = s.dipole_D * DEBYE_E_A / separation_A
        out[s.name] = {"S0": [-q, 0.0, q], "cation": [-q, 1.0, q]}
    return StateChargeSet.from_arrays(out, method="constructed dipoles")
