"""Film files that are unusual or damaged: a LAMMPS data file without names,
empty files, a truncated XTC, and bonds that disagree with residues."""

from __future__ import annotations

import warnings

import MDAnalysis as mda
import numpy as np
import pytest

from clusterlab import film_from_universe, load_film
from clusterlab.errors import FilmError, MoleculeBoundaryWarning
from clusterlab.film import hill_formula

from conftest import build_water_universe, lattice_centres

# two invented molecules, atom_style full (id mol type charge x y z): a
# thiophene-like C4H4S ring (net 0) and a water (net 0); masses only, no names
LAMMPS_DATA = """two small molecules, invented for this test

14 atoms
12 bonds
4 atom types
1 bond types

0.0 20.0 xlo xhi
0.0 20.0 ylo yhi
0.0 20.0 zlo zhi

Masses

1 12.011
2 1.008
3 32.06
4 15.9994

Atoms # full

1 1 3 -0.20 5.000 5.000 5.000
2 1 1 -0.05 6.220 5.000 6.150
3 1 1 -0.10 5.710 5.000 7.450
4 1 1 -0.10 4.290 5.000 7.450
5 1 1 -0.05 3.780 5.000 6.150
6 1 2 0.12 7.270 5.000 5.880
7 1 2 0.13 6.330 5.000 8.340
8 1 2 0.13 3.670 5.000 8.340
9 1 2 0.12 2.730 5.000 5.880
10 2 4 -0.80 12.000 12.000 12.000
11 2 2 0.40 12.960 12.000 12.000
12 2 2 0.40 11.760 12.930 12.000
13 1 2 0.00 5.000 3.700 5.000
14 1 2 0.00 5.000 6.300 5.000

Bonds

1 1 1 2
2 1 2 3
3 1 3 4
4 1 4 5
5 1 5 1
6 1 2 6
7 1 3 7
8 1 4 8
9 1 5 9
10 1 10 11
11 1 10 12
12 1 1 13
"""


def _data_file(tmp_path, text=LAMMPS_DATA):
    path = tmp_path / "film.data"
    path.write_text(text)
    return path


def test_hill_formula_order():
    # Hill (1900): carbon first, hydrogen second, then alphabetical; all alphabetical without carbon
    assert hill_formula(["S", "C", "H", "C", "H", "S", "C"] + ["C"] * 5 + ["H"] * 4) == "C8H6S2"
    assert hill_formula(["O", "H", "H"]) == "H2O"
    assert hill_formula(["Cl", "Na"]) == "ClNa"
    assert hill_formula(["Br", "C", "H", "H", "H"]) == "CH3Br"


def test_lammps_data_without_names_loads(tmp_path):
    # atoms 13, 14 bond to the sulfur and to nothing: 13 is bonded (S-H), 14 is a lone
    # H of molecule 1 that makes that residue two fragments (warned below)
    with pytest.warns(MoleculeBoundaryWarning, match=r"residue C4H6S 1 is 2 fragments"):
        film = load_film(_data_file(tmp_path), atom_style="id resid type charge x y z")
    assert film.symbols.tolist() == ["S", "C", "C", "C", "C", "H", "H", "H", "H", "O", "H", "H", "H", "H"]
    assert film.molecule_kind == "fragments" and film.n_molecules == 3
    mols = film.molecules
    assert mols.formula.tolist() == ["C4H5S", "H2O", "H"]
    # the composition names are the molecules' resnames (the interface species names come from)
    assert film.molecule_resnames.tolist() == ["C4H5S", "H2O", "H"]
    assert mols.resname.tolist() == ["C4H5S", "H2O", "H"]
    # the universe's residues are named by their composition too, and atoms by element and number
    assert film.universe.residues.resnames.tolist() == ["C4H6S", "H2O"]
    assert film.universe.atoms.names[:6].tolist() == ["S1", "C1", "C2", "C3", "C4", "H1"]
    assert film.select("resname H2O").tolist() == [1]
    np.testing.assert_allclose(film.charges[:3], [-0.20, -0.05, -0.10], atol=1e-6)
    np.testing.assert_allclose(mols.charge, [0.0, 0.0, 0.0], atol=1e-6)
    assert film.has_box and film.n_frames == 1


def test_lammps_data_one_molecule_per_residue_warns_nothing(tmp_path):
    text = LAMMPS_DATA.replace("14 atoms", "12 atoms").replace("12 bonds", "11 bonds")
    text = "\n".join(l for l in text.splitlines() if not l.startswith(("13 1 2", "14 1 2", "12 1 1 13")))
    with warnings.catch_warnings():
        warnings.simplefilter("error", MoleculeBoundaryWarning)
        film = load_film(_data_file(tmp_path, text + "\n"), atom_style="id resid type charge x y z")
    assert film.molecules.resname.tolist() == ["C4H4S", "H2O"]
    assert film.universe.residues.resnames.tolist() == ["C4H4S", "H2O"]
    np.testing.assert_allclose(film.molecules.charge, [0.0, 0.0], atol=1e-6)


