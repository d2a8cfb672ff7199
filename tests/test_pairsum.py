"""Environment potentials of all molecules at once against brute force and carving."""

from __future__ import annotations

import numpy as np
import pytest

from clusterlab.carve import MoleculeIndex, select_images
from clusterlab.electrostatics import pairsum
from clusterlab.electrostatics.pairsum import candidate_pairs, environment_potential
from clusterlab.geometry import box_vectors
from clusterlab.units import COULOMB_EV_A


def _random_molecules(rng, n_mol, box, sizes=(2, 3, 5)):
    """Whole molecules of mixed sizes (bond ~1.2 Å), centroids inside the cell, neutral."""
    h = box_vectors(box)
    pos, mol, q = [], [], []
    for k in range(n_mol):
        n = int(rng.choice(sizes))
        steps = rng.normal(size=(n, 3))
        steps /= np.linalg.norm(steps, axis=1)[:, None]
        x = np.cumsum(1.2 * steps, axis=0)
        x -= x.mean(axis=0)
        pos.append(x + rng.random(3) @ h)
        mol += [k] * n
        c = rng.normal(scale=0.4, size=n)
        q.append(c - c.mean())
    return np.vstack(pos), np.asarray(mol), np.concatenate(q)


def _brute_force(pos, mol, q, box, radius, rule):
    """Per molecule: carving's own image choice (select_images), then Coulomb's law atom by atom."""
    index = MoleculeIndex.from_molecule_of_atom(mol)
    cent = np.array([pos[index.of(i)].mean(axis=0) for i in range(index.n_molecules)])
    h = box_vectors(box) if box is not None else np.zeros((3, 3))
    out = np.zeros(len(pos))
    n_env = []
    for i in range(index.n_molecules):
        sel = select_images(pos, cent, index, i, radius, box=box, rule=rule)
        n_env.append(len(sel.molecules))
        for j, img in zip(sel.molecules, sel.images):
            yj = pos[index.of(int(j))] + img @ h
            for a in index.of(i):
                out[a] += COULOMB_EV_A * np.sum(q[index.of(int(j))] / np.linalg.norm(yj - pos[a], axis=1))
    return out, np.array(n_env), index, cent


#: code paths of the pair sums: centroid distances dense or from a KD-tree; batches of the
#: default size or of a few atom pairs (many batches and lower-bound chunks, one owner each)
PATHS = {"dense": {}, "tree": {"_DENSE_MAX": 0}, "tiny batches": {"_BATCH_ENTRIES": 8}}


@pytest.fixture(params=list(PATHS))
def path(request, monkeypatch):
    for name, value in PATHS[request.param].items():
        monkeypatch.setattr(pairsum, name, value)
    return request.param


@pytest.mark.parametrize("box", [np.array([14.0, 15.0, 16.0, 90, 90, 90]),
                                 np.array([15.0, 14.0, 16.0, 70, 80, 105]), None],
                         ids=["orthorhombic", "triclinic", "no box"])
@pytest.mark.parametrize("rule", ["atom", "centroid"])
def test_matches_carving_and_coulomb(box, rule, path):
    """Independent path: clusterlab.carve.select_images chooses the images of
    each molecule, the potential is Coulomb's law summed atom by atom; radius
    9 Å exceeds half of every box width, so molecules meet their own images."""
    rng = np.random.default_rng(4)
    pos, mol, q = _random_molecules(rng, 30, box if box is not None else np.array([16.0, 16, 16, 90, 90, 90]))
    ref, n_env, index, cent = _brute_force(pos, mol, q, box, 9.0, rule)
    for threads in (1, 2):
        got = environment_potential(pos, q, index.atoms, index.offsets, cent, box, 9.0, rule=rule, threads=threads)
        assert np.allclose(got.potential_V, ref, rtol=1e-12, atol=1e-11)
        assert np.array_equal(np.bincount(got.pairs.center, minlength=len(cent)), n_env)


