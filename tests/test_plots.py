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
    skew_check,
    figure_legend,
    tolerance_bands,
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
    assert len(tolerance_bands(fig)[ax]) == 2  # one tolerance band per state
    # band is +-10 meV around the periodic limit -80 meV (axhspan: y in data units, meV like the tables)
    band = tolerance_bands(fig)[ax][0]
    assert band.get_y() == pytest.approx(-90.0)
    assert band.get_y() + band.get_height() == pytest.approx(-70.0)
    np.testing.assert_allclose(ax.lines[0].get_ydata(), 1e3 * scan_df.S1_shift_eV.to_numpy()[1:])
    assert ax.get_ylabel() == "environment shift (meV)"
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


def test_convergence_plot_puts_a_non_shift_quantity_in_its_own_panel_with_its_own_band():
    r = np.array([5.0, 8.0, 11.0])
    df = pd.DataFrame({"radius_A": r, "S1_shift_eV": [-0.080, -0.087, -0.088], "dEST_eV": [1.93, 1.928, 1.927]})
    fig = plot_convergence(df, states=["S1_shift_eV", "dEST_eV"], tol_eV=0.01)
    top, low = fig.axes
    # one radius axis, the panel below the shifts (not a right axis drawn over them)
    assert low.get_shared_x_axes().joined(top, low) and low.get_position().y1 <= top.get_position().y0
    np.testing.assert_allclose(low.lines[0].get_ydata(), df.dEST_eV)
    assert low.get_ylabel() == "ΔEST (eV)" and top.get_ylabel() == "environment shift (meV)"
    labels = [t.get_text() for t in figure_legend(fig).get_texts()]
    # S1 moves 8 meV from 5 Å on, ΔEST 3 meV: both within 10 meV, converged at 5 Å, said in the entries
    assert labels[:2] == ["S1 shift, converged at 5 Å", "ΔEST (lower panel), converged at 5 Å"]
    # ΔEST's own band: ±10 meV in eV around its largest-radius value, outlined and hatched
    (band,) = tolerance_bands(fig)[low]
    assert (band.get_y(), band.get_y() + band.get_height()) == (pytest.approx(1.917), pytest.approx(1.937))
    assert [p.get_hatch() for p in low.patches if p.get_gid() == "band-hatch"]
    # an axes passed in has no room for a panel: a right axis, its band an outline only (dash-dotted, no
    # hatch), so that it cannot mix with the shift's band behind it
    host = Figure(figsize=(8, 4))
    ax = host.add_subplot(position=[0.1, 0.1, 0.5, 0.8])
    plot_convergence(df, states=["S1_shift_eV", "dEST_eV"], ax=ax)
    right = host.axes[1]
    (rband,) = tolerance_bands(host)[right]
    assert rband.get_linestyle() == "-." and not [p for p in right.patches if p.get_gid() == "band-hatch"]


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
    # a shift's mean in meV as well, as the tables show it
    top = plot_growth(growth, label="S1 shift", show_in="meV").axes[0]
    assert top.get_ylabel() == "mean S1 shift (meV)"
    np.testing.assert_allclose(top.lines[0].get_ydata(), 1e3 * growth["mean"].astype(float))
    with pytest.raises(InputError, match="show_in='eV'"):
        plot_growth(growth, show_in="eV")
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
    # the counts sit in a row above the axes: they used to sit on the points and their error bars
    renderer = _drawn(ax.figure)
    frame = ax.get_window_extent(renderer)
    assert all(t.get_window_extent(renderer).y0 >= frame.y1 for t in ax.texts)
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


