"""Molecular species (doped host:guest films): the species column, selection
by species, per-species statistics, per-species charge sets, the transport
export's species and pair classes, and the film-wide model of a constructed
two-species dipole lattice against the analytic dipolar-disorder results."""

from __future__ import annotations

import warnings

import MDAnalysis as mda
import numpy as np
import pytest

from clusterlab.errors import ChargeError, FilmError, InputError
from clusterlab.film import MixedSpeciesWarning, film_from_universe
from clusterlab.ranges import parse_species

from lattice_films import DipoleSpecies, cation_charge_set, dipole_lattice_universe

HOST = DipoleSpecies("HST", 3.0, 20)
GUEST = DipoleSpecies("GST", 6.0, 7, ("S", "C", "Cl"))
#: the species list of error messages (order of first appearance, either way round)
PRESENT = r"(HST \(20\), GST \(7\)|GST \(7\), HST \(20\))"


@pytest.fixture(scope="module")
def doped():
    u, names = dipole_lattice_universe(3, 10.0, [HOST, GUEST], n_frames=2, seed=3)
    return film_from_universe(u), names


# ---------------------------------------------------------------- the film
def test_species_column_counts_and_describe(doped):
    film, names = doped
    m = film.molecules
    assert list(m.columns[:6]) == ["molecule", "resname", "resid", "n_atoms", "charge", "formula"]
    assert m["species"].tolist() == names.tolist() and m["species"].map(type).eq(str).all()
    assert (m["species"] == m["resname"]).all()                 # species = resname is the interface
    first = "HST" if names.tolist().index("HST") < names.tolist().index("GST") else "GST"
    assert film.species.index[0] == first                        # order of first appearance
    assert film.species.to_dict() == {"HST": 20, "GST": 7}
    assert film.species_formula("GST") == "CClS" and film.species_formula("HST") == "CNO"
    assert "7 x GST (CClS)" in film.describe()


def test_select_by_species(doped):
    film, names = doped
    gst = np.flatnonzero(names == "GST")
    assert film.select("species:GST").tolist() == gst.tolist()
    assert film.select(species="GST").tolist() == gst.tolist()
    assert film.select("species:HST, GST").tolist() == list(range(27))
    host = int(np.flatnonzero(names == "HST")[0])
    assert film.select([int(gst[1]), host], species=["GST"]).tolist() == [int(gst[1])]
    assert film.select("resname GST", species="GST").tolist() == gst.tolist()
    assert parse_species("Species:GST") == ["GST"] and parse_species("resname GST") is None


@pytest.mark.parametrize("call", [lambda f: f.select("species:XYZ"), lambda f: f.select(species="XYZ"),
                                  lambda f: f.check_species(["GST", "XYZ"])])
def test_unknown_species_lists_the_species_present(doped, call):
    with pytest.raises(InputError, match=r"species 'XYZ' matches no molecule.*" + PRESENT):
        call(doped[0])


def test_selection_without_molecules_of_the_species(doped):
    film, names = doped
    host = int(np.flatnonzero(names == "HST")[0])
    with pytest.raises(InputError, match=r"holds no molecule of species 'GST'.*" + PRESENT):
        film.select([host], species="GST")
    with pytest.raises(InputError, match="species selection 'species:' is not valid"):
        film.select("species:")
    with pytest.raises(InputError, match=r"'resname XYZ'.*species " + PRESENT):
        film.select("resname XYZ")


def _mixed_residue_universe():
    """Residue 1 (SYS) holds a water and a CO molecule (two bonded fragments
    of different compositions); residue 2 (SYS) another water."""
    u = mda.Universe.empty(8, n_residues=2, atom_resindex=[0, 0, 0, 0, 0, 1, 1, 1], trajectory=True)
    u.add_TopologyAttr("names", ["O", "H1", "H2", "C", "O", "O", "H1", "H2"])
    u.add_TopologyAttr("elements", ["O", "H", "H", "C", "O", "O", "H", "H"])
    u.add_TopologyAttr("resnames", ["SYS", "SYS"])
    u.add_TopologyAttr("resids", [1, 2])
    u.add_TopologyAttr("charges", [-0.8, 0.4, 0.4, 0.1, -0.1, -0.8, 0.4, 0.4])
    u.add_TopologyAttr("bonds", [(0, 1), (0, 2), (3, 4), (5, 6), (5, 7)])
    pos = np.array([[0, 0, 0], [0.96, 0, 0], [-0.24, 0.93, 0], [5, 0, 0], [6.13, 0, 0],
                    [0, 5, 0], [0.96, 5, 0], [-0.24, 5.93, 0]], float) + 2.0
    u.atoms.positions = pos
    u.dimensions = [20, 20, 20, 90, 90, 90]
    return u


def test_mixed_species_in_one_residue_warns_and_refuses_species_fits():
    with pytest.warns(MixedSpeciesWarning, match=r"mixed species in one residue.*residue SYS 1 \(H2O x1, CO x1\)"):
        film = film_from_universe(_mixed_residue_universe())
    # still usable: carving and the molecule table work per molecule
    assert film.n_molecules == 3 and film.molecules["formula"].tolist() == ["H2O", "CO", "H2O"]
    assert film.carve(0, 8.0).n_env_molecules == 2
    with pytest.raises(FilmError, match=r"species 'SYS'.*2 compositions: H2O x2.*CO x1"):
        film.species_formula("SYS")


def test_species_without_charges_is_named(doped):
    film, _ = doped
    with pytest.raises(ChargeError, match=r"No charges at all for species 'GST' \(7 molecule\(s\)\)"):
        film_from_universe(film.universe, charges={("HST", "QN"): -0.1, ("HST", "QC"): 0.0,
                                                   ("HST", "QP"): 0.1}).charges
    u = film.universe.copy()
    q = u.atoms.charges.copy()
    q[np.isin(u.atoms.resnames, ["GST"])] = np.nan
    u.atoms.charges = q
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        bad = film_from_universe(u)
    with pytest.raises(ChargeError, match=r"No charges at all for species 'GST'.*not finite"):
        bad.charges
