"""Study-file settings of the radius scan that feeds the sample: ``[scan]
polarizable_radius`` (a second scan with a polarizable inner layer beside the
fixed-charge scan with its periodic limit) and ``[sample] radius = "converged"``."""

from __future__ import annotations

import numpy as np
import pytest

from clusterlab.errors import StudyFileError
from clusterlab.pipeline import run_study
from clusterlab.studyfile import CONVERGED, load_study

from test_cli import _write_study, gro  # noqa: F401 - the fixture


def test_converged_radius_needs_a_scan_and_a_positive_inner_radius(tmp_path):
    body = '[film]\ntopology = "f.gro"\n[sample]\nradius = "converged"\n'
    (tmp_path / "a.toml").write_text(body)
    with pytest.raises(StudyFileError, match=r"radius = 'converged' .* there is none; add a \[scan\]"):
        load_study(tmp_path / "a.toml")
    (tmp_path / "b.toml").write_text(body + '[scan]\nmolecule = 3\npolarizable_radius = 0\n')
    with pytest.raises(StudyFileError, match=r"polarizable_radius = 0 must be a positive radius"):
        load_study(tmp_path / "b.toml")
    (tmp_path / "c.toml").write_text(body + '[scan]\nmolecule = 3\npolarizable_radius = 6.5\n')
    st = load_study(tmp_path / "c.toml", overrides={("sample", "radius"): " Converged "})
    assert st["sample"]["radius"] == CONVERGED and st["scan"]["polarizable_radius"] == 6.5
    # a radius text still reads as radii
    st = load_study(tmp_path / "c.toml", overrides={("sample", "radius"): "3-6:3"})
    assert st["sample"]["radius"] == [3.0, 6.0]


def test_polarizable_scan_beside_the_periodic_scan_and_the_sample_at_its_radius(gro, tmp_path):  # noqa: F811
    study = _write_study(gro, tmp_path, n_singlets=1, sections="""
[scan]
molecule = 13
radii = [3.0, 4.5]
periodic_limit = true
tol_eV = 5.0
polarizable_radius = 3.0
[sample]
molecules = [13, 4]
radius = "converged"
quantities = ["S1_eV", "T1_eV"]
""")
    out = run_study(load_study(study), progress=False, echo=lambda *_: None)
    fixed, pol = out.scan, out.polarizable_scan
    # the fixed-charge scan ends with the periodic limit; the polarizable one has none
    assert np.isinf(fixed.table.radius_A).any() and fixed.method.environment == "charges"
    assert pol.method.environment == "polarizable" and np.isfinite(pol.table.radius_A).all()
    assert pol.method.replace(environment="charges").key() == fixed.method.key()
    # with a 5 eV tolerance the smallest radius is converged, and the sample runs there
    assert fixed.verdict.converged and fixed.verdict.radius_A == 3.0
    assert set(out.sample.table.radius_A) == {3.0} and sorted(out.sample.table.molecule) == [4, 13]
    # polarizable minus fixed charges at each radius: the fixed part of the polarizable scan is the
    # fixed-charge scan's own number (same cluster, same method but the environment), and the
    # induced dipoles lower the ground state's energy against the excited state's only a little
    # (polarization energy of a neutral excitation of water in water: meV, common practice)
    p = pol.table[pol.table.radius_A > 0].set_index("radius_A")
    f = fixed.table[np.isfinite(fixed.table.radius_A) & (fixed.table.radius_A > 0)].set_index("radius_A")
    assert np.allclose(p["S1_shift_eV"] - p["S1_polarization_eV"], f["S1_shift_eV"], atol=2e-5)
    assert (p["S1_polarization_eV"].abs() < 0.2).all() and (p["S1_polarization_eV"].abs() > 0).all()
    summary = (tmp_path / "rep" / "summary.md").read_text()
    assert "Radius scan with a polarizable inner layer (3 Å)" in summary
    assert "scan_polarizable" in out.costs and out.costs["scan_polarizable"]["computed"] >= 2
