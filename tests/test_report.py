"""The report's words and numbers: the one σ interval, meV, C(r) or why not."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from clusterlab import film_from_universe
from clusterlab.report import ReportWriter, model_correlation_section, sample_section, scan_section
from clusterlab.stats import MIN_PAIRS_PER_BIN, converged_radius, disorder_stats
from clusterlab.study.sample import SiteSample

from conftest import build_water_universe, lattice_centres

BOX = np.array([16.0, 16.0, 16.0, 90.0, 90.0, 90.0])


@pytest.fixture
def film():
    u, _ = build_water_universe(lattice_centres(4, 0.15, np.random.default_rng(7)), BOX, seed=3, n_frames=2)
    return film_from_universe(u)


def _sites(film, molecules, frames=(0,), seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for f in frames:
        cent = film.frame_geometry(f).centroids_A
        for m in molecules:
            shift = rng.normal(-0.08, 0.03)
            rows.append({"frame": f, "molecule": m, "radius_A": 6.0, "S1_eV": 3.0 + shift, "S1_shift_eV": shift,
                         "S1_vacuum_eV": 3.0, "converged": True, "centroid_x_A": cent[m, 0],
                         "centroid_y_A": cent[m, 1], "centroid_z_A": cent[m, 2]})
    return pd.DataFrame(rows)


def test_sample_section_reports_the_one_sigma_interval_in_meV(film, tmp_path):
    rep = ReportWriter(str(tmp_path / "r"), "t")
    t = _sites(film, [0, 1, 2])
    stats = sample_section(rep, SiteSample(table=t), ["S1_eV"], n_boot=200)
    s = disorder_stats(t.S1_eV.to_numpy(), n_boot=200, seed=0)
    row = stats.iloc[0]
    assert (row.sigma_lo_eV, row.sigma_hi_eV) == (s["sigma_chi2_lo"], s["sigma_chi2_hi"])
    text = "\n".join(rep.lines)
    assert "chi-square interval of a normal sample (n = 3 is below 30" in text
    assert "| quantity | n | mean (eV) | σ (meV) | σ low (meV) | σ high (meV) |" in text
    assert f"| {1e3 * s['sigma']:.1f} | {1e3 * s['sigma_chi2_lo']:.1f} | {1e3 * s['sigma_chi2_hi']:.1f} |" in text
    # three sites: C(r) is not drawn, and the report says why
    assert "Spatial correlation of S1 site energies from the QM sample (3 sites): C(r) is not drawn" in text
    assert not (tmp_path / "r" / "correlation.png").exists()


def test_model_correlation_uses_every_molecule_frame(film, tmp_path):
    rep = ReportWriter(str(tmp_path / "r"), "t")

    class Model:
        table = _sites(film, range(film.n_molecules), frames=(0, 1)).drop(
            columns=["centroid_x_A", "centroid_y_A", "centroid_z_A"])

    model_correlation_section(rep, Model(), film, n_boot=100)
    text = "\n".join(rep.lines)
    assert (tmp_path / "r" / "correlation.png").stat().st_size > 1000
    assert "from the film-wide model (128 molecule-frames)" in text
    assert f"at least {MIN_PAIRS_PER_BIN} pairs" in text and "bootstrap intervals" in text


def test_scan_section_reads_in_meV_and_names_the_vacuum_row(tmp_path):
    rep = ReportWriter(str(tmp_path / "r"), "t")
    table = pd.DataFrame({"radius_A": [0.0, 5.0, 8.0], "kind": ["vacuum", "cluster", "cluster"],
                          "n_charges": [0, 30, 90], "S1_eV": [3.1, 3.02, 3.0127],
                          "S1_shift_eV": [0.0, -0.080, -0.0873], "converged": [True, True, True]})

    class Scan:
        molecule, frame = 3, 0
        verdict = converged_radius([5.0, 8.0], table.S1_shift_eV[1:].to_numpy(), tol=0.01)

        class method:  # noqa: N801
            @staticmethod
            def describe():
                return "test method"

        @staticmethod
        def plot():
            from matplotlib.figure import Figure

            return Figure()

    Scan.table = table
    scan_section(rep, Scan)
    text = "\n".join(rep.lines)
    assert "cannot be judged yet" in text and "add a radius beyond 8 Å" in text
    assert "| vacuum | 0 | 3.100 | 0.0 |" in text and "| 8.0 | 90 | 3.013 | -87.3 |" in text
    assert "S1 shift (meV)" in text
