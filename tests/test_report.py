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
    assert "| quantity | n | mean (eV) | σ (meV) | σ 95 % low (meV) | σ 95 % high (meV) |" in text
    assert "| S1 | 3 |" in text and "| S1_eV" not in text  # the quantity by name, not its column
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
    # every SCF converged: said once under the table, not a column of "yes" beside the vacuum row's blank
    assert "| SCF converged |" not in text and "(every SCF converged.)" in text


class _Method:
    @staticmethod
    def describe():
        return "test method"


def _scan(radii, shifts, tol=0.01):
    from matplotlib.figure import Figure

    table = pd.DataFrame({"radius_A": radii, "n_charges": [30 * (i + 1) for i in range(len(radii))],
                          "S1_shift_eV": shifts, "converged": True})

    class Scan:
        molecule, frame, method = 3, 0, _Method
        verdict = converged_radius(np.asarray(radii, float), np.asarray(shifts, float), tol=tol)

        @staticmethod
        def plot():
            return Figure()

    Scan.table = table
    return Scan


def _headline(path):
    text = open(path, encoding="utf-8").read()
    head = text.split("## What this film says", 1)[1].split("\n## ", 1)[0]
    return text, head


def test_headline_repeats_the_sections_numbers_at_the_top(film, tmp_path):
    rep = ReportWriter(str(tmp_path / "r"), "t")
    rep.section("Film", "a film")
    # S1 shift settles to -90 meV: within 10 meV of the largest radius from 10 Å on
    scan = _scan([5.0, 7.5, 10.0, 12.5, 15.0], [-0.150, -0.110, -0.095, -0.091, -0.090])
    scan_section(rep, scan)
    rng = np.random.default_rng(4)
    t = _sites(film, range(40))
    vac = 3.0 + rng.normal(0.0, 0.06, len(t))  # conformational spread 60 meV > environmental 30 meV
    t = t.assign(S1_vacuum_eV=vac, S1_eV=vac + t.S1_shift_eV)
    sample = SiteSample(table=t)
    stats = sample_section(rep, sample, ["S1_eV"], n_boot=200, correlation=False)
    text, head = _headline(rep.write())
    # at the top: before the first section, right after the model note
    assert text.index("## What this film says") < text.index("## Film")
    assert scan.verdict.converged and scan.verdict.radius_A == 10.0
    assert "converged from 10 Å within ±10 meV" in head and "S1 shift at the largest radius, 15 Å: -90.0 meV" in head
    row = stats.iloc[0]
    assert (f"Static disorder (QM sample): σ of the S1 site energy = {1e3 * row.sigma_eV:.1f} meV "
            f"[{1e3 * row.sigma_lo_eV:.1f}, {1e3 * row.sigma_hi_eV:.1f}] (95 % bootstrap BCa interval, n = 40)") in head
    # the same split the section below prints (one-way decomposition of vacuum energy and shift)
    ce = sample.conformational_environmental("S1")
    assert ce["sigma_conf"] > ce["sigma_env"]
    assert f"conformational (σ_conf = {1e3 * ce['sigma_conf']:.1f} meV, σ_env = {1e3 * ce['sigma_env']:.1f}" in head
    assert f"σ_conf = {1e3 * ce['sigma_conf']:.1f} meV" in text  # the section's own line, in meV too
    assert "Caution: Embedded QM" in head and "Film-wide model" not in head


def test_headline_says_in_words_what_is_missing(film, tmp_path):
    rep = ReportWriter(str(tmp_path / "r"), "t")
    # two radii only: the verdict cannot be judged
    scan_section(rep, _scan([5.0, 8.0], [-0.08, -0.087]))
    sample_section(rep, SiteSample(table=_sites(film, [0, 1])), ["S1_eV"], n_boot=200, correlation=False)
    _, head = _headline(rep.write())
    assert "Convergence with radius: not judged yet: " in head and "provisional" in head
    assert "Static disorder: not available (the QM sample has 2 site(s), σ needs 3" in head
    assert "not split (needs 3 or more QM sites with their vacuum energies; the sample has 2)" in head
    # nothing recorded: no headline at all (a bare writer)
    bare = ReportWriter(str(tmp_path / "b"), "t")
    bare.section("x", "y")
    assert "What this film says" not in open(bare.write(), encoding="utf-8").read()
    # a scan that moves more than the tolerance at its largest radii: not converged, said so
    rep = ReportWriter(str(tmp_path / "n"), "t")
    scan_section(rep, _scan([5.0, 8.0, 11.0], [-0.20, -0.12, -0.06]))
    _, head = _headline(rep.write())
    assert "Convergence with radius: not converged: " in head and "not a converged value" in head
    assert "no site-energy sample in this report" in head


