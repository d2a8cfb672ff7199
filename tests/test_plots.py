"""Tests of clusterlab.study.plots (headless, Agg)."""

from __future__ import annotations

import re

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.colors import to_rgb
from matplotlib.figure import Figure
from scipy import stats as sps

from clusterlab.errors import InputError
from clusterlab.stats import disorder_stats, spatial_correlation
from clusterlab.study.plots import (
    PALETTE,
    plot_convergence,
    plot_correlation,
    plot_growth,
    plot_histogram,
    plot_parity,
)

RADII = np.array([6.0, 8.0, 10.0, 12.0, 14.0, 18.0, 22.0])


@pytest.fixture
def scan_df():
    return pd.DataFrame(
        {
            "radius_A": np.concatenate([[np.nan], RADII]),  # first row: vacuum
            "S1_shift_eV": np.concatenate([[0.0], -0.08 - 30.0 / RADII**3]),
            "T1_shift_eV": np.concatenate([[0.0], -0.05 - 10.0 / RADII**3]),
            "n_charges": np.concatenate([[0], (RADII**3).astype(int)]),
        }
    )


def _has_unit(text):
    return re.search(r"\((Å|eV|meV|1/eV|dimensionless)\)", text) is not None


def _saves(fig, tmp_path, name):
    path = tmp_path / name
    fig.savefig(path, dpi=60)
    assert path.stat().st_size > 1000
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_convergence_plot(scan_df, tmp_path):
    fig = plot_convergence(scan_df, tol_eV=0.01, periodic={"S1": -0.08, "T1_shift_eV": -0.05})
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    # 2 data lines + 2 dashed periodic limits + 2 dotted converged radii
    assert len(ax.lines) == 6
    assert [ln.get_linestyle() for ln in ax.lines].count("--") == 2
    assert [ln.get_linestyle() for ln in ax.lines].count(":") == 2
    assert len(ax.patches) == 2  # one tolerance band per state
    # band is +-10 meV around the periodic limit (axhspan: y in data units)
    band = ax.patches[0]
    assert band.get_y() == pytest.approx(-0.09)
    assert band.get_y() + band.get_height() == pytest.approx(-0.07)
    # converged radius for S1: 30/r^3 <= 0.01 -> r >= 14.4 Å (exact) -> 18 Å
    vlines = [ln for ln in ax.lines if ln.get_linestyle() == ":"]
    assert vlines[0].get_xdata()[0] == 18.0
    assert _has_unit(ax.get_xlabel()) and _has_unit(ax.get_ylabel())
    _saves(fig, tmp_path, "conv.png")


def test_convergence_plot_states_and_errors(scan_df):
    fig = plot_convergence(scan_df, states=["S1"])
    assert len(fig.axes[0].lines) == 2  # data + converged (no periodic)
    with pytest.raises(InputError, match="'IP_shift_eV' is missing"):
        plot_convergence(scan_df, states=["IP"])
    with pytest.raises(InputError, match="'radius_A' is missing"):
        plot_convergence(scan_df.drop(columns="radius_A"))
    with pytest.raises(InputError, match="one number for 2 quantities"):
        plot_convergence(scan_df, periodic=-0.08)


def test_convergence_plot_puts_a_non_shift_quantity_on_its_own_axis():
    r = np.array([5.0, 8.0, 11.0])
    df = pd.DataFrame({"radius_A": r, "S1_shift_eV": [-0.080, -0.087, -0.088], "dEST_eV": [1.93, 1.928, 1.927]})
    fig = plot_convergence(df, states=["S1_shift_eV", "dEST_eV"], tol_eV=0.01)
    left, right = fig.axes
    np.testing.assert_allclose(right.lines[0].get_ydata(), df.dEST_eV)
    assert right.get_ylabel() == "ΔEST (eV)" and left.get_ylabel() == "environment shift (eV)"
    labels = [t.get_text() for t in left.get_legend().get_texts()]
    assert "S1 shift" in labels and "ΔEST (eV), right axis" in labels


