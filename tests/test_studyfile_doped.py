"""Host:guest settings of study files ([doped] torsion by atom names) and the
host:guest section of ``clusterlab report`` on a constructed two-species film."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from clusterlab.cli import main
from clusterlab.errors import InputError, StudyFileError
from clusterlab.report import ReportWriter, doped_section
from clusterlab.study.doped import dest_torsion, torsion_atom_indices, torsion_table
from clusterlab.studyfile import load_study, parse_override, parse_torsion_names

from lattice_films import DipoleSpecies, dipole_lattice_universe
from test_cli import _write_study
from test_doped import chain_film

ANGLES = np.array([-170.0, -120.0, -75.0, -20.0, 10.0, 55.0, 100.0, 140.0, 175.0])


# ------------------------------------------------------------------ grammar
def test_torsion_text_grammar():
    assert parse_torsion_names("GST: C12 C13 N3 C20") == {"GST": ["C12", "C13", "N3", "C20"]}
    # commas between the names are read as spaces; a list names one species each
    assert parse_torsion_names(["A:C1,C2,C3,C4", " B : N1 C1 C2 O1 "]) == {
        "A": ["C1", "C2", "C3", "C4"], "B": ["N1", "C1", "C2", "O1"]}
    for bad, match in [("C12 C13 N3 C20", "does not start with a species name and a colon"),
                       ("GST: C12 C13 N3", "names 3 atom"), ("GST: C1 C2 C1 C3", r"names 4 atom\(s\) \(one twice\)"),
                       ("G S T: C1 C2 C3 C4", "species name and a colon"),
                       (["A: C1 C2 C3 C4", "A: C5 C6 C7 C8"], "named twice"), ([], "SPECIES: A B C D")]:
        with pytest.raises(InputError, match=match):
            parse_torsion_names(bad)


def test_doped_section_of_a_study_file(tmp_path):
    p = tmp_path / "study.toml"
    p.write_text("[film]\ntopology='x.pdb'\n[doped]\ntorsion = 'GDA: C22 N4 C19 C18'\nneighbour_cutoff_A = 7.5\n")
    st = load_study(p)
    assert st["doped"] == {"torsion": {"GDA": ["C22", "N4", "C19", "C18"]}, "neighbour_cutoff_A": 7.5}
    assert "doped" in st["_present"]
    # the command-line flag reads the same grammar
    over = {("doped", "torsion"): parse_override("doped", "torsion", "GST: a b c d")}
    assert load_study(p, over)["doped"]["torsion"] == {"GST": ["a", "b", "c", "d"]}
    for body, match in [("torsion = 'GDA C22 N4 C19 C18'", r"\[doped\] torsion: torsion 'GDA C22 N4 C19 C18' does "
                                                            "not start with a species name"),
                        ("torsion = 3", r"\[doped\] torsion = 3 has the wrong type; expected str or list"),
                        ("neighbour_cutoff_A = -2", r"\[doped\] neighbour_cutoff_A: -2 must be a positive distance"),
                        ("torsions = 'A: a b c d'", r"unknown key 'torsions' in \[doped\]; valid keys are torsion")]:
        p.write_text(f"[film]\ntopology='x.pdb'\n[doped]\n{body}\n")
        with pytest.raises(StudyFileError, match=match):
            load_study(p)


# ------------------------------------------------------------------ names on a film
def test_atom_names_give_the_constructed_dihedrals():
    film = chain_film(ANGLES)
    assert torsion_atom_indices(film, {"DAX": ["C1", "C2", "C3", "C4"]})["DAX"].tolist() == [0, 1, 2, 3]
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(film.n_molecules)})
    # the chains were built with these dihedrals (test_doped.chain_film); float32 coordinates: 1e-3 degrees
    got = torsion_table(film, t, {"DAX": ("C1", "C2", "C3", "C4")})
    np.testing.assert_allclose(got.torsion_deg, ANGLES, atol=1e-3)
    # the reversed chain C4-C3-C2-C1 has the same dihedral (IUPAC definition is symmetric)
    np.testing.assert_allclose(torsion_table(film, t, {"DAX": ("C4", "C3", "C2", "C1")}).torsion_deg, ANGLES,
                               atol=1e-3)
    dest = 0.25 + 0.05 * np.cos(np.radians(2 * ANGLES))
    res = dest_torsion(film, t.iloc[:9].assign(dEST_eV=dest), {"DAX": ("C1", "C2", "C3", "C4")})
    assert res.atoms == {"DAX": [0, 1, 2, 3]}  # stored as indices, so the JSON round trip holds
    assert res.fits.set_index("species").loc["DAX", "torsion_r2"] == pytest.approx(1.0, abs=1e-9)


def test_atom_name_errors_name_the_atom():
    film = chain_film(ANGLES)
    with pytest.raises(InputError, match=r"no atom named 'C9' in molecule 0 of species 'DAX'; its atom names "
                                         r"are C1, C2, C3, C4"):
        torsion_atom_indices(film, {"DAX": ["C1", "C2", "C3", "C9"]})
    with pytest.raises(InputError, match=r"'GDA' is not a species of the film; species: \['DAX', 'HST'\]"):
        torsion_atom_indices(film, {"GDA": ["C1", "C2", "C3", "C4"]})
    with pytest.raises(InputError, match="four different atom names"):
        torsion_atom_indices(film, {"DAX": ["C1", "C2", "C3"]})
    film.universe.atoms[4:8].names = ["C2", "C1", "C3", "C4"]  # molecule 1 lists its atoms in another order
    with pytest.raises(InputError, match=r"molecule 1 does not carry \['C1', 'C2', 'C3', 'C4'\]"):
        torsion_atom_indices(film, {"DAX": ["C1", "C2", "C3", "C4"]})
    film.universe.atoms[4:8].names = ["C1", "C1", "C3", "C4"]
    film.universe.atoms[0:4].names = ["C1", "C1", "C3", "C4"]
    with pytest.raises(InputError, match=r"the name 'C1' is carried by 2 atoms of molecule 0"):
        torsion_atom_indices(film, {"DAX": ["C1", "C2", "C3", "C4"]})


def test_report_section_takes_atom_names(tmp_path):
    film = chain_film(ANGLES)
    t = pd.DataFrame({"frame": 0, "molecule": np.arange(12), "dEST_eV": np.r_[
        0.2 + 0.05 * np.cos(np.radians(2 * ANGLES)), [0.5] * 3], "IP_eV": [5.5] * 9 + [6.0] * 3})
    rep = ReportWriter(str(tmp_path / "rep"), "t")
    ov = doped_section(rep, film, t, torsion_atoms={"DAX": ("C1", "C2", "C3", "C4")}, n_boot=200)
    assert ov.torsion is not None and (tmp_path / "rep" / "dest_torsion.png").exists()
    # a missing name is a note in the report, not a crash of it
    rep = ReportWriter(str(tmp_path / "rep2"), "t")
    ov = doped_section(rep, film, t, torsion_atoms={"DAX": ("C1", "C2", "C3", "X7")}, n_boot=200)
    assert ov.torsion is None and "no atom named 'X7'" in "; ".join(ov.notes)


# ------------------------------------------------------------------ study run and report CLI
HOST = DipoleSpecies("HOS", 4.0, 24, ("O", "C", "O"))
GUEST = DipoleSpecies("GUE", 1.0, 3, ("N", "N", "O"))
#: C=O of carbon dioxide, 1.16 Å (common practice, from memory): the three atoms span 2.32 Å
SEPARATION_A = 2.32


@pytest.fixture
def lattice_files(tmp_path):
    """A 3x3x3 two-species dipole lattice (24 CO2-shaped hosts, 3 N2O-shaped guests, 4.6 Å apart) as
    PDB + CSV charge table, so that the store's records name files the report can reload."""
    from clusterlab.units import DEBYE_E_A

    u, names = dipole_lattice_universe(3, 4.6, [HOST, GUEST], separation_A=SEPARATION_A, seed=2)
    pdb = tmp_path / "lattice.pdb"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.write(str(pdb))
    rows = ["resname,name,charge"]
    for s in (HOST, GUEST):
        q = s.dipole_D * DEBYE_E_A / SEPARATION_A
        rows += [f"{s.name},QN,{-q:.6f}", f"{s.name},QC,0.0", f"{s.name},QP,{q:.6f}"]
    csv = tmp_path / "q.csv"
    csv.write_text("\n".join(rows) + "\n")
    return str(pdb), str(csv), names


