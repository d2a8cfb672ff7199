"""Command line and study files: every bad key named, overrides, a real run."""

from __future__ import annotations

import os
import subprocess
import sys
import warnings

import numpy as np
import pytest

from clusterlab.cli import main
from clusterlab.errors import StudyFileError
from clusterlab.studyfile import load_study, parse_override, validate

from conftest import build_water_universe, lattice_centres


@pytest.fixture
def gro(tmp_path):
    """A periodic film as GRO (box, no charges) plus a CSV charge table."""
    u, _ = build_water_universe(lattice_centres(3, 0.1, np.random.default_rng(0)),
                                np.array([9.3, 9.3, 9.3, 90, 90, 90.0]))
    path = tmp_path / "water.gro"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.write(str(path))
    csv = tmp_path / "q.csv"
    csv.write_text("resname,name,charge\nWAT,OW,-0.834\nWAT,HW1,0.417\nWAT,HW2,0.417\n")
    return str(path), str(csv)


@pytest.fixture
def pqr(tmp_path):
    u, _ = build_water_universe(lattice_centres(3, 0.1, np.random.default_rng(0)),
                                np.array([9.3, 9.3, 9.3, 90, 90, 90.0]))
    u.add_TopologyAttr("radii", [1.5, 1.0, 1.0] * 27)
    path = tmp_path / "water.pqr"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        u.atoms.write(str(path))
    return str(path)


@pytest.mark.parametrize("body, match", [
    ("[film]\ntopology='x.pqr'\n[scna]\nmolecule=1\n", r"unknown section \[scna\]"),
    ("[film]\ntopology='x.pqr'\n[scan]\nmolecul=1\n", r"unknown key 'molecul' in \[scan\]; valid keys are molecule"),
    ("[film]\ntopology='x.pqr'\n[scan]\nradii='big'\n", r"\[scan\] radii: radii 'big' are not valid: 'big' is not a number"),
    ("[film]\ntopology='x.pqr'\n[scan]\nradii=true\n", r"\[scan\] radii = True has the wrong type; expected list or str"),
    ("[film]\ntopology='x.pqr'\n[sample]\nframes='0:20:5'\n", r"\[sample\] frames: .*'0:20:5' is not a frame.*'0-19:5'"),
    ("[film]\ntopology='x.pqr'\n[model]\npolarize_molecules='2-x'\n", r"\[model\] polarize_molecules: .*'2-x'"),
    ("[film]\ntopology='x.pqr'\n[scan]\nradii=[3, -1]\n", r"\[scan\] radii .* positive radii"),
    ("[film]\ntopology='x.pqr'\n[runner]\nkind='mpi'\n", r"\[runner\] kind = 'mpi' is not valid; use one of 'serial'"),
    ("[scan]\nmolecule=1\n", r"\[film\] topology is required"),
    ("[film]\ntopology='x.pqr'\n[scan]\nperiodic_limit=1\n", r"periodic_limit = 1 has the wrong type; expected bool"),
    ("[film\ntopology='x.pqr'\n", "not valid TOML"),
])
def test_bad_study_files_name_the_key(tmp_path, body, match):
    p = tmp_path / "study.toml"
    p.write_text(body)
    with pytest.raises(StudyFileError, match=match):
        load_study(p)


def test_overrides_and_relative_paths(tmp_path):
    p = tmp_path / "study.toml"
    p.write_text("[film]\ntopology='films/x.pqr'\n[sample]\nn=3\n")
    st = load_study(p, {("sample", "n"): parse_override("sample", "n", "7"),
                        ("scan", "radii"): parse_override("scan", "radii", "[3, 4.5]")})
    assert st["sample"]["n"] == 7 and st["scan"]["radii"] == [3, 4.5]
    assert st["film"]["topology"] == os.path.join(str(tmp_path), "films", "x.pqr")
    assert parse_override("sample", "molecules", "resname WAT") == "resname WAT"
    assert parse_override("scan", "periodic_limit", "true") is True
    with pytest.raises(StudyFileError, match="cannot read it as int"):
        parse_override("sample", "n", "many")
    assert validate({"film": {"topology": "a"}})["runner"]["kind"] == "processes"


def test_study_file_ranges_as_text(tmp_path):
    """molecules, frames and radii may be text in the range grammar (ends included) or TOML lists."""
    p = tmp_path / "study.toml"
    p.write_text("[film]\ntopology='x.pqr'\n[scan]\nmolecule=0\nradii='6-12:3'\n"
                 "[sample]\nmolecules='0-3, 9'\nframes='0-19:5'\nradius='6-9:3'\n"
                 "[model]\nframes='-2--1'\npolarize_molecules='4-6'\n")
    st = load_study(p)
    assert st["scan"]["radii"] == [6.0, 9.0, 12.0]
    assert st["sample"]["molecules"] == [0, 1, 2, 3, 9] and st["sample"]["frames"] == [0, 5, 10, 15]
    assert st["sample"]["radius"] == [6.0, 9.0]
    assert st["model"]["frames"] == [-2, -1] and st["model"]["polarize_molecules"] == [4, 5, 6]
    # selections, 'all' and single numbers keep their meaning; flags read the same grammar
    st = load_study(p, {("sample", "molecules"): parse_override("sample", "molecules", "resname WAT"),
                        ("sample", "frames"): parse_override("sample", "frames", "all"),
                        ("sample", "radius"): parse_override("sample", "radius", "12"),
                        ("scan", "radii"): parse_override("scan", "radii", "4, 8")})
    assert st["sample"]["molecules"] == "resname WAT" and st["sample"]["frames"] is None
    assert st["sample"]["radius"] == 12.0 and st["scan"]["radii"] == [4.0, 8.0]


