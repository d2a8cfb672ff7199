"""Carving against an independent brute-force minimum-image/all-images search.

The reference below never wraps, never makes molecules whole and never uses
clusterlab's geometry: it takes the true whole coordinates the fixture
generated before wrapping atoms into the box, and loops over every lattice
translation explicitly.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from MDAnalysis.lib.mdamath import triclinic_vectors
from scipy.spatial.distance import cdist

from clusterlab.errors import CarvingError
from clusterlab.film import film_from_universe

from conftest import TIP3P_Q, build_water_universe, lattice_centres

ORTHO = np.array([18.0, 20.0, 22.0, 90.0, 90.0, 90.0])
TRICLINIC = np.array([19.0, 21.0, 20.0, 75.0, 82.0, 68.0])


def brute_force(truth: np.ndarray, box: np.ndarray, center: int, radius: float, rule: str):
    h = triclinic_vectors(box).astype(float)
    mols = truth.reshape(-1, 3, 3)
    cen = mols[center]
    cc = cen.mean(0)
    widths = np.abs(np.linalg.det(h)) / np.linalg.norm(np.cross(h[[1, 2, 0]], h[[2, 0, 1]]), axis=1)
    k = int(np.ceil((radius + 10.0) / widths.min())) + 1
    rows, count = [], 0
    for j in range(len(mols)):
        for n in itertools.product(range(-k, k + 1), repeat=3):
            if j == center and n == (0, 0, 0):
                continue
            m = mols[j] + np.array(n, float) @ h
            if np.linalg.norm(m.mean(0) - cc) > radius + 8.0:
                continue
            d = cdist(m, cen).min() if rule == "atom" else np.linalg.norm(m.mean(0) - cc)
            if d <= radius:
                rows.append(m - cc)
                count += 1
    return (np.vstack(rows) if rows else np.zeros((0, 3))), count


def sort_rows(a: np.ndarray) -> np.ndarray:
    a = np.round(a, 3)
    return a[np.lexsort(a.T[::-1])]


def film_for(box, seed=1, n=4, n_frames=1, bonds=True):
    rng = np.random.default_rng(seed)
    centres = lattice_centres(n, 0.15, rng)
    # pin some molecules exactly on a corner, an edge and a face so they are
    # broken across every face and corner of the box after wrapping
    centres[0] = [0.0, 0.0, 0.0]
    centres[1] = [0.0, 0.0, 0.5 / n + 0.37]
    centres[2] = [0.5, 0.0, 0.999]
    u, truth = build_water_universe(centres, box, seed=seed, n_frames=n_frames, bonds=bonds)
    return film_from_universe(u), truth


@pytest.mark.parametrize("box", [ORTHO, TRICLINIC], ids=["orthorhombic", "triclinic"])
@pytest.mark.parametrize("rule", ["atom", "centroid"])
@pytest.mark.parametrize("radius", [6.0, 9.5, 14.0, 26.0])  # 14 and 26 Å exceed half the box
def test_carve_matches_brute_force(box, rule, radius):
    film, truth = film_for(box)
    for center in (0, 1, 2, 37):
        cl = film.carve(center, radius, rule=rule)
        # the central molecule is whole: its shape equals the true shape
        true_c = truth[0].reshape(-1, 3, 3)[center]
        np.testing.assert_allclose(cl.qm_positions - cl.qm_positions.mean(0),
                                   true_c - true_c.mean(0), atol=1e-4)
        ref, n_ref = brute_force(truth[0], box, center, radius, rule)
        got = cl.env_positions - cl.qm_positions.mean(0)
        assert cl.n_env_molecules == n_ref
        assert got.shape == ref.shape
        np.testing.assert_allclose(sort_rows(got), sort_rows(ref), atol=2e-3)
        # whole molecules only, so the environment is exactly neutral
        assert abs(cl.net_env_charge) < 1e-9
        np.testing.assert_allclose(cl.env_charges.reshape(-1, 3), np.tile(TIP3P_Q, (n_ref, 1)))


def test_large_radius_includes_images_of_central_molecule():
    film, truth = film_for(ORTHO)
    cl = film.carve(5, 21.0)  # > box length 18 Å along x
    own = (cl.env_molecules == 5)
    assert own.any(), "periodic images of the central molecule belong to the environment"
    imgs = np.unique(cl.env_images[own], axis=0)
    assert not np.any(np.all(imgs == 0, axis=1)), "the untranslated central molecule is QM, not environment"
    # each (molecule, image) appears exactly once
    keys = np.column_stack([cl.env_molecules, cl.env_images])[::3]
    assert len(np.unique(keys, axis=0)) == len(keys)


def test_qm_shell_moves_whole_neighbours_into_qm():
    film, truth = film_for(ORTHO)
    full = film.carve(10, 12.0)
    shell = film.carve(10, 12.0, qm_shell=5.0)
    assert len(shell.qm_molecules) > 1
    assert shell.n_qm_atoms == 3 * len(shell.qm_molecules)
    # QM + environment together hold the same atoms as without the shell
    both = np.vstack([shell.qm_positions, shell.env_positions])
    ref = np.vstack([full.qm_positions, full.env_positions])
    np.testing.assert_allclose(sort_rows(both), sort_rows(ref), atol=1e-6)
    # every QM neighbour's closest atom is within the shell distance
    c = shell.qm_positions[:3]
    for m in shell.qm_molecules[1:]:
        pts = shell.qm_positions[shell.qm_atom_molecules == m]
        assert cdist(pts, c).min() <= 5.0 + 1e-9


def test_residue_molecules_without_bonds_and_frames():
    film, truth = film_for(ORTHO, bonds=False, n_frames=3)
    assert film.molecule_kind == "residues"
    assert film.n_frames == 3
    for f in range(3):
        cl = film.carve(3, 8.0, frame=f)
        ref, n_ref = brute_force(truth[f], ORTHO, 3, 8.0, "atom")
        np.testing.assert_allclose(sort_rows(cl.env_positions - cl.qm_positions.mean(0)), sort_rows(ref), atol=2e-3)
        assert cl.frame == f


def test_non_periodic_carving_only_on_request():
    u, truth = build_water_universe(lattice_centres(3, 0.1, np.random.default_rng(2)), ORTHO, wrap=False)
    u.trajectory.ts.dimensions = None
    film = film_from_universe(u)
    with pytest.raises(CarvingError, match="no periodic box"):
        film.carve(0, 8.0)
    cl = film.carve(0, 8.0, periodic=False)
    mols = truth[0].reshape(-1, 3, 3)
    d = np.array([cdist(m, mols[0]).min() for m in mols[1:]])
    assert cl.n_env_molecules == int((d <= 8.0).sum())


@pytest.mark.parametrize("kwargs, match", [
    (dict(molecule=999, radius=5.0), "does not exist"),
    (dict(molecule=0, radius=-1.0), "non-negative"),
    (dict(molecule=0, radius=5.0, rule="sphere"), "invalid carving rule"),
    (dict(molecule=0, radius=5.0, frame=7), "out of range"),
    (dict(molecule=0, radius="big"), "number of Å"),
    (dict(molecule=1.5, radius=5.0), "integer id"),
])
def test_bad_carve_arguments(kwargs, match):
    film, _ = film_for(ORTHO)
    with pytest.raises(CarvingError, match=match):
        film.carve(**kwargs)


def test_writers_round_trip(tmp_path):
    import MDAnalysis as mda

    film, _ = film_for(ORTHO)
    cl = film.carve(0, 7.0)
    cl.to_pdb(str(tmp_path / "c.pdb"))
    u = mda.Universe(str(tmp_path / "c.pdb"))
    assert len(u.atoms) == cl.n_qm_atoms + cl.n_charges
    np.testing.assert_allclose(u.atoms.tempfactors[cl.n_qm_atoms:], np.round(cl.env_charges, 2), atol=6e-3)
    text = cl.to_xyz(str(tmp_path / "c.xyz"))
    assert int(text.split()[0]) == cl.n_qm_atoms + cl.n_charges
