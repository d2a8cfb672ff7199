"""Checks of the committed demo film in ``demo_traj/`` (2,2'-bithiophene, 256 molecules).

The files are read with MDAnalysis directly, so these tests do not depend on
clusterlab's own loader. Geometry here is computed with plain numpy
(minimum-image vectors written out), independently of the generator script.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

mda = pytest.importorskip("MDAnalysis")

DEMO = Path(__file__).resolve().parent.parent / "demo_traj"
PSF = DEMO / "bithiophene_film.psf"
XTC = DEMO / "bithiophene_film.xtc"
PDB = DEMO / "bithiophene_film.pdb"
N_MOL, N_PER, N_FRAMES = 256, 16, 20
AVOGADRO = 6.02214076e23  # SI 2019, exact
# Atom order of one molecule (see demo_traj/README.md): ring A 0..7, ring B 8..15,
# S1 C2 C3 C4 C5 H3 H4 H5; the inter-ring bond is C2A-C2B (0-based 1 and 9).
SCCS = [0, 1, 9, 8]


@pytest.fixture(scope="module")
def universe():
    return mda.Universe(str(PSF), str(XTC))


@pytest.fixture(scope="module")
def frames(universe):
    """Positions (n_frames, n_mol, 16, 3) Å and boxes (n_frames, 6)."""
    pos, box = [], []
    for ts in universe.trajectory:
        pos.append(universe.atoms.positions.reshape(N_MOL, N_PER, 3).astype(np.float64))
        box.append(ts.dimensions.astype(np.float64))
    return np.array(pos), np.array(box)


def _whole(pos, box):
    """Make each molecule whole: minimum-image vectors from its first atom (orthorhombic box)."""
    lengths = box[:, None, None, :3]
    d = pos - pos[:, :, :1, :]
    d -= lengths * np.round(d / lengths)
    return pos[:, :, :1, :] + d


def _dihedral_deg(p):
    b0, b1, b2 = p[..., 0, :] - p[..., 1, :], p[..., 2, :] - p[..., 1, :], p[..., 3, :] - p[..., 2, :]
    b1 = b1 / np.linalg.norm(b1, axis=-1, keepdims=True)
    v = b0 - (b0 * b1).sum(-1, keepdims=True) * b1
    w = b2 - (b2 * b1).sum(-1, keepdims=True) * b1
    return np.degrees(np.arctan2((np.cross(b1, v) * w).sum(-1), (v * w).sum(-1)))


def test_files_are_commit_sized():
    total = sum(p.stat().st_size for p in DEMO.iterdir() if p.is_file())
    assert total < 10 * 1024 * 1024


def test_topology_atoms_residues_fragments(universe):
    u = universe
    assert u.atoms.n_atoms == N_MOL * N_PER
    assert u.residues.n_residues == N_MOL
    assert set(u.residues.resnames) == {"BTH"}
    frags = u.atoms.fragments
    assert len(frags) == N_MOL
    assert all(f.n_atoms == N_PER for f in frags)
    # each fragment is one residue and has the formula C8H6S2 (2,2'-bithiophene)
    for f in frags[:: 37]:
        assert f.residues.n_residues == 1
        # PSF has no element column: elements follow from the masses (IUPAC weights)
        el = [{12: "C", 1: "H", 32: "S"}[int(round(m))] for m in f.masses]
        assert el.count("C") == 8 and el.count("H") == 6 and el.count("S") == 2
    # 17 bonds per molecule: 2 x (5 ring + 3 C-H) + 1 inter-ring
    assert len(u.bonds) == 17 * N_MOL
    # masses are standard atomic weights (IUPAC): C 12.011, H 1.008, S 32.06
    m = u.atoms.masses[:N_PER]
    assert m.sum() == pytest.approx(166.26, abs=0.02)


def test_charges_neutral_and_symmetric(universe):
    q = universe.atoms.charges.astype(np.float64).reshape(N_MOL, N_PER)
    assert np.abs(q.sum(axis=1)).max() < 1e-3          # integer (zero) net charge per molecule
    assert np.allclose(q, q[0], atol=1e-6)             # one charge set for all molecules
    # the two rings carry the same charges (C2h symmetry of anti bithiophene)
    assert np.allclose(q[0, :8], q[0, 8:], atol=1e-6)
    # hence each ring is neutral on its own
    assert abs(q[0, :8].sum()) < 1e-3
    # not a degenerate fit: ring hydrogens positive, charges of chemical size
    assert np.all(q[0, 5:8] > 0.0)
    assert 0.05 < np.abs(q[0]).max() < 1.0


def test_charges_match_forcefield_record(universe):
    ff = json.loads((DEMO / "forcefield.json").read_text())
    q_ff = np.array([a["charge_e"] for a in ff["atoms"]])
    assert np.allclose(universe.atoms.charges[:N_PER], q_ff, atol=1e-5)
    assert [a["name"] for a in ff["atoms"]] == list(universe.atoms.names[:N_PER])


def test_trajectory_frames_and_box(universe, frames):
    _, box = frames
    assert universe.trajectory.n_frames == N_FRAMES
    assert box.shape == (N_FRAMES, 6)
    assert np.allclose(box[:, 3:], 90.0)               # written as an orthorhombic (cubic) box
    assert np.all(box[:, :3] > 30.0) and np.all(box[:, :3] < 60.0)
    assert np.allclose(box[:, 0], box[:, 1]) and np.allclose(box[:, 0], box[:, 2])
    # NPT production: the box breathes a little from frame to frame
    assert np.ptp(box[:, 0]) > 0.0


def test_density_plausible(universe, frames):
    _, box = frames
    mass_g = universe.atoms.masses.sum() / AVOGADRO
    rho = mass_g / (np.prod(box[:, :3], axis=1) * 1e-24)
    # crystal density of 2,2'-bithiophene about 1.4 g/cm^3 (from memory); an amorphous
    # film from a short demo run somewhat lower. Liquid thiophene is 1.06 g/cm^3 at
    # 20 C (CRC Handbook, from memory), a floor the packed film must exceed.
    assert np.all(rho > 1.10) and np.all(rho < 1.55)
    rec = json.loads((DEMO / "build_record.json").read_text())
    assert rec["density_g_cm3_production_mean"] == pytest.approx(rho.mean(), rel=2e-3)


def test_positions_wrapped_and_molecules_broken(frames):
    pos, box = frames
    lengths = box[:, None, None, :3]
    tol = 0.02                                        # XTC precision 0.001 nm
    assert np.all(pos > -tol) and np.all(pos < lengths + tol)
    span = pos.max(axis=2) - pos.min(axis=2)          # (frames, mol, 3)
    broken = np.any(span > 0.5 * box[:, None, :3], axis=2)
    assert broken.sum(axis=1).min() >= 5              # every frame has molecules cut by a face
    whole = _whole(pos, box)
    span_w = np.linalg.norm(whole.max(axis=2) - whole.min(axis=2), axis=2)
    assert span_w.max() < 12.0                        # made whole, a molecule is ~9 Å long
    # bonds are chemical lengths once whole: C2A-C2B about 1.46 Å
    r = np.linalg.norm(whole[:, :, 1] - whole[:, :, 9], axis=-1)
    assert 1.35 < r.mean() < 1.55


def test_torsional_disorder(frames):
    pos, box = frames
    phi = _dihedral_deg(_whole(pos, box)[:, :, SCCS, :])          # (frames, mol), deg
    aphi = np.abs(phi)
    # disorder across molecules and thermal motion across frames
    assert aphi.std() > 10.0
    assert np.mean(np.abs(aphi[-1] - aphi[0])) > 3.0
    # the isolated molecule has two twisted minima, anti-gauche near 148 deg and
    # syn-gauche near 42 deg (Raos, Famulari, Marcon, Chem. Phys. Lett. 379, 364 (2003),
    # from memory): both conformer families are populated, the planar barrier tops
    # (0 and 180 deg) and the 90-deg barrier are rarely occupied
    anti = (aphi > 90).mean()
    assert 0.3 < anti < 0.9
    near_minima = ((aphi > 20) & (aphi < 70)) | ((aphi > 120) & (aphi < 175))
    assert near_minima.mean() > 0.6
    assert ((aphi > 80) & (aphi < 100)).mean() < 0.1


def test_ring_dipoles_cancel_in_anti(universe, frames):
    pos, box = frames
    whole = _whole(pos, box)[0]                                   # frame 0, (mol, 16, 3)
    q = universe.atoms.charges.astype(np.float64)[:N_PER]
    debye_e_A = 0.2081943                                          # 1 D in e Å (CODATA)
    mu_a = np.einsum("i,mij->mj", q[:8], whole[:, :8]) / debye_e_A
    mu_b = np.einsum("i,mij->mj", q[8:], whole[:, 8:]) / debye_e_A
    mu = mu_a + mu_b
    # each ring is neutral, so its dipole is origin free; it must be clearly nonzero
    # for the cancellation check below to mean anything (common practice)
    ring = np.linalg.norm(mu_a, axis=1)
    assert 0.3 < np.median(ring) < 4.0
    # anti conformer is centrosymmetric: the ring dipoles nearly cancel
    phi = np.abs(_dihedral_deg(whole[:, SCCS, :]))
    anti = phi > 150
    assert anti.sum() > 20
    ratio = np.linalg.norm(mu, axis=1) / (ring + np.linalg.norm(mu_b, axis=1))
    assert np.median(ratio[anti]) < 0.35
    # syn-like molecules, where present, have the ring dipoles adding up
    syn = phi < 60
    if syn.sum() >= 3:
        assert np.median(ratio[syn]) > np.median(ratio[anti])


def test_viewer_pdb_matches(universe):
    ref = mda.Universe(str(PDB))
    assert ref.atoms.n_atoms == universe.atoms.n_atoms
    assert ref.dimensions is not None
    universe.trajectory[0]
    assert np.allclose(ref.atoms.positions, universe.atoms.positions, atol=0.01)
    assert list(ref.atoms.names[:N_PER]) == list(universe.atoms.names[:N_PER])
