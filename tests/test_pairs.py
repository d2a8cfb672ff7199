"""Neighbour pairs against an independent brute-force minimum-image search."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from clusterlab.errors import InputError
from clusterlab.transport.pairs import PAIR_COLUMNS, neighbour_pairs


def _box_matrix(box):
    """Rows = box vectors, from [lx, ly, lz, alpha, beta, gamma] (standard
    crystallographic convention, a along x, b in the xy plane), written here
    independently of MDAnalysis."""
    lx, ly, lz, al, be, ga = box
    al, be, ga = np.radians([al, be, ga])
    a = np.array([lx, 0.0, 0.0])
    b = np.array([ly * np.cos(ga), ly * np.sin(ga), 0.0])
    cx = lz * np.cos(be)
    cy = lz * (np.cos(al) - np.cos(be) * np.cos(ga)) / np.sin(ga)
    c = np.array([cx, cy, np.sqrt(lz**2 - cx**2 - cy**2)])
    return np.array([a, b, c])


def _images(box):
    H = _box_matrix(box)
    n = np.array([(x, y, z) for x in (-1, 0, 1) for y in (-1, 0, 1) for z in (-1, 0, 1)])
    return n @ H  # (27, 3) image shifts


def _brute_centroid_pairs(c, cutoff, box):
    """All pairs i<j, explicit loop over the 27 images, min distance."""
    shifts = _images(box) if box is not None else np.zeros((1, 3))
    n = len(c)
    rows = []
    for i in range(n):
        for j in range(i + 1, n):
            cand = c[j] - c[i] + shifts
            d = np.linalg.norm(cand, axis=1)
            k = np.argmin(d)
            if d[k] <= cutoff:
                rows.append((i, j, d[k], *cand[k]))
    return pd.DataFrame(rows, columns=list(PAIR_COLUMNS))


def _brute_min_atom(atoms, i, j, box):
    shifts = _images(box) if box is not None else np.zeros((1, 3))
    diff = atoms[j][None, :, None, :] - atoms[i][:, None, None, :] + shifts[None, None]
    return np.linalg.norm(diff, axis=-1).min()


def _film(box, n, rng):
    H = _box_matrix(box)
    frac = rng.random((n, 3))
    # a few molecules straddling faces: just inside opposite faces along each vector
    frac[0] = [0.01, 0.5, 0.5]
    frac[1] = [0.99, 0.5, 0.52]
    frac[2] = [0.3, 0.005, 0.97]
    frac[3] = [0.31, 0.995, 0.02]
    return frac @ H


BOXES = [
    np.array([30.0, 32.0, 34.0, 90.0, 90.0, 90.0]),
    np.array([30.0, 32.0, 34.0, 80.0, 95.0, 70.0]),
]


@pytest.mark.parametrize("box", BOXES, ids=["orthorhombic", "triclinic"])
def test_centroid_pairs_match_brute_force(box):
    rng = np.random.default_rng(42)
    c = _film(box, 150, rng)
    cutoff = 9.0
    got = neighbour_pairs(c, cutoff, box=box)
    ref = _brute_centroid_pairs(c, cutoff, box)
    # borderline pairs (within 1e-4 Å of the cutoff) may differ: the search inside
    # MDAnalysis compares in single precision
    assert list(got.columns) == list(PAIR_COLUMNS)
    assert (got.i < got.j).all()
    assert not got.duplicated(["i", "j"]).any()
    g = got.set_index(["i", "j"])
    r = ref.set_index(["i", "j"])
    common = g.index.intersection(r.index)
    only = g.index.symmetric_difference(r.index)
    for i, j in only:
        d = g.loc[(i, j), "distance_A"] if (i, j) in g.index else r.loc[(i, j), "distance_A"]
        assert abs(d - cutoff) < 1e-4, f"pair {(i, j)} at {d} Å disagrees"
    assert len(common) > 100
    # 1e-5 Å: MDAnalysis holds triclinic box vectors in single precision (observed
    # deviations up to 4e-7 Å); orthorhombic boxes agree to 1e-12
    np.testing.assert_allclose(g.loc[common].values, r.loc[common].values, atol=1e-5)
    # pairs across the box faces are found with short minimum-image vectors
    assert g.loc[(0, 1), "distance_A"] < 2.0
    assert g.loc[(2, 3), "distance_A"] < 2.0


def test_no_box_is_plain_distance():
    rng = np.random.default_rng(1)
    c = rng.random((60, 3)) * 25
    got = neighbour_pairs(c, 7.0).set_index(["i", "j"])
    ref = _brute_centroid_pairs(c, 7.0, None).set_index(["i", "j"])
    assert set(got.index) == set(ref.index)
    np.testing.assert_allclose(got.loc[ref.index].values, ref.values, atol=1e-8)


@pytest.mark.parametrize("box", BOXES, ids=["orthorhombic", "triclinic"])
def test_closest_atom_pairs_match_brute_force(box):
    rng = np.random.default_rng(7)
    n = 40
    c = _film(box, n, rng)
    # three atoms per molecule, within 2 Å of the centroid, some outside the box
    atoms = [ci + rng.uniform(-2, 2, size=(3, 3)) for ci in c]
    cutoff = 5.0
    got = neighbour_pairs(c, cutoff, box=box, criterion="atom", atom_positions_A=atoms)
    brute = {}
    for i in range(n):
        for j in range(i + 1, n):
            d = _brute_min_atom(atoms, i, j, box)
            if d <= cutoff:
                brute[(i, j)] = d
    g = got.set_index(["i", "j"])
    for key in set(g.index) ^ set(brute):
        d = g.loc[key, "min_atom_distance_A"] if key in g.index else brute[key]
        assert abs(d - cutoff) < 1e-4
    keys = sorted(set(g.index) & set(brute))
    assert len(keys) > 10
    np.testing.assert_allclose(
        g.loc[keys, "min_atom_distance_A"].values, [brute[k] for k in keys], atol=1e-5
    )
    # flat array + molecule index gives the same table as the list form
    flat = np.concatenate(atoms)
    mol = np.repeat(np.arange(n), 3)
    perm = rng.permutation(len(flat))
    got2 = neighbour_pairs(
        c, cutoff, box=box, criterion="atom", atom_positions_A=flat[perm], atom_molecule=mol[perm]
    )
    pd.testing.assert_frame_equal(got, got2)
    # centroid criterion with the extra column
    t = neighbour_pairs(c, 9.0, box=box, atom_positions_A=atoms, with_min_atom_distance=True)
    for (i, j), d in t.set_index(["i", "j"])["min_atom_distance_A"].items():
        assert d == pytest.approx(_brute_min_atom(atoms, i, j, box), abs=1e-5)


def test_errors():
    c = np.zeros((2, 3))
    with pytest.raises(InputError, match="cutoff_A"):
        neighbour_pairs(c, -1.0)
    with pytest.raises(InputError, match="box must be"):
        neighbour_pairs(c, 1.0, box=[10, 10, 90, 90, 90])
    with pytest.raises(InputError, match="needs atom_positions_A"):
        neighbour_pairs(c, 1.0, criterion="atom")
    with pytest.raises(InputError, match="pair criterion"):
        neighbour_pairs(c, 1.0, criterion="com")
    with pytest.raises(InputError, match="molecules but there are 2"):
        neighbour_pairs(c, 1.0, criterion="atom", atom_positions_A=[np.zeros((1, 3))])