def test_membership_exactly_at_the_radius():
    """Two one-atom molecules exactly R apart join (carving counts distance <= R);
    a hair further apart they do not. Lattice films hit this case."""
    pos = np.array([[1.0, 1.0, 1.0], [4.0, 1.0, 1.0]])
    q = np.array([1.0, -1.0])
    idx = MoleculeIndex.from_molecule_of_atom(np.array([0, 1]))
    at = environment_potential(pos, q, idx.atoms, idx.offsets, pos, None, 3.0)
    assert at.potential_V.tolist() == pytest.approx([-COULOMB_EV_A / 3, COULOMB_EV_A / 3], rel=1e-14)
    off = environment_potential(pos, q, idx.atoms, idx.offsets, pos, None, 3.0 * (1 - 1e-12))
    assert off.potential_V.tolist() == [0.0, 0.0]


def test_subset_and_candidates(path):
    """``want`` gives the flagged molecules' potentials unchanged; candidate pairs
    are each unordered pair once (brute force over the 27 nearest translations)."""
    rng = np.random.default_rng(8)
    box = np.array([12.0, 12.0, 12.0, 90, 90, 90])
    pos, mol, q = _random_molecules(rng, 20, box)
    index = MoleculeIndex.from_molecule_of_atom(mol)
    cent = np.array([pos[index.of(i)].mean(axis=0) for i in range(index.n_molecules)])
    full = environment_potential(pos, q, index.atoms, index.offsets, cent, box, 5.0)
    want = np.zeros(len(cent), bool)
    want[[2, 7]] = True
    part = environment_potential(pos, q, index.atoms, index.offsets, cent, box, 5.0, want=want)
    atoms = np.r_[index.of(2), index.of(7)]
    assert np.allclose(part.potential_V[atoms], full.potential_V[atoms], rtol=1e-13, atol=1e-13)
    cp = candidate_pairs(cent, box, 5.0)
    got = {(int(i), int(j), tuple(int(x) for x in t)) for i, j, t in zip(cp.i, cp.j, cp.image)}
    tr = np.array([[a, b, c] for a in (-1, 0, 1) for b in (-1, 0, 1) for c in (-1, 0, 1)])
    want_pairs = set()
    for i in range(len(cent)):
        for j in range(len(cent)):
            for t in tr:
                d = np.linalg.norm(cent[j] + t * 12.0 - cent[i])
                if d <= 5.0 and (i < j or (i == j and tuple(t) > (0, 0, 0))):
                    want_pairs.add((i, j, tuple(int(x) for x in t)))
    assert got == want_pairs


def test_film_model_over_frames_and_threads():
    """film_site_energies with two threads (whole frames per thread, and the
    molecules of one frame split when only one frame is asked for) against
    Film.carve and Coulomb's law summed over the carved point charges."""
    from clusterlab import film_from_universe
    from clusterlab.electrostatics.chargeset import StateChargeSet
    from clusterlab.study.filmmodel import film_site_energies
    from clusterlab.errors import InputError

    from conftest import TIP3P_Q, build_water_universe, lattice_centres

    rng = np.random.default_rng(21)
    box = np.array([3.1 * 4] * 3 + [90.0] * 3)
    u, _ = build_water_universe(lattice_centres(4, 0.2, rng), box, seed=5, n_frames=3)
    film = film_from_universe(u)
    cset = StateChargeSet.from_arrays({"WAT": {"S0": TIP3P_Q, "cation": [0.0, 0.5, 0.5]}})
    dq = cset.difference("WAT", "cation")
    radius = 7.0                                  # beyond half the 12.4 Å box: images
    both = film_site_energies(film, cset, states=("cation",), radius_A=radius, progress=False, threads=2).table
    one = film_site_energies(film, cset, states=("cation",), radius_A=radius, progress=False, threads=2,
                             frames=[2]).table
    assert both.frame.tolist() == np.repeat([0, 1, 2], film.n_molecules).tolist()
    for frame, table in ((0, both), (1, both), (2, both), (2, one)):
        sub = table[table.frame == frame].set_index("molecule")
        for i in range(0, film.n_molecules, 7):
            c = film.carve(i, radius, frame=frame)
            d = c.qm_positions[:, None, :] - c.env_positions[None, :, :]
            ref = float(dq @ (c.env_charges / np.linalg.norm(d, axis=2)).sum(axis=1)) * COULOMB_EV_A
            assert sub.loc[i, "cation_shift_eV"] == pytest.approx(ref, abs=1e-10)
    with pytest.raises(InputError, match="no frame"):
        film_site_energies(film, cset, states=("cation",), radius_A=radius, progress=False, frames=[])