def test_histogram_plot(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.normal(3.05, 0.09, 200)
    st = disorder_stats(x, seed=1)
    fig = plot_histogram(x, st, label="S1 site energy", bins=15)
    ax = fig.axes[0]
    assert len(ax.lines) == 2  # Gaussian fit + mean
    assert len(ax.patches) == 15 + 1  # bars + shaded mean interval
    # the curve is scipy's normal pdf with the mean and the σ the text reports (ddof=1); it used to use
    # the ML (ddof=0) σ, a second σ beside the reported one
    gx, gy = ax.lines[0].get_data()
    np.testing.assert_allclose(gy, sps.norm.pdf(gx, np.mean(x), np.std(x, ddof=1)), rtol=1e-10)
    # bars are a density: area 1 (numpy histogram, density=True)
    heights = np.array([p.get_height() for p in ax.patches[:15]])
    widths = np.array([p.get_width() for p in ax.patches[:15]])
    assert np.sum(heights * widths) == pytest.approx(1.0)
    text = ax.texts[0].get_text()
    assert f"σ = {1e3 * st['sigma']:.0f} meV" in text and "95 % intervals" in text
    assert ax.get_xlabel() == "S1 site energy (eV)" and _has_unit(ax.get_ylabel())
    _saves(fig, tmp_path, "hist.png")


def test_histogram_small_sample_reports_the_chi_square_interval():
    # 3 sites: σ and its interval in the text are the chi-square ones of disorder_stats (the bootstrap
    # interval of 3 values is far too narrow), the same numbers the panels and the report show
    x = np.array([3.00, 3.10, 3.12])
    st = disorder_stats(x, seed=0)
    assert st["sigma_ci_method"] == "chi-square"
    assert (st["sigma_ci_lo"], st["sigma_ci_hi"]) == (st["sigma_chi2_lo"], st["sigma_chi2_hi"])
    text = plot_histogram(x, st).axes[0].texts[0].get_text()
    assert (f"σ = {1e3 * st['sigma']:.0f} meV [{1e3 * st['sigma_chi2_lo']:.0f}, {1e3 * st['sigma_chi2_hi']:.0f}]"
            in text) and "chi-square" in text
    assert f"{1e3 * st['sigma_lo']:.0f}, {1e3 * st['sigma_hi']:.0f}]" not in text


def test_histogram_missing_stats_entry():
    st = disorder_stats([1.0, 2.0, 3.0, 4.0], seed=0, n_boot=100).drop("sigma_hi")
    with pytest.raises(InputError, match="'sigma_hi'"):
        plot_histogram([1.0, 2.0, 3.0, 4.0], st)


def test_growth_plot(tmp_path):
    rng = np.random.default_rng(3)
    rows = []
    for r in (8.0, 12.0, 16.0, 20.0):
        s = disorder_stats(rng.normal(-0.1 - 5 / r**2, 0.05 + 1 / r**2, 40), seed=int(r), n_boot=300)
        rows.append(pd.concat([pd.Series({"radius_A": r}), s]))
    growth = pd.DataFrame(rows)
    fig = plot_growth(growth)
    assert len(fig.axes) == 2
    for ax in fig.axes:
        assert len(ax.lines) == 1
        assert sum(isinstance(c, PolyCollection) for c in ax.collections) == 1
        assert _has_unit(ax.get_ylabel())
    assert _has_unit(fig.axes[1].get_xlabel())
    # sigma drawn in meV
    np.testing.assert_allclose(fig.axes[1].lines[0].get_ydata(), 1e3 * growth["sigma"].astype(float))
    _saves(fig, tmp_path, "growth.png")
    with pytest.raises(InputError, match="'sigma_lo' is missing"):
        plot_growth(growth.drop(columns="sigma_lo"))


def test_correlation_plot(tmp_path):
    rng = np.random.default_rng(1)
    corr = spatial_correlation(rng.uniform(0, 20, (200, 3)), rng.normal(size=200), [20, 20, 20, 90, 90, 90])
    fig = plot_correlation(corr)
    ax = fig.axes[0]
    assert len(ax.lines) == 2  # C(r) + zero line
    assert _has_unit(ax.get_xlabel()) and _has_unit(ax.get_ylabel())
    _saves(fig, tmp_path, "corr.png")
    with pytest.raises(InputError, match="'C' is missing"):
        plot_correlation(corr.drop(columns="C"))


def test_correlation_plot_intervals_counts_and_words():
    rng = np.random.default_rng(1)
    box = [20, 20, 20, 90, 90, 90]
    corr = spatial_correlation(rng.uniform(0, 20, (200, 3)), rng.normal(size=200), box, n_bins=8, n_boot=200,
                               seed=0)
    ax = plot_correlation(corr).axes[0]
    x, y = ax.lines[1].get_data()
    shown = corr[corr.shown]
    np.testing.assert_allclose(x, shown.r_A) and np.testing.assert_allclose(y, shown.C)
    assert len(ax.collections) == 1  # the error bars
    assert [t.get_text() for t in ax.texts] == [str(k) for k in shown.n_pairs]
    assert ax.get_xlim()[0] == 0.0
    # nothing to draw: the reason in words, no negative distances
    few = spatial_correlation(rng.uniform(0, 20, (3, 3)), [1.0, 2.0, 4.0], box, n_bins=8)
    ax = plot_correlation(few).axes[0]
    assert len(ax.lines) == 1 and "C(r) is not drawn" in ax.texts[0].get_text().replace("\n", " ")
    assert ax.get_xlim() == (0.0, pytest.approx(10.0))


def test_parity_plot(tmp_path):
    rng = np.random.default_rng(2)
    qm = rng.normal(3.0, 0.1, 60)
    model = qm + rng.normal(0.012, 0.02, 60)
    fig = plot_parity(qm, model)
    ax = fig.axes[0]
    assert len(ax.lines) == 1 and len(ax.collections) == 1
    text = ax.texts[0].get_text()
    # independent: scipy's Pearson r, numpy RMS
    rms = np.sqrt(np.mean((model - qm) ** 2)) * 1e3
    assert f"RMS error = {rms:.1f} meV" in text
    assert f"mean error = {1e3 * np.mean(model - qm):+.1f} meV" in text
    assert f"r = {sps.pearsonr(qm, model).statistic:.3f}" in text
    assert _has_unit(ax.get_xlabel()) and _has_unit(ax.get_ylabel())
    _saves(fig, tmp_path, "parity.png")
    with pytest.raises(InputError, match="x has 60 values but y has 59"):
        plot_parity(qm, model[:-1])


def test_draw_into_given_axes_and_palette():
    fig = Figure()
    ax = fig.add_subplot()
    out = plot_correlation(pd.DataFrame({"r_A": [1.0, 2.0], "C": [0.5, 0.1]}), ax=ax)
    assert out is fig
    assert to_rgb(ax.lines[1].get_color()) == to_rgb(PALETTE[2])
    assert len(set(PALETTE)) == len(PALETTE) == 8
