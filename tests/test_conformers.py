"""Conformer superposition and family assignment against scipy and exact constructions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from clusterlab.electrostatics.conformers import assign_conformers, pick_references, superpose
from clusterlab.errors import InputError


def test_superpose_matches_scipy_align_vectors():
    """Independent library: scipy's Rotation.align_vectors solves the same
    least-squares (Wahba/Kabsch) problem for proper rotations; the RMSD is
    recomputed here from the aligned coordinates."""
    rng = np.random.default_rng(2)
    ref = rng.normal(size=(9, 3)) * 2.0
    copies = np.stack([ref @ Rotation.random(random_state=k).as_matrix().T + rng.normal(scale=0.3, size=(9, 3))
                       + rng.normal(size=3) * 5 for k in range(6)])
    rot, rmsd = superpose(ref, copies, reflections=False)
    for k in range(6):
        b = copies[k] - copies[k].mean(axis=0)
        a = ref - ref.mean(axis=0)
        sc, _ = Rotation.align_vectors(b, a)
        assert np.allclose(rot[k], sc.as_matrix(), atol=1e-10)
        assert np.isclose(np.linalg.det(rot[k]), 1.0)
        assert rmsd[k] == pytest.approx(np.sqrt(np.mean(np.sum((a @ rot[k].T - b) ** 2, axis=1))), rel=1e-12)


def test_mirror_image_superposes_only_with_reflections():
    rng = np.random.default_rng(3)
    ref = rng.normal(size=(7, 3))
    mirror = ref * np.array([1.0, 1.0, -1.0]) @ Rotation.random(random_state=5).as_matrix().T
    r_o3, d_o3 = superpose(ref, mirror)
    r_so3, d_so3 = superpose(ref, mirror, reflections=False)
    assert d_o3[0] < 1e-12 and np.isclose(np.linalg.det(r_o3[0]), -1.0)
    assert d_so3[0] > 0.1


def test_two_families_are_found_and_assigned():
    """Two shapes (a 'syn' and an 'anti' four-point chain, torsion 0° and 180°),
    each copied with random rotations and 0.05 Å noise: farthest-point sampling
    from a syn copy picks an anti copy next, and every copy goes to its shape."""
    rng = np.random.default_rng(6)

    def chain(torsion_deg):
        t = np.deg2rad(torsion_deg)
        return np.array([[1.0, 1.3, 0], [0.0, 0.7, 0], [0.0, -0.7, 0], [np.cos(t), -1.3, np.sin(t)]]) * 1.4

    shapes = [chain(0.0), chain(180.0)]
    truth = rng.integers(0, 2, size=40)
    truth[0] = 0
    copies = np.stack([shapes[t] @ Rotation.random(random_state=int(k)).as_matrix().T
                       + rng.normal(scale=0.05, size=(4, 3)) for k, t in enumerate(truth)])
    refs = pick_references(copies, 3, first=0, min_rmsd_A=0.5)
    assert len(refs) == 2 and truth[refs[1]] == 1
    fam, rot, rmsd = assign_conformers(copies[refs], copies)
    assert np.array_equal(fam, truth)
    assert rmsd.max() < 0.2
    with pytest.raises(InputError, match="at least 1"):
        pick_references(copies, 0)
    with pytest.raises(InputError, match="do not match"):
        superpose(shapes[0], copies[:, :3])


def test_medoid_references_are_typical_copies():
    """Farthest-point sampling picks a family's extreme; the medoid step moves each
    reference to the member with the smallest summed RMSD to its family, checked
    here by brute force over all members."""
    rng = np.random.default_rng(9)
    base = np.array([[0.0, 0, 0], [1.5, 0, 0], [2.2, 1.2, 0], [3.6, 1.3, 0.4]])
    copies = np.stack([base + rng.normal(scale=0.1 * (1 + k % 5), size=base.shape) for k in range(30)])
    far = pick_references(copies, 1, first=int(np.argmax([np.abs(c - base).sum() for c in copies])))
    med = pick_references(copies, 1, first=int(far[0]), medoids=True)
    sums = [superpose(copies[a], copies)[1].sum() for a in range(len(copies))]
    assert int(med[0]) == int(np.argmin(sums))
    assert sums[int(med[0])] < sums[int(far[0])]


def test_equivalence_classes_and_symmetrized_charges():
    """Colour refinement on the demo film's 2,2'-bithiophene (bonds from covalent radii): the ring
    swap A<->B is an automorphism of the bond graph (checked by brute force on the
    bond list) and its atom pairs are exactly the classes found; the symmetrized
    charges are invariant under the swap and keep every state's total charge."""
    from clusterlab.electrostatics.conformers import bonds_by_distance, equivalence_classes
    from clusterlab.electrostatics.chargeset import StateChargeSet

    import warnings

    from clusterlab import load_film
    from clusterlab.demo import demo_paths

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(*demo_paths())
    atoms = film.molecule_atoms(0)                            # ring A then ring B, same atom order
    syms = list(film.symbols[atoms])
    bonds = bonds_by_distance(syms, film.frame_geometry(0).positions_A[atoms])
    assert len(bonds) == 17                                   # 2 x (5 ring + 3 CH) + the inter-ring bond
    swap = np.r_[8:16, 0:8]
    as_set = {tuple(sorted(b)) for b in bonds.tolist()}
    assert {tuple(sorted((int(swap[a]), int(swap[b])))) for a, b in bonds} == as_set
    lab = equivalence_classes(syms, bonds)
    assert np.array_equal(lab, lab[swap]) and len(set(lab.tolist())) == 8
    rng = np.random.default_rng(1)
    q = {s: rng.normal(scale=0.2, size=16) for s in ("S0", "S1", "cation")}
    q["cation"] += (1.0 - q["cation"].sum()) / 16
    sym = StateChargeSet.from_arrays({"BTH": q}).symmetrized({"BTH": lab})
    for s, v in sym.charges_e["BTH"].items():
        assert np.allclose(v, v[swap]) and v.sum() == pytest.approx(q[s].sum(), abs=1e-12)
