"""Film loading from files MDAnalysis reads, charge sources, and bad input."""

from __future__ import annotations

import warnings
from pathlib import Path

import MDAnalysis as mda
import numpy as np
import pytest

from clusterlab import load_film
from clusterlab.charges import MoleculeTypeCharges
from clusterlab.errors import ChargeError, FilmError
from clusterlab.film import GuessedElementsWarning

from conftest import TIP3P_Q, build_water_universe, lattice_centres

BOX = np.array([15.0, 15.0, 15.0, 90.0, 90.0, 90.0])


@pytest.fixture
def water_files(tmp_path):
    u, truth = build_water_universe(lattice_centres(3, 0.1, np.random.default_rng(0)), BOX, n_frames=4)
    gro = tmp_path / "w.gro"
    xtc = tmp_path / "w.xtc"
    pqr = tmp_path / "w.pqr"
    u.atoms.write(str(gro))
    with mda.Writer(str(xtc), len(u.atoms)) as w:
        for _ in u.trajectory:
            w.write(u.atoms)
    u.trajectory[0]
    u.add_TopologyAttr("radii", [1.5, 1.0, 1.0] * (len(u.atoms) // 3))
    u.atoms.write(str(pqr))
    return dict(gro=str(gro), xtc=str(xtc), pqr=str(pqr), n_mol=27, tmp=tmp_path)


def test_gro_xtc_with_charge_table_csv(water_files):
    csv = water_files["tmp"] / "q.csv"
    csv.write_text("resname,name,charge\nWAT,OW,-0.834\nWAT,HW1,0.417\nWAT,HW2,0.417\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(water_files["gro"], water_files["xtc"], charges=str(csv))
    assert film.n_frames == 4
    assert film.molecule_kind == "residues"  # GRO carries no bonds
    m = film.molecules
    assert list(m.columns[:6]) == ["molecule", "resname", "resid", "n_atoms", "charge", "formula"]
    assert len(m) == 27 and set(m.formula) == {"H2O"} and np.allclose(m.charge, 0.0)
    np.testing.assert_allclose(film.charges, np.tile(TIP3P_Q, 27))
    cl = film.carve(0, 6.0, frame=2)
    assert cl.frame == 2 and cl.n_charges % 3 == 0


def test_pqr_topology_charges(water_files):
    film = load_film(water_files["pqr"])
    np.testing.assert_allclose(film.charges, np.tile(TIP3P_Q, 27), atol=1e-4)
    assert film.n_frames == 1


def test_mapping_by_atom_name_and_per_residue_order(water_files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        f1 = load_film(water_files["gro"], charges={"OW": -0.8, "HW1": 0.4, "HW2": 0.4})
        f2 = load_film(water_files["gro"], charges={"WAT": [-0.8, 0.4, 0.4]})
        f3 = load_film(water_files["gro"], charges=MoleculeTypeCharges({"WAT": [-0.8, 0.4, 0.4]}))
    np.testing.assert_allclose(f1.charges, f2.charges)
    np.testing.assert_allclose(f1.charges, f3.charges)
    assert f1.film_id == f2.film_id  # same charges give the same content id
    f4 = load_film(water_files["gro"], charges={"WAT": [-0.6, 0.3, 0.3]})
    assert f4.film_id != f1.film_id


def test_atom_count_mismatch_names_both_files(water_files, tmp_path):
    u = mda.Universe(water_files["gro"])
    small = tmp_path / "small.xtc"
    with mda.Writer(str(small), 30) as w:
        w.write(u.atoms[:30])
    with pytest.raises(FilmError, match=r"different numbers of atoms.*small\.xtc|small\.xtc.*different numbers of atoms"):
        load_film(water_files["gro"], str(small))


def test_missing_file():
    with pytest.raises(FilmError, match="File not found: 'nope.gro'"):
        load_film("nope.gro")


def test_no_charges_when_needed(water_files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(water_files["gro"])
    assert np.isnan(film.molecules.charge).all()
    with pytest.raises(ChargeError, match=r"w\.gro.*carries no partial charges"):
        film.carve(0, 5.0)


def test_non_integer_molecular_charge(water_files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(water_files["gro"], charges={"OW": -0.8, "HW1": 0.41, "HW2": 0.41})
    with pytest.raises(ChargeError, match=r"not an integer within 0\.001 e.*molecule 0 \(WAT\) net \+0\.0200 e"):
        film.carve(0, 5.0)
    assert np.allclose(film.molecules.charge, 0.02)  # the table shows the culprits


def test_missing_table_entry_names_atoms(water_files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(water_files["gro"], charges={"OW": -0.834, "HW1": 0.417})
    with pytest.raises(ChargeError, match=r"no charge for 27 atom\(s\).*WAT:HW2"):
        film.charges


def test_no_box(tmp_path):
    u, _ = build_water_universe(lattice_centres(2, 0.1, np.random.default_rng(0)), BOX, wrap=False)
    pdb = tmp_path / "nobox.pdb"
    u.trajectory.ts.dimensions = None
    u.atoms.write(str(pdb))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(str(pdb), charges={"OW": -0.834, "HW1": 0.417, "HW2": 0.417})
    assert not film.has_box
    with pytest.raises(Exception, match="no periodic box.*periodic=False"):
        film.carve(0, 5.0)
    assert film.carve(0, 50.0, periodic=False).n_env_molecules == 7


def test_element_guessing_is_reported(tmp_path):
    # a PDB without element columns: elements must be guessed from the names
    text = ["CRYST1   20.000   20.000   20.000  90.00  90.00  90.00 P 1           1"]
    names = ["C1", "O1", "N1", "H1"]
    for i, nm in enumerate(names):
        text.append(f"ATOM  {i + 1:5d} {nm:<4s} UNK A   1    {i * 1.2:8.3f}{0:8.3f}{0:8.3f}  1.00  0.00          ")
    text.append("END")
    p = tmp_path / "noelem.pdb"
    p.write_text("\n".join(text) + "\n")
    with pytest.warns(GuessedElementsWarning, match="elements guessed for 4 of 4 atoms, 4 from the atom name"):
        film = load_film(str(p))
    assert list(film.symbols) == ["C", "O", "N", "H"]
    assert list(film.guessed_elements.element) == ["C", "O", "N", "H"]


def test_guessed_elements_of_a_whole_film_are_one_line_with_details_on_request(caplog):
    # the demo film's PSF names its atoms (C2A, S1B, ...) but gives no element column: loading it used
    # to print a long warning listing the guesses; now one line with the count and the rule
    root = Path(__file__).resolve().parents[1] / "demo_traj"
    with caplog.at_level("DEBUG", logger="clusterlab.film"):
        with warnings.catch_warnings(record=True) as rec:
            warnings.simplefilter("always")
            film = load_film(str(root / "bithiophene_film.psf"))
    guessed = [w for w in rec if issubclass(w.category, GuessedElementsWarning)]
    assert len(guessed) == 1
    text = str(guessed[0].message)
    assert "\n" not in text and len(text) < 300
    assert "elements guessed for 4096 of 4096 atoms, 4096 from the atom name" in text
    assert "Film.guessed_elements" in text
    # the details: every atom in the table, one DEBUG line per residue/atom name (16 names of BTH)
    assert len(film.guessed_elements) == film.n_atoms == 4096
    names = film.guessed_elements.groupby(["resname", "name"]).ngroups
    debug = [r for r in caplog.records if r.levelname == "DEBUG" and "->" in r.getMessage()]
    assert names == 16 and len(debug) == names
    # element counts agree with the film's formula (C8H6S2 x 256)
    assert film.guessed_elements.element.value_counts().to_dict() == {"C": 2048, "H": 1536, "S": 512}


def test_unknown_element_is_an_error(tmp_path):
    text = ["CRYST1   20.000   20.000   20.000  90.00  90.00  90.00 P 1           1",
            "ATOM      1 QQ9  UNK A   1       0.000   0.000   0.000  1.00  0.00          ",
            "END"]
    p = tmp_path / "bad.pdb"
    p.write_text("\n".join(text) + "\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(FilmError, match=r"Cannot determine the element.*QQ9"):
            load_film(str(p))


def test_selection_and_describe(water_files):
    film = load_film(water_files["pqr"])
    assert list(film.select("resname WAT")) == list(range(27))
    assert list(film.select([3, 4])) == [3, 4]
    with pytest.raises(ValueError, match="matches no atoms"):
        film.select("resname XYZ")
    text = film.describe()
    assert "27 x WAT (H2O)" in text


def test_hill_formula():
    """Hill order (Hill, J. Am. Chem. Soc. 22, 478 (1900)): C, H, then alphabetical; no C: alphabetical."""
    from clusterlab import film_from_universe

    els = ["S", "C", "H", "C", "O", "C", "O", "Cl", "H", "O", "N"]
    res = [0, 0, 0, 0, 1, 1, 1, 2, 2, 2, 2]
    u = mda.Universe.empty(len(els), n_residues=3, atom_resindex=res, trajectory=True)
    u.add_TopologyAttr("elements", els)
    u.add_TopologyAttr("names", els)
    u.add_TopologyAttr("resnames", ["A", "B", "C"])
    u.add_TopologyAttr("resids", [1, 2, 3])
    u.add_TopologyAttr("charges", [0.0] * len(els))
    film = film_from_universe(u)
    assert list(film.molecules.formula) == ["C2HS", "CO2", "ClHNO"]


def test_non_finite_coordinates_are_refused_by_frame_molecule_and_atom():
    """One NaN coordinate would make every distance test false and strip the
    environment of every cluster in that frame: it is an error that names
    the frame, the molecule and the atom."""
    from MDAnalysis.coordinates.memory import MemoryReader

    from clusterlab import film_from_universe
    from clusterlab.errors import FilmError

    from conftest import build_water_universe, lattice_centres

    box = np.array([8.0, 8.0, 8.0, 90, 90, 90])
    u, _ = build_water_universe(lattice_centres(2, 0.1, np.random.default_rng(0)), box, n_frames=2)
    frames = np.stack([u.trajectory[f].positions.copy() for f in range(2)])
    frames[1, 7, 2] = np.nan
    u.load_new(frames, format=MemoryReader, dimensions=np.tile(box.astype(np.float32), (2, 1)))
    film = film_from_universe(u)
    film.carve(0, 4.0, frame=0)  # frame 0 is fine
    with pytest.raises(FilmError, match=r"frame 1 .*atoms \[7\] in molecule\(s\) \[2\]"):
        film.carve(0, 4.0, frame=1)
