"""Least-squares uniform field of a potential over each molecule: exact cases
and the minimum-norm rule for flat molecules."""

from __future__ import annotations

import numpy as np
import pytest

from clusterlab.electrostatics.fieldfit import uniform_field_fit
from clusterlab.errors import InputError


def test_uniform_field_plus_constant_is_recovered_exactly():
    """V(r) = c - F·r (a uniform field F plus a constant c, Coulomb's law of a
    constant field) over the atoms of molecules of different sizes, in shuffled
    atom order: the fit returns F, and V at the atoms' mean position."""
    rng = np.random.default_rng(6)   # every molecule spreads >= 0.34 Å rms in every direction (rank 3)
    sizes = [4, 7, 12, 5]            # at least 4 atoms: 3 points always lie in a plane
    pos = rng.normal(scale=2.0, size=(sum(sizes), 3)) + rng.normal(scale=20.0, size=3)
    atoms = rng.permutation(len(pos))
    offsets = np.r_[0, np.cumsum(sizes)]
    fields = rng.normal(scale=0.3, size=(len(sizes), 3))
    consts = rng.normal(scale=2.0, size=len(sizes))
    v = np.empty(len(pos))
    for m in range(len(sizes)):
        at = atoms[offsets[m]:offsets[m + 1]]
        v[at] = consts[m] - pos[at] @ fields[m]
    fit = uniform_field_fit(pos, v, atoms, offsets)
    assert np.allclose(fit.field_V_A, fields, rtol=0, atol=1e-12)
    assert fit.rank.tolist() == [3, 3, 3, 3]
    for m in range(len(sizes)):
        at = atoms[offsets[m]:offsets[m + 1]]
        assert np.allclose(fit.center_A[m], pos[at].mean(axis=0), atol=1e-12)
        assert fit.center_potential_V[m] == pytest.approx(consts[m] - fit.center_A[m] @ fields[m], abs=1e-12)


def test_planar_molecule_gets_the_in_plane_field_only():
    """A planar molecule (z = 0) in a field with an out-of-plane part: the fit is
    numpy's minimum-norm least-squares solution, the in-plane projection."""
    ang = np.arange(6) * np.pi / 3
    pos = np.c_[1.4 * np.cos(ang), 1.4 * np.sin(ang), np.zeros(6)]
    f = np.array([0.1, -0.2, 0.5])
    v = 0.7 - pos @ f
    fit = uniform_field_fit(pos, v, np.arange(6), np.array([0, 6]))
    ref = -np.linalg.lstsq(pos - pos.mean(axis=0), v - v.mean(), rcond=None)[0]
    assert np.allclose(fit.field_V_A[0], [0.1, -0.2, 0.0], atol=1e-12)
    assert np.allclose(fit.field_V_A[0], ref, atol=1e-12) and fit.rank.tolist() == [2]
    # a single atom has no direction to fit
    one = uniform_field_fit(pos[:1], v[:1], np.array([0]), np.array([0, 1]))
    assert one.field_V_A.tolist() == [[0.0, 0.0, 0.0]] and one.rank.tolist() == [0]


def test_bad_input_is_named():
    pos = np.zeros((3, 3))
    with pytest.raises(InputError, match="positions_A must have shape"):
        uniform_field_fit(np.zeros((3, 2)), np.zeros(3), np.arange(3), [0, 3])
    with pytest.raises(InputError, match="2 potential values for 3 atoms"):
        uniform_field_fit(pos, np.zeros(2), np.arange(3), [0, 3])
    with pytest.raises(InputError, match="no empty molecule"):
        uniform_field_fit(pos, np.zeros(3), np.arange(3), [0, 0, 3])
    with pytest.raises(InputError, match="finite"):
        uniform_field_fit(pos, np.array([0.0, np.nan, 0.0]), np.arange(3), [0, 3])