def test_headline_takes_sigma_from_the_film_model_when_the_sample_is_too_small(film, tmp_path):
    from clusterlab.report import model_section

    rng = np.random.default_rng(8)
    # a second-order shift (the film model's bright S1): -F² of a Gaussian F is skewed
    shift = -0.02 * rng.normal(0.0, 1.0, 128) ** 2

    class Result:
        table = pd.DataFrame({"frame": 0, "molecule": range(128), "S1_shift_eV": shift})
        options = {"n_conformers": 1, "field_response": ["S1"]}

        class charges:  # noqa: N801
            conformers = {"WAT": [0]}

    rep = ReportWriter(str(tmp_path / "r"), "t")
    model_section(rep, Result)
    _, head = _headline(rep.write())
    s = disorder_stats(shift, n_boot=500, seed=0)
    assert (f"Static disorder (film-wide model, the environmental part only): σ of the S1 shift = "
            f"{1e3 * s['sigma']:.1f} meV [{1e3 * s['sigma_ci_lo']:.1f}, {1e3 * s['sigma_ci_hi']:.1f}]") in head
    assert "no site-energy sample in this report" in head
    assert "Shape: the film-wide model's S1 shift is skewed (g1 = " in head
    assert "Caution: Film-wide model" in head and "Caution: Embedded QM" not in head
    assert (tmp_path / "r" / "model_histogram.png").exists()


def test_tables_show_names_with_units_and_at_most_eight_columns(tmp_path):
    import re

    from clusterlab.labels import MAX_COLUMNS

    rep = ReportWriter(str(tmp_path / "r"), "t")
    # a scan table as wide as the engine's: 13 columns, an SCF that failed at 8 Å
    table = pd.DataFrame({"radius_A": [0.0, 5.0, 8.0], "kind": ["vacuum", "cluster", "cluster"],
                          "n_env_molecules": [0, 6, 20], "n_charges": [0, 30, 90], "S1_eV": [3.1, 3.02, 3.01],
                          "S1_shift_eV": [0.0, -0.080, -0.090], "T1_eV": [2.5, 2.49, 2.48],
                          "T1_shift_eV": [0.0, -0.01, -0.02], "dEST_eV": [0.6, 0.53, 0.53],
                          "IP_shift_eV": [0.0, -0.2, -0.25], "EA_shift_eV": [0.0, 0.2, 0.26],
                          "converged": [True, True, False], "wall_s": [3.0, 4.0, 5.0]})
    rep.table(table, list(table.columns))
    head = next(ln for ln in rep.lines if ln.startswith("| radius"))
    headers = head.split("\n")[0].strip("| ").split(" | ")
    assert len(headers) <= MAX_COLUMNS and headers[0] == "radius (Å)"
    assert "SCF converged" in headers  # kept: it is False at 8 Å
    assert "| vacuum |" in head and re.search(r"\| 8\.0 \|.*\| no \|", head)
    assert all("_" not in h for h in headers)  # no raw column name
    assert any(ln.startswith("(not shown here") and "wall time (s)" in ln for ln in rep.lines)

    # a table of shifts (the film model's): quantities by name, means in meV like their σ
    st = pd.DataFrame({"quantity": ["S1_shift_eV", "S1_stark_eV"], "n": [256, 256], "mean_eV": [-0.011, -0.014],
                       "sigma_eV": [0.0468, 0.0176], "sigma_lo_eV": [0.0424, 0.0157], "sigma_hi_eV": [0.0521, 0.0199]})
    rep.table(st, list(st.columns))
    text = "\n".join(rep.lines)
    assert "| quantity | n | mean (meV) | σ (meV) | σ 95 % low (meV) | σ 95 % high (meV) |" in text
    assert "| S1 shift | 256 | -11.0 | 46.8 | 42.4 | 52.1 |" in text
    assert "| S1 second-order (Stark) part | 256 | -14.0 |" in text