# ---------------------------------------------------------------- readability (legends, bands, shapes)
def _drawn(fig):
    """Draw with Agg so that window extents are final; returns the renderer."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    return canvas.get_renderer()


def _overlap(a, b) -> bool:
    """Whether two display-space boxes share an area (touching edges do not count)."""
    return a.x0 < b.x1 - 0.5 and b.x0 < a.x1 - 0.5 and a.y0 < b.y1 - 0.5 and b.y0 < a.y1 - 0.5


def _followed_scan():
    r = np.array([6.0, 8.0, 10.0, 12.0, 14.0])
    s1 = -0.08 - 30.0 / r**3
    return pd.DataFrame({"radius_A": r, "S1_shift_eV": s1, "T1_shift_eV": -0.05 - 10.0 / r**3,
                         "dEST_eV": 1.9 + 0.01 / r, "S1_followed_shift_eV": s1})  # followed = plain: coincide


def test_convergence_legend_sits_outside_the_axes_and_covers_no_point():
    # the report's plot used to hide the points under a nine-entry legend inside the axes
    df = _followed_scan()
    fig = plot_convergence(df, states=["S1_shift_eV", "T1_shift_eV", "dEST_eV", "S1_followed_shift_eV"])
    renderer = _drawn(fig)
    leg = figure_legend(fig)
    box = leg.get_window_extent(renderer)
    for ax in fig.axes:
        assert not _overlap(box, ax.get_window_extent(renderer))
    # and inside the figure (the widgets save without bbox_inches="tight")
    fig_box = fig.bbox
    assert box.x0 >= fig_box.x0 - 1 and box.x1 <= fig_box.x1 + 1 and box.y0 >= fig_box.y0 - 1
    # one entry per quantity plus the band: not one per drawn line
    assert len(leg.get_texts()) == 4 + 1
    # an axes passed in: the legend goes to its right, still off the data
    host = Figure(figsize=(8, 4))
    ax = host.add_subplot(position=[0.1, 0.1, 0.5, 0.8])
    plot_convergence(df, states=["S1", "T1"], ax=ax)
    renderer = _drawn(host)
    assert not _overlap(ax.get_legend().get_window_extent(renderer), ax.get_window_extent(renderer))


def test_followed_state_stays_visible_over_the_plain_state():
    df = _followed_scan()
    ax = plot_convergence(df, states=["S1", "S1_followed"]).axes[0]
    plain = next(ln for ln in ax.lines if ln.get_label().startswith("S1 shift"))
    followed = next(ln for ln in ax.lines if "followed" in ln.get_label())
    np.testing.assert_allclose(plain.get_ydata(), followed.get_ydata())  # the same numbers here ...
    # ... so the followed line is drawn on top, dashed, with open markers larger than the plain ones
    assert followed.get_zorder() > plain.get_zorder()
    assert followed.get_linestyle() != plain.get_linestyle() and followed.get_marker() != plain.get_marker()
    assert followed.get_markerfacecolor() == "none" and followed.get_markersize() > plain.get_markersize()


def _hatched_spans(ax):
    return [(p.get_y(), p.get_y() + p.get_height()) for p in ax.patches if p.get_gid() == "band-hatch"]


def test_tolerance_bands_are_outlines_hatched_only_where_they_do_not_overlap():
    # the issue: several ±tolerance bands drawn as tints (or crossing hatches) mixed into grey mud
    df = _followed_scan()
    df = df.assign(T1_shift_eV=df.S1_shift_eV + 0.012)  # T1's band overlaps S1's over 8 of its 20 meV
    fig = plot_convergence(df, states=["S1", "T1"], tol_eV=0.01)
    ax = fig.axes[0]
    bands = tolerance_bands(fig)[ax]
    assert len(bands) == 2
    for band, colour in zip(bands, PALETTE):
        assert band.get_facecolor()[3] == 0.0 and not band.get_hatch()  # outline only: no fill
        assert to_rgb(band.get_edgecolor()) == pytest.approx(to_rgb(colour))
    s1 = 1e3 * df.S1_shift_eV.iloc[-1]
    spans = sorted(_hatched_spans(ax))
    # hatched: S1's band below the overlap and T1's above it, nothing inside the overlap
    assert spans == [(pytest.approx(s1 - 10), pytest.approx(s1 + 2)), (pytest.approx(s1 + 10), pytest.approx(s1 + 22))]
    for (a0, a1), (b0, b1) in zip(spans, spans[1:]):
        assert a1 <= b0 + 1e-9  # no two hatched areas share a y range
    # the histogram's interval of the mean over the bars: an outline too, not a tint over the bars' colour
    ax = plot_histogram(np.random.default_rng(0).normal(0.0, 0.05, 50)).axes[0]
    span = next(p for p in ax.patches if p.get_label() == "interval of the mean")
    assert span.get_facecolor()[3] == 0.0 and span.get_hatch()


def test_a_followed_state_on_the_plain_states_reference_draws_no_second_band():
    fig = plot_convergence(_followed_scan(), states=["S1", "S1_followed"], tol_eV=0.01)
    assert len(tolerance_bands(fig)[fig.axes[0]]) == 1
    labels = [t.get_text() for t in figure_legend(fig).get_texts()]
    assert any("band as S1 shift" in t for t in labels)
    # a followed state that moved away from the plain one (a state swap) keeps its own band
    df = _followed_scan()
    df = df.assign(S1_followed_shift_eV=df.S1_shift_eV + 0.05)
    swapped = plot_convergence(df, states=["S1", "S1_followed"])
    assert len(tolerance_bands(swapped)[swapped.axes[0]]) == 2


def _bars(ax):
    from matplotlib.patches import Rectangle

    return [p for p in ax.patches if isinstance(p, Rectangle) and p.get_label() != "interval of the mean"
            and p.get_height() > 0 and p.get_width() < 1]


def test_histogram_note_and_legend_cover_no_bar():
    rng = np.random.default_rng(4)
    for x in (rng.normal(0.0, 0.05, 300), -rng.gamma(1.5, 0.03, 300)):  # peak in the middle / at the right
        fig = plot_histogram(x, bins=20)
        renderer = _drawn(fig)
        ax = fig.axes[0]
        bars = [b.get_window_extent(renderer) for b in _bars(ax)]
        assert len(bars) >= 10
        for box in (ax.texts[0].get_window_extent(renderer), ax.get_legend().get_window_extent(renderer)):
            assert not any(_overlap(box, b) for b in bars)
            assert box.x1 <= fig.bbox.x1 + 1  # inside the saved figure


def test_histogram_draws_the_gaussian_only_for_an_unskewed_sample():
    rng = np.random.default_rng(5)
    normal = rng.normal(3.0, 0.05, 400)
    # a second-order (quadratic) shift, like the film model's S1: -(field)^2 of a Gaussian field is a
    # scaled chi-square(1), skewness sqrt(8) = 2.83 in theory (Johnson, Kotz & Balakrishnan, Continuous
    # Univariate Distributions 1, 1994)
    skewed = -0.02 * rng.normal(0.0, 1.0, 400) ** 2
    ax = plot_histogram(normal).axes[0]
    assert [ln.get_label() for ln in ax.lines] == ["Gaussian (mean, σ)", "mean"]
    assert "skewed" not in ax.texts[0].get_text()
    ax = plot_histogram(skewed).axes[0]
    assert [ln.get_label() for ln in ax.lines] == ["mean"]
    g1 = sps.skew(skewed)
    assert g1 == pytest.approx(-np.sqrt(8.0), abs=0.6)
    text = ax.texts[0].get_text()
    assert f"skewed (g1 = {g1:.2f})" in text and "Gaussian not drawn" in text
    # the decision is scipy's skewtest (D'Agostino 1970) at 5 %
    assert skew_check(skewed)["p"] == pytest.approx(sps.skewtest(skewed).pvalue)
    assert skew_check(normal)["skewed"] is bool(sps.skewtest(normal).pvalue < 0.05) is False


def test_skew_check_below_eight_values_uses_the_standard_error_of_skewness():
    # skewtest needs 8 values; below that: |g1| > 2 sqrt(6/n) (common practice)
    few = np.array([0.0, 0.01, 0.02, 0.03, 0.5])
    g1 = sps.skew(few)
    out = skew_check(few)
    assert out["g1"] == pytest.approx(g1) and np.isnan(out["p"])
    assert out["skewed"] is bool(abs(g1) > 2 * np.sqrt(6 / 5))
    assert skew_check([0.0, 0.01, 0.02, 0.03, 0.04])["skewed"] is False


def test_histogram_range_ignores_outliers_and_counts_them():
    rng = np.random.default_rng(6)
    x = np.concatenate([rng.normal(0.0, 0.05, 500), [2.5, 3.0]])  # two values 50-60 σ out
    ax = plot_histogram(x).axes[0]
    lo, hi = ax.get_xlim()
    assert hi < 0.5 and lo > -0.5
    assert "2 of 502 values beyond" in ax.texts[0].get_text()
    # the statistics still use every value
    assert f"σ = {1e3 * np.std(x, ddof=1):.0f} meV" in ax.texts[0].get_text()
    # the bars keep the normalisation of all values: their area is the fraction shown
    bars = _bars(ax)
    assert sum(b.get_height() * b.get_width() for b in bars) == pytest.approx(500 / 502)


def test_growth_and_correlation_legends_cover_no_axes():
    rng = np.random.default_rng(3)
    rows = []
    for r in (8.0, 12.0, 16.0):
        s = disorder_stats(rng.normal(-0.1, 0.05, 40), seed=int(r), n_boot=300)
        rows.append(pd.concat([pd.Series({"radius_A": r}), s]))
    corr = spatial_correlation(rng.uniform(0, 20, (200, 3)), rng.normal(size=200), [20, 20, 20, 90, 90, 90],
                               n_bins=8, n_boot=200, seed=0)
    for fig, n_entries in ((plot_growth(pd.DataFrame(rows)), 4), (plot_correlation(corr), 1)):
        renderer = _drawn(fig)
        leg = figure_legend(fig)
        assert len(leg.get_texts()) == n_entries
        box = leg.get_window_extent(renderer)
        assert all(not _overlap(box, ax.get_window_extent(renderer)) for ax in fig.axes)
        assert box.y0 >= fig.bbox.y0 - 1  # inside the figure


def test_histogram_shows_shifts_in_meV_with_the_same_statistics():
    rng = np.random.default_rng(11)
    shift = rng.normal(-0.011, 0.047, 256)  # eV, like the film model's S1 shift
    st = disorder_stats(shift, seed=0, n_boot=300)
    ax = plot_histogram(shift, st, label="S1 shift", show_in="meV").axes[0]
    assert ax.get_xlabel() == "S1 shift (meV)" and ax.get_ylabel() == "probability density (1/meV)"
    text = ax.texts[0].get_text()
    # the same numbers as the eV statistics, times 1000 (the side table's σ and interval)
    assert f"mean = {1e3 * st['mean']:.1f} meV" in text
    assert f"σ = {1e3 * st['sigma']:.0f} meV [{1e3 * st['sigma_ci_lo']:.0f}, {1e3 * st['sigma_ci_hi']:.0f}]" in text
    gx, gy = ax.lines[0].get_data()
    np.testing.assert_allclose(gy, sps.norm.pdf(gx, 1e3 * np.mean(shift), 1e3 * np.std(shift, ddof=1)), rtol=1e-10)
    with pytest.raises(InputError, match="show_in='meV' with unit='meV'"):
        plot_histogram(1e3 * shift, unit="meV", show_in="meV")


def test_parity_note_covers_no_point_and_gives_no_r_from_two_pairs():
    # the report's parity plot hid one of its two points under the note, and printed r = -1.000
    qm, model = np.array([-15.2, -6.7]), np.array([12.0, 4.5])
    fig = plot_parity(qm, model, unit="meV")
    ax = fig.axes[0]
    renderer = _drawn(fig)
    note = ax.texts[0].get_window_extent(renderer)
    points = ax.collections[0].get_offsets()
    for x, y in ax.transData.transform(points):
        assert not (note.x0 <= x <= note.x1 and note.y0 <= y <= note.y1)
    assert not _overlap(note, ax.get_window_extent(renderer))
    lines = ax.texts[0].get_text().splitlines()
    assert "r: needs 3 pairs" in lines and not any(t.startswith("r = ") for t in lines)