@pytest.mark.parametrize("name", ["film.gro", "film.pdb", "film.psf", "film.data"])
def test_empty_topology_is_named(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(b"")
    with pytest.raises(FilmError, match=r"is empty \(0 bytes\)") as err:
        load_film(path)
    assert name in str(err.value) and "ompress" not in str(err.value)


BOX = np.array([12.0, 12.0, 12.0, 90.0, 90.0, 90.0])


@pytest.fixture
def water_xtc(tmp_path):
    u, _ = build_water_universe(lattice_centres(2, 0.05, np.random.default_rng(0)), BOX, n_frames=5)
    pdb, xtc = tmp_path / "w.pdb", tmp_path / "w.xtc"
    u.atoms.write(str(pdb))
    with mda.Writer(str(xtc), len(u.atoms)) as w:
        for _ in u.trajectory:
            w.write(u.atoms)
    return pdb, xtc


def test_empty_trajectory_is_named(water_xtc, tmp_path):
    pdb, _ = water_xtc
    empty = tmp_path / "none.xtc"
    empty.write_bytes(b"")
    with pytest.raises(FilmError, match=r"'.*none\.xtc' is empty \(0 bytes\); give a trajectory"):
        load_film(pdb, empty)


def test_truncated_xtc_is_named_at_load(water_xtc, tmp_path):
    """Every cut of a 5-frame XTC either loads with only whole frames, all of
    which read, or fails at load naming the file (and, for a cut inside a
    later frame, the frame and the readable count)."""
    pdb, xtc = water_xtc
    data = xtc.read_bytes()
    frame_bytes = len(data) // 5  # equal-sized frames: same atoms, same precision, smooth coordinates
    seen = {"loaded": 0, "named frame": 0, "named file": 0}
    for n in range(8, len(data), 13):
        cut = tmp_path / f"cut{n}.xtc"
        cut.write_bytes(data[:n])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                film = load_film(pdb, cut)
            except FilmError as exc:
                msg = str(exc)
                assert f"cut{n}.xtc" in msg, msg
                if "is truncated" in msg:
                    k = int(msg.split("the last of ")[1].split(")")[0])
                    assert f"frame {k - 1} (the last of {k}) cannot be read" in msg
                    assert f"the {k - 1} frame(s) before it are readable" in msg
                    assert k - 1 == n // frame_bytes  # the whole frames before the cut
                    seen["named frame"] += 1
                else:
                    assert n < 2 * frame_bytes, msg  # only a cut in the first frames fails to open
                    seen["named file"] += 1
                continue
            assert film.n_frames == n // frame_bytes  # whole frames only
            for f in range(film.n_frames):
                film.frame_geometry(f)
            seen["loaded"] += 1
    assert all(v > 0 for v in seen.values()), seen


def test_frame_unreadable_after_load_is_named(water_xtc, monkeypatch):
    pdb, xtc = water_xtc
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(pdb, xtc)
    reader = type(film.universe.trajectory)

    def cut_off(self, frame):  # what the XTC decoder raises for a file cut after loading
        raise OSError("XTC read error = compression")

    monkeypatch.setattr(reader, "_read_frame", cut_off)
    with pytest.raises(FilmError, match=r"frame 4 of .*w\.xtc.* cannot be read: XTC read error"):
        film.frame_geometry(4)


def _bonded_waters(bonds):
    u, _ = build_water_universe(lattice_centres(2, 0.05, np.random.default_rng(1)), BOX, bonds=False)
    u.add_TopologyAttr("bonds", bonds)
    return u


def test_residue_of_two_fragments_is_warned():
    # residue 1 (atoms 3, 4, 5) loses its O-H2 bond: atom 5 is a molecule of its own
    bonds = [(3 * i, 3 * i + 1) for i in range(8)] + [(3 * i, 3 * i + 2) for i in range(8) if i != 1]
    with pytest.warns(MoleculeBoundaryWarning, match=r"residue WAT 2 is 2 fragments \(molecules \[1, 2\]\)"):
        film = film_from_universe(_bonded_waters(bonds))
    assert film.n_molecules == 9


def test_fragment_over_two_residues_is_warned():
    # a stray bond O(residue 3)-O(residue 4) fuses two waters into one molecule
    bonds = [(3 * i, 3 * i + 1) for i in range(8)] + [(3 * i, 3 * i + 2) for i in range(8)] + [(9, 12)]
    with pytest.warns(MoleculeBoundaryWarning, match=r"molecule 3 spans residues WAT 4, WAT 5"):
        film = film_from_universe(_bonded_waters(bonds))
    assert film.n_molecules == 7


def test_consistent_bonds_and_residues_warn_nothing():
    bonds = [(3 * i, 3 * i + 1) for i in range(8)] + [(3 * i, 3 * i + 2) for i in range(8)]
    with warnings.catch_warnings():
        warnings.simplefilter("error", MoleculeBoundaryWarning)
        assert film_from_universe(_bonded_waters(bonds)).n_molecules == 8