def test_inspect_and_presets(pqr, capsys):
    assert main(["inspect", pqr]) == 0
    out = capsys.readouterr().out
    assert "27 molecules" in out and "27 x WAT (H2O)" in out
    assert main(["presets"]) == 0
    assert "draft" in capsys.readouterr().out
    assert main(["inspect", "missing.pqr"]) == 1
    assert "File not found" in capsys.readouterr().err


def _write_study(gro, tmp_path, *, n_singlets, sections):
    """A study file on the test film (draft preset, STO-3G, one triplet, serial runner)
    with the given extra sections; returns its path."""
    study = tmp_path / "study.toml"
    study.write_text(f"""
[film]
topology = "{gro[0]}"
charges = "{gro[1]}"
[method]
preset = "draft"
basis = "sto-3g"
n_singlets = {n_singlets}
n_triplets = 1
{sections.strip()}
[runner]
kind = "serial"
[output]
store = "{tmp_path / 'st.sqlite'}"
report = "{tmp_path / 'rep'}"
""")
    return study


def test_run_study_end_to_end_and_report(gro, tmp_path, capsys):
    study = _write_study(gro, tmp_path, n_singlets=2, sections="""
[scan]
molecule = 4
radii = [3.0, 4.5]
[sample]
molecules = "all"
n = 3
radius = 3.0
""")
    assert main(["run", str(study), "--quiet", "--sample-n", "4"]) == 0
    out = capsys.readouterr().out
    assert "radius scan of molecule 4" in out and "n=4" in out
    summary = (tmp_path / "rep" / "summary.md").read_text()
    assert "Radius scan of molecule 4" in summary and "model estimates" in summary
    # the report's log narrates each radius and each site, with the times
    assert "## Log" in summary and "2 radii to compute; first: vacuum reference and radius 3 Å" in summary
    assert "radius 4.5 Å: " in summary and "(2 of 2; elapsed" in summary and "4 sites to compute" in summary
    assert (tmp_path / "rep" / "convergence.png").stat().st_size > 1000
    assert (tmp_path / "rep" / "histogram_S1_eV.png").exists()
    assert main(["report", str(tmp_path / "st.sqlite"), "--out", str(tmp_path / "rep2")]) == 0
    assert (tmp_path / "rep2" / "summary.md").exists()
    # the export reads the same sites from the store (this film's records only)
    assert main(["export", str(tmp_path / "st.sqlite"), "--topology", gro[0], "--charges", gro[1],
                 "--out", str(tmp_path / "exp"), "--cutoff", "4.5"]) == 0  # below half the 9.3 Å box
    import pandas as pd

    from clusterlab.store import ResultStore

    sites = pd.read_parquet(tmp_path / "exp" / "sites.parquet")
    with ResultStore(tmp_path / "st.sqlite", readonly=True) as st:
        computed = set(st.to_frame(kind="excitations").molecule.astype(int))  # the 4 sampled + the scanned one
    assert len(computed) == 5 and set(sites.dropna(subset=["S1_qm_eV"]).molecule) == computed


def test_console_script_help():
    r = subprocess.run([sys.executable, "-m", "clusterlab.cli", "run", "--help"], capture_output=True, text=True)
    assert r.returncode == 0
    assert "--sample-n" in r.stdout and "--scan-periodic-limit" in r.stdout and "--runner-scheduler" in r.stdout


def test_model_section_passes_conformers_and_response(gro, tmp_path, capsys):
    """[model] n_conformers and response reach the film model and the report."""
    study = _write_study(gro, tmp_path, n_singlets=1, sections="""
[model]
radius = 4.0
charges_method = "hf/sto-3g"
n_conformers = 2
response = true
""")
    assert main(["run", str(study), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "2 conformer reference(s), S1 response True" in out
    summary = (tmp_path / "rep" / "summary.md").read_text()
    assert "2 conformer reference(s)" in summary and "finite-field response" in summary
    assert "| S1 shift |" in summary  # the model table names its quantities
    bad = tmp_path / "bad.toml"
    bad.write_text(f"[film]\ntopology = '{gro[0]}'\n[model]\nresponse = 1\n")
    with pytest.raises(StudyFileError, match=r"\[model\] response = 1 has the wrong type; expected bool"):
        load_study(bad)
    # a fit method without its basis is named in the error before any QM runs
    nobasis = _write_study(gro, tmp_path, n_singlets=1, sections="""
[model]
radius = 4.0
charges_method = "hf"
response = true
""")
    assert main(["run", str(nobasis), "--quiet"]) == 1
    assert "'hf' is not a method description" in capsys.readouterr().err