def _study(tmp_path, pdb, csv, doped=""):
    """test_cli's study file (draft preset at STO-3G, serial) with a sample of the lattice at 4 Å."""
    return _write_study((pdb, csv), tmp_path, n_singlets=1, sections=f"""
[sample]
molecules = "all"
n = 8
seed = 3
radius = 4.0
quantities = ["S1_eV", "T1_eV"]
{doped}
""")


def test_a_missing_torsion_atom_stops_the_study_before_any_calculation(lattice_files, tmp_path, capsys):
    pdb, csv, _ = lattice_files
    study = _study(tmp_path, pdb, csv, "[doped]\ntorsion = 'GUE: QN QC QP QX'\n")
    assert main(["run", str(study), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "no atom named 'QX' in molecule" in err and "species 'GUE'; its atom names are QN, QC, QP" in err
    from clusterlab.store import ResultStore

    with ResultStore(tmp_path / "st.sqlite", readonly=True) as st:
        assert st.counts()["total"] == 0


@pytest.mark.slow
def test_report_cli_rebuilds_the_film_for_the_host_guest_section(lattice_files, tmp_path, capsys):
    pdb, csv, names = lattice_files
    study = _study(tmp_path, pdb, csv, "[doped]\nneighbour_cutoff_A = 5.0\n")
    assert main(["run", str(study), "--quiet", "--sample-molecules", "species:GUE", "--sample-n", "3"]) == 0
    assert main(["run", str(study), "--quiet", "--sample-molecules", "species:HOS", "--sample-n", "5"]) == 0
    capsys.readouterr()
    from clusterlab.store import ResultStore

    with ResultStore(tmp_path / "st.sqlite", readonly=True) as st:
        assert st.meta["doped_settings"] == {"neighbour_cutoff_A": 5.0}
        done = st.to_frame(kind="excitations")
    # the three guests and five hosts of the constructed layout
    done_species = names[done.molecule.astype(int)]
    assert set(done.molecule[done_species == "GUE"].astype(int)) == set(np.flatnonzero(names == "GUE"))
    assert (done_species == "HOS").sum() == 5 and len(done) == 8
    out = tmp_path / "rep_cli"
    assert main(["report", str(tmp_path / "st.sqlite"), "--out", str(out), "--quantity", "S1_eV"]) == 0
    printed = capsys.readouterr().out
    assert "host:guest section: host HOS, guest GUE" in printed
    # the printed statistics read as the report's table: names and units, not column names
    assert "σ 95 % low (meV)" in printed and "sigma_lo_eV" not in printed and "mean_eV" not in printed
    text = (out / "summary.md").read_text()
    # species counts of the constructed film, and the per-species means against pandas on the stored records
    assert "## Host:guest film (host HOS, 24 molecules; guest GUE, 3 molecules)" in text
    # (shown once, in the sample section's per-species table, for the reported quantity)
    s1 = done.assign(species=names[done.molecule.astype(int)]).groupby("species")["S1_eV"].mean()
    assert f"| GUE | S1 | 3 | {s1['GUE']:.3f} |" in text and f"| HOS | S1 | 5 | {s1['HOS']:.3f} |" in text
    assert "Triplet confinement:" in text and "within 5.00 Å" in text  # the study's neighbour distance
    # a torsion flag on a three-atom molecule names the missing atom in the report's notes
    assert main(["report", str(tmp_path / "st.sqlite"), "--out", str(tmp_path / "rep_t"),
                 "--torsion", "GUE: QN QC QP QZ"]) == 0
    assert "no atom named 'QZ'" in (tmp_path / "rep_t" / "summary.md").read_text()
    # moved film files: the report says it cannot rebuild the film, and --topology gives it back
    moved = tmp_path / "moved.pdb"
    __import__("os").rename(pdb, moved)
    from clusterlab.film import _FILM_CACHE

    _FILM_CACHE.clear()  # as in a new `clusterlab report` process, which has not loaded the film yet
    assert main(["report", str(tmp_path / "st.sqlite"), "--out", str(tmp_path / "rep_m")]) == 0
    printed = capsys.readouterr().out
    assert "host:guest section left out: the recorded film" in printed and "pass --topology" in printed
    text = (tmp_path / "rep_m" / "summary.md").read_text()
    assert "## Host:guest film" in text and "(not shown: this part needs the film" in text
    assert main(["report", str(tmp_path / "st.sqlite"), "--out", str(tmp_path / "rep_g"), "--topology", str(moved),
                 "--charges", csv]) == 0
    assert "## Host:guest film (host HOS, 24 molecules" in (tmp_path / "rep_g" / "summary.md").read_text()
    assert main(["report", str(tmp_path / "st.sqlite"), "--charges", csv]) == 1
    assert "add --topology" in capsys.readouterr().err


def test_study_keeps_valid_torsion_names_in_its_store(tmp_path):
    """A [doped] torsion that the film has reaches the store (for `clusterlab report`); no QM section runs."""
    film = chain_film(ANGLES)
    pdb = tmp_path / "chains.pdb"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film.universe.atoms.write(str(pdb))
    csv = tmp_path / "q.csv"
    csv.write_text("resname,name,charge\n" + "".join(f"DAX,C{i},0.0\n" for i in range(1, 5))
                   + "HST,OW,-0.834\nHST,HW1,0.417\nHST,HW2,0.417\n")
    p = tmp_path / "study.toml"
    p.write_text(f"[film]\ntopology = '{pdb}'\ncharges = '{csv}'\n[doped]\ntorsion = 'DAX: C1 C2 C3 C4'\n"
                 f"[output]\nstore = '{tmp_path / 'st.sqlite'}'\nreport = '{tmp_path / 'rep'}'\n")
    assert main(["run", str(p), "--quiet"]) == 0
    from clusterlab.store import ResultStore

    with ResultStore(tmp_path / "st.sqlite", readonly=True) as st:
        assert st.meta["doped_settings"] == {"torsion": {"DAX": ["C1", "C2", "C3", "C4"]}}
