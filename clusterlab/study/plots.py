"""Plots of radius scans and site-energy statistics (matplotlib).

Every function returns a :class:`matplotlib.figure.Figure`. Figures are
built with the object-oriented API (``Figure()``, not ``pyplot``), so they
work headless, never open windows and are not kept alive by pyplot; save
with ``fig.savefig("scan.png")``. Pass ``ax=`` to draw into an existing
axes (the figure of that axes is returned).

Energies are taken to be in eV; widths σ are drawn in meV where marked.

Readability rules kept by the convergence plot and the histogram: legends and
notes sit outside the axes, so they cover no data; bands are hatched outlines,
never filled tints that mix where they overlap; a Gaussian is drawn only over
a sample that is not significantly skewed (:func:`skew_check`); a histogram's
x-range comes from robust percentiles, with the values beyond it counted.

Palette: the eight-colour set of Okabe & Ito ("Color Universal Design",
2008), which stays distinguishable under the common colour-vision
deficiencies; the order below is this module's own.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from ..errors import InputError
from ..labels import column_label, quantity_name, shown_in_meV
from ..stats import converged_radius, correlation_note, disorder_stats

__all__ = [
    "PALETTE",
    "plot_convergence",
    "skew_check",
    "figure_legend",
    "tolerance_bands",
    "plot_histogram",
    "plot_growth",
    "plot_correlation",
    "plot_parity",
    "plot_torsion",
]

#: Colour-blind-safe colours (Okabe & Ito 2008), in the order used.
PALETTE: tuple[str, ...] = (
    "#0072B2",  # blue
    "#D55E00",  # vermillion
    "#009E73",  # bluish green
    "#CC79A7",  # reddish purple
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#F0E442",  # yellow
    "#000000",  # black
)
_GREY = "#7f7f7f"


def _new_axes(ax: Axes | None, figsize: tuple[float, float] = (5.0, 3.6)) -> tuple[Figure, Axes]:
    if ax is not None:
        return ax.figure, ax  # type: ignore[return-value]
    fig = Figure(figsize=figsize, layout="constrained")
    return fig, fig.add_subplot()


def _need(df: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{what} needs a pandas DataFrame; got {type(df).__name__}")
    for c in columns:
        if c not in df.columns:
            raise InputError(f"{what}: column {c!r} is missing; the table has columns {list(df.columns)}")


def _state_of(col: str) -> str:
    """'S1_shift_eV' -> 'S1'; 'S1_followed_shift_eV' -> 'S1_followed' (keys of ``periodic``)."""
    return col[: -len("_shift_eV")] if col.endswith("_shift_eV") else col


#: hatch of each quantity's tolerance band, in turn (drawn only where the band overlaps no other band)
_HATCHES = ("//", "\\\\", "||", "--")


def _free_parts(lo: float, hi: float, others: list[tuple[float, float]]) -> list[tuple[float, float]]:
    """The parts of [lo, hi] that no interval of ``others`` covers."""
    parts = [(lo, hi)]
    for a, b in others:
        parts = [piece for p0, p1 in parts
                 for piece in ((p0, min(p1, a)), (max(p0, b), p1)) if piece[1] > piece[0]]
    return parts


def _draw_bands(ax: Axes, bands: list[tuple[float, float, str, int]], *, hatch: bool = True,
                linestyle: Any = "-") -> None:
    """Tolerance bands of one axes: each an outline in its colour (gid ``"band"``), hatched (gid
    ``"band-hatch"``) only where no other band of the axes overlaps it, so that overlapping bands
    read as crossing outlines, never as one muddy tint."""
    for k, (lo, hi, colour, i) in enumerate(bands):
        ax.axhspan(lo, hi, facecolor="none", edgecolor=to_rgba(colour, 0.9), lw=1.0, ls=linestyle, zorder=0.6,
                   gid="band")
        if not hatch:
            continue
        others = [(b[0], b[1]) for j, b in enumerate(bands) if j != k]
        for p0, p1 in _free_parts(lo, hi, others):
            ax.axhspan(p0, p1, facecolor="none", edgecolor="none", lw=0.0, hatch=_HATCHES[i % len(_HATCHES)],
                       hatchcolor=to_rgba(colour, 0.3), hatch_linewidth=0.6, zorder=0.5, gid="band-hatch")


def tolerance_bands(fig: Figure) -> dict[Axes, list]:
    """The band outlines of a convergence figure per axes (patches with gid ``"band"``)."""
    return {ax: [p for p in ax.patches if p.get_gid() == "band"] for ax in fig.axes}


def _outside_legend(fig: Figure, ax: Axes, own: bool, handles: list, labels: list, *, ncols: int = 2,
                    right_axis: bool = False) -> None:
    """A legend that never covers the data: below the axes in a figure this module made (constrained
    layout makes room for it), else to the right of the axes (beyond a right axis when there is one)."""
    if not handles:
        return
    if own:
        # two columns while the labels are short, else one; the figure grows by the rows it adds
        cols = min(ncols, len(handles)) if max(len(t) for t in labels) <= 30 else 1
        rows = -(-len(handles) // cols)
        w, h = fig.get_size_inches()
        fig.set_size_inches(w, h + 0.2 * rows)
        fig.legend(handles, labels, loc="outside lower center", ncols=cols, fontsize="small", frameon=False)
    else:
        ax.legend(handles, labels, loc="center left", bbox_to_anchor=(1.22 if right_axis else 1.02, 0.5),
                  fontsize="small", frameon=False)


def figure_legend(fig: Figure):
    """The legend of a figure made here: the figure's own (when this module made the figure) or the
    first axes' (when an axes was passed in); None when there is none."""
    if fig.legends:
        return fig.legends[0]
    for ax in fig.axes:
        if ax.get_legend() is not None:
            return ax.get_legend()
    return None


def plot_convergence(
    scan_df: pd.DataFrame,
    states: Sequence[str] | None = None,
    *,
    tol_eV: float = 0.010,
    periodic: float | Mapping[str, float] | None = None,
    ax: Axes | None = None,
) -> Figure:
    """Environment shift against cluster radius, one line per quantity.

    Draws each shift (in meV, as the tables show it) vs ``radius_A``, a band of
    ±``tol_eV`` around each quantity's reference (the periodic limit when given,
    else the largest-radius value), the periodic limit as a thin dashed line,
    and the converged radius from :func:`clusterlab.stats.converged_radius` as
    a dotted vertical line (and in the quantity's legend entry).

    Bands: an outline in the quantity's colour, hatched only where no other
    band of the same axes overlaps it, so that overlapping bands read as
    crossing outlines and never mix into one grey tint. A followed state
    (``S1_followed``) whose reference equals the plain state's (within a tenth
    of the tolerance) draws no band of its own: it would lie on the plain
    state's. The followed line is dashed with open squares over the plain
    state's filled circles, so both show where they coincide.

    A quantity that is not a shift (ΔEST, a few eV) goes into its own panel
    below the shifts (shared radius axis), with its own outlined and hatched
    band: on one axes with the shifts, or on a right axis over them, its band
    would cross theirs. When ``ax`` is given there is no room for a panel; such
    a quantity then goes on a right axis and its band is an outline only,
    dash-dotted like its line, with no hatch (so that it cannot mix with the
    shifts' bands behind it).

    The legend sits outside the axes (below them in a figure made here, to the
    right of a given ``ax``), one entry per quantity plus one each for the band
    and the periodic limit.

    Parameters
    ----------
    scan_df : pandas.DataFrame
        Rows with ``radius_A`` (Å) and shift columns named ``<state>_shift_eV``.
        Rows without a finite radius (a vacuum row) are skipped.
    states : sequence of str, optional
        States (``"S1"``) or column names (``"S1_shift_eV"``); default all
        ``*_shift_eV`` columns.
    tol_eV : float, default 0.010
        Half-width of the tolerance band (eV).
    periodic : float or mapping state/column -> float, optional
        Periodic (Ewald) limit per quantity (eV).
    ax : matplotlib.axes.Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
        Axes: the shifts (meV), then the panel (or right axis) of the other
        quantities (eV) when there are any. Lines: one per quantity, one
        dashed per periodic limit, one dotted per converged quantity. Patches:
        band outlines (gid ``"band"``, see :func:`tolerance_bands`) and their
        hatched free parts (gid ``"band-hatch"``).

    Raises
    ------
    InputError
        If ``radius_A`` or a requested column is missing, or no shift column
        is found.
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    _need(scan_df, ["radius_A"], "plot_convergence")
    if states is None:
        cols = [c for c in scan_df.columns if str(c).endswith("_shift_eV")]
        if not cols:
            raise InputError(
                "plot_convergence: no column named '<state>_shift_eV' (e.g. 'S1_shift_eV') in "
                f"{list(scan_df.columns)}"
            )
    else:
        cols = [s if s in scan_df.columns or s.endswith("_shift_eV") else f"{s}_shift_eV" for s in states]
        _need(scan_df, cols, "plot_convergence")
    if isinstance(periodic, (int, float)) and not isinstance(periodic, bool):
        if len(cols) != 1:
            raise InputError(
                f"plot_convergence: periodic={periodic!r} is one number for {len(cols)} quantities; "
                "give a mapping state -> periodic limit"
            )
        limits: dict[str, float] = {cols[0]: float(periodic)}
    elif periodic is None:
        limits = {}
    else:
        limits = {}
        for c in cols:
            for key in (c, _state_of(c)):
                if key in periodic:
                    limits[c] = float(periodic[key])
    own = ax is None
    # shifts (tens of meV) in meV on the main axes; the others (ΔEST, a few eV) in eV beside them
    others = [c for c in cols if not shown_in_meV(c)]
    if own:
        fig = Figure(figsize=(5.4, 5.4 if others else 3.8), layout="constrained")
        if others:
            main, low = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [2.0, 1.0]})
        else:
            main, low = fig.add_subplot(), None
    else:
        fig, main = ax.figure, ax  # type: ignore[assignment]
        low = main.twinx() if others else None
    rows = scan_df[np.isfinite(pd.to_numeric(scan_df["radius_A"], errors="coerce"))]
    rows = rows.sort_values("radius_A")
    r = rows["radius_A"].to_numpy(dtype=float)
    handles: list[Any] = []
    bands: dict[Any, list[tuple[float, float, str, int]]] = {main: [], low: []}
    refs: dict[str, float] = {}
    any_limit = False
    for i, c in enumerate(cols):
        colour = PALETTE[i % len(PALETTE)]
        y = rows[c].to_numpy(dtype=float)
        scale = 1.0 if c in others else 1e3
        a = low if c in others else main
        name = quantity_name(c)
        if c in others:
            style = {"ls": "-.", "marker": "D", "ms": 5, "zorder": 2.5}
            label = f"{name} ({'lower panel' if own else 'right axis'})"
        elif "followed" in str(c):
            # over the plain state: open squares and dashes leave the plain line visible underneath
            style = {"ls": (0, (4, 2)), "marker": "s", "ms": 8, "mfc": "none", "mew": 1.4, "zorder": 3}
            label = f"{name} (open squares)"
        else:
            style = {"ls": "-", "marker": "o", "ms": 5, "zorder": 2.5}
            label = name
        (line,) = a.plot(r, scale * y, color=colour, lw=1.5, label=label, **style)
        handles.append(line)
        ref = limits.get(c)
        finite = np.isfinite(y)
        ref_val = float(y[finite][-1]) if ref is None and finite.any() else ref
        if ref_val is not None and np.isfinite(ref_val):
            refs[c] = float(ref_val)
            plain = str(c).replace("_followed", "")
            if "followed" in str(c) and plain in refs and abs(refs[plain] - ref_val) <= 0.1 * tol_eV:
                line.set_label(f"{label}, band as {quantity_name(plain)}")
                label = line.get_label()
            else:
                bands[a].append((scale * (ref_val - tol_eV), scale * (ref_val + tol_eV), colour, i))
        if ref is not None:
            a.axhline(scale * ref, color=colour, ls="--", lw=1.0, zorder=1)
            any_limit = True
        if finite.sum() >= 2:
            verdict = converged_radius(r, y, tol=tol_eV, reference=ref)
            if verdict.converged:
                a.axvline(verdict.radius_A, color=colour, ls=":", lw=1.2, zorder=1)
                line.set_label(f"{label}, converged at {verdict.radius_A:g} Å")
    _draw_bands(main, bands[main])
    if low is not None:
        # its own panel: hatched and outlined like the shifts'; a right axis over the shifts: outline only
        _draw_bands(low, bands[low], hatch=own, linestyle="-" if own else "-.")
    if bands[main] or bands[low]:
        handles.append(Patch(facecolor="none", edgecolor=_GREY, hatch="//", lw=1.0,
                             label=f"±{1e3 * tol_eV:g} meV around the reference (hatched where no other band is)"))
    if any_limit:
        handles.append(Line2D([], [], color=_GREY, ls="--", lw=1.0, label="periodic limit (its colour)"))
    main.set_ylabel("environment shift (meV)")
    main.set_title(f"shift vs radius (band: ±{1e3 * tol_eV:g} meV)", fontsize="medium")
    (low if own and low is not None else main).set_xlabel("cluster radius (Å)")
    if low is not None:
        low.set_ylabel(", ".join(column_label(c) for c in others))
    _outside_legend(fig, low if own and low is not None else main, own, handles, [h.get_label() for h in handles],
                    right_axis=low is not None and not own)
    return fig


#: robust x-range of a histogram: these percentiles of the values, widened by
#: :data:`HISTOGRAM_PAD` of their distance on each side (values beyond are
#: counted in a note, not drawn)
HISTOGRAM_PERCENTILES = (0.5, 99.5)
HISTOGRAM_PAD = 0.25

#: the entries of :func:`clusterlab.stats.disorder_stats` in the values' unit
_ENERGY_STATS = ("mean", "sigma", "mean_lo", "mean_hi", "sigma_lo", "sigma_hi", "sigma_chi2_lo", "sigma_chi2_hi",
                 "gauss_mu", "gauss_sigma", "sigma_ci_lo", "sigma_ci_hi")

#: significance level of the skewness test that decides whether a Gaussian is drawn
SKEW_ALPHA = 0.05


def skew_check(values: npt.ArrayLike, *, alpha: float = SKEW_ALPHA) -> dict[str, Any]:
    """Whether a sample is significantly skewed (then a Gaussian does not describe it).

    From 8 values on: D'Agostino's skewness test (``scipy.stats.skewtest``;
    D'Agostino, Biometrika 57, 679, 1970), skewed when its two-sided p is
    below ``alpha``. Below 8 values (where that test is not defined): skewed
    when |g1| exceeds twice its standard error sqrt(6/n) (common practice).

    Returns
    -------
    dict
        ``skewed`` (bool), ``g1`` (moment skewness, scipy's ``skew``), ``p``
        (NaN below 8 values), ``rule`` (text), ``n``.
    """
    from scipy import stats as sps

    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    n = int(x.size)
    if n < 3 or float(np.ptp(x)) == 0.0:
        return {"skewed": False, "g1": float("nan"), "p": float("nan"), "rule": "too few distinct values", "n": n}
    g1 = float(sps.skew(x))
    if n >= 8:
        p = float(sps.skewtest(x).pvalue)
        return {"skewed": bool(p < alpha), "g1": g1, "p": p, "rule": f"skewtest p = {p:.2g}", "n": n}
    se = float(np.sqrt(6.0 / n))
    return {"skewed": bool(abs(g1) > 2.0 * se), "g1": g1, "p": float("nan"),
            "rule": f"|g1| vs 2·sqrt(6/n) = {2 * se:.2f}", "n": n}


def plot_histogram(
    values: npt.ArrayLike,
    stats: pd.Series | None = None,
    *,
    ax: Axes | None = None,
    label: str = "site energy",
    unit: str = "eV",
    bins: int | str = "auto",
    seed: int | None = 0,
    show_in: str | None = None,
) -> Figure:
    """Histogram of site energies with the Gaussian of its mean and σ (when it fits) and the
    interval on the mean.

    The x-range runs over the robust percentiles :data:`HISTOGRAM_PERCENTILES`
    of the values (widened by :data:`HISTOGRAM_PAD`); values beyond it are not
    drawn and the note counts them (the statistics use every value). The
    Gaussian is drawn only when the sample is not significantly skewed
    (:func:`skew_check`); otherwise the note says "skewed (g1 = …): Gaussian
    not drawn". The note with n, mean, σ and their intervals and the legend
    sit outside the axes, right of them, so they cover no bar.

    Parameters
    ----------
    values : array_like, shape (n,)
        Energies (unit ``unit``); NaN dropped.
    stats : pandas.Series, optional
        Output of :func:`clusterlab.stats.disorder_stats` for ``values``;
        computed (with ``seed``) when not given.
    ax : matplotlib.axes.Axes, optional
    label : str
        What the values are, for the x axis ("S1 site energy").
    unit : str, default "eV"
    bins : int or str, default "auto"
        Passed to numpy's histogram (over the shown range).
    seed : int or None, default 0
        Bootstrap seed when ``stats`` is computed here.
    show_in : {"meV"}, optional
        Draw values given in eV (and their ``stats``) in meV, as the tables
        show shifts (:func:`clusterlab.labels.shown_in_meV`).

    Returns
    -------
    matplotlib.figure.Figure
        Lines: the Gaussian (when drawn) and the mean. Patches: the histogram
        bars (heights: count / (n × bin width), n counting every value, so
        the bars' area is the fraction of values shown) and the shaded
        interval of the mean. One text box (the note).
    """
    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    if stats is None:
        stats = disorder_stats(x, seed=seed)
    for key in ("mean", "sigma", "gauss_mu", "gauss_sigma", "mean_lo", "mean_hi", "sigma_lo", "sigma_hi",
                "sigma_ci_lo", "sigma_ci_hi", "sigma_ci_method"):
        if key not in stats.index:
            raise InputError(f"plot_histogram: stats has no entry {key!r}; pass disorder_stats(values)")
    if show_in is not None:
        if (unit, show_in) != ("eV", "meV"):
            raise InputError(f"plot_histogram: show_in={show_in!r} with unit={unit!r}; only eV values are "
                             "shown in 'meV'")
        # every statistic in the values' unit scales with them (the counts and shape numbers do not)
        stats = stats.copy()
        for key in _ENERGY_STATS:
            if key in stats.index:
                stats[key] = 1e3 * float(stats[key])
        x, unit = 1e3 * x, "meV"
    fig, ax = _new_axes(ax, figsize=(6.6, 3.6))
    mu, sg = float(stats["mean"]), float(stats["sigma"])
    p_lo, p_hi = np.percentile(x, HISTOGRAM_PERCENTILES)
    pad = HISTOGRAM_PAD * (p_hi - p_lo) if p_hi > p_lo else max(abs(p_lo) * 0.01, 1e-6)
    lo = min(p_lo - pad, float(stats["mean_lo"]))
    hi = max(p_hi + pad, float(stats["mean_hi"]))
    inside = (x >= lo) & (x <= hi)
    n_out = int(x.size - inside.sum())
    edges = np.histogram_bin_edges(x[inside], bins=bins)
    width = float(edges[1] - edges[0]) if len(edges) > 1 else 1.0
    # density over every value (the statistics' n), so the curve and the bars share one normalisation
    ax.hist(x[inside], bins=edges, weights=np.full(int(inside.sum()), 1.0 / (x.size * width)),
            color=PALETTE[5], edgecolor="white", alpha=0.9, label="sites")
    shape = skew_check(x)
    grid = np.linspace(float(edges[0]), float(edges[-1]), 300)
    if sg > 0 and not shape["skewed"]:
        # the curve uses the σ the text reports (ddof=1), not a second estimate
        pdf = np.exp(-0.5 * ((grid - mu) / sg) ** 2) / (sg * np.sqrt(2.0 * np.pi))
        ax.plot(grid, pdf, color=PALETTE[0], lw=2, label="Gaussian (mean, σ)")
    ax.axvline(mu, color=PALETTE[1], lw=1.5, label="mean")
    # the mean's interval as a hatched outline over the bars: a filled tint would mix with the bars' colour
    ax.axvspan(float(stats["mean_lo"]), float(stats["mean_hi"]), facecolor="none",
               edgecolor=to_rgba(PALETTE[1], 0.9), hatch="///", hatchcolor=to_rgba(PALETTE[1], 0.55),
               hatch_linewidth=0.7, lw=0.9, zorder=2.5, label="interval of the mean")
    # the axes end where the bars (and the mean's interval) end, not at the padded range
    x0, x1 = min(float(edges[0]), float(stats["mean_lo"])), max(float(edges[-1]), float(stats["mean_hi"]))
    margin = 0.03 * (x1 - x0 if x1 > x0 else 1.0)
    ax.set_xlim(x0 - margin, x1 + margin)
    ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
    conf = float(stats.get("confidence", 0.95))
    scale, sunit = (1e3, "meV") if unit == "eV" else (1.0, unit)
    nd = 3 if unit == "eV" else 1
    lines = [
        f"n = {int(stats.get('n', x.size))}",
        f"mean = {mu:.{nd}f} {unit}",
        f"  [{float(stats['mean_lo']):.{nd}f}, {float(stats['mean_hi']):.{nd}f}]",
        f"σ = {scale * sg:.0f} {sunit} "
        f"[{scale * float(stats['sigma_ci_lo']):.0f}, {scale * float(stats['sigma_ci_hi']):.0f}]",
        f"{100 * conf:g} % intervals",
        f"  (σ: {stats['sigma_ci_method']})",
    ]
    if shape["skewed"]:
        lines += [f"skewed (g1 = {shape['g1']:.2f}):", "  Gaussian not drawn", f"  ({shape['rule']})"]
    if n_out:
        lines += [f"{n_out} of {x.size} values beyond", "  the shown range, not drawn",
                  f"  ({HISTOGRAM_PERCENTILES[0]:g}–{HISTOGRAM_PERCENTILES[1]:g} percentiles",
                  f"  ± {100 * HISTOGRAM_PAD:g} % of their span)"]
    ax.text(1.03, 1.0, "\n".join(lines), transform=ax.transAxes, va="top", ha="left", fontsize="small",
            bbox={"boxstyle": "round", "facecolor": "white", "alpha": 0.85, "edgecolor": _GREY})
    ax.set_xlabel(f"{label} ({unit})")
    ax.set_ylabel(f"probability density (1/{unit})")
    ax.legend(fontsize="small", loc="lower left", bbox_to_anchor=(1.02, 0.0), frameon=False)
    return fig


def plot_growth(growth_df: pd.DataFrame, *, label: str = "environment shift", show_in: str | None = None) -> Figure:
    """Mean shift and disorder width σ against cluster radius, with interval bands.

    Parameters
    ----------
    growth_df : pandas.DataFrame
        One row per radius, columns ``radius_A`` (Å), ``mean``, ``mean_lo``,
        ``mean_hi`` (eV), ``sigma``, ``sigma_lo``, ``sigma_hi`` (eV): e.g.
        :func:`clusterlab.stats.disorder_stats` rows per radius.
    label : str
        What the values are, for the y axis of the top panel.
    show_in : {"meV"}, optional
        Draw the mean in meV too (a shift, as the tables show it).

    Returns
    -------
    matplotlib.figure.Figure
        Two axes (mean in eV, or meV with ``show_in``, on top; σ in meV
        below), one line and one shaded band each.
    """
    if show_in not in (None, "meV"):
        raise InputError(f"plot_growth: show_in={show_in!r}; give 'meV' or None (eV)")
    m_scale, m_unit = (1e3, "meV") if show_in == "meV" else (1.0, "eV")
    cols = ["radius_A", "mean", "mean_lo", "mean_hi", "sigma", "sigma_lo", "sigma_hi"]
    _need(growth_df, cols, "plot_growth")
    g = growth_df[cols].apply(pd.to_numeric, errors="coerce").sort_values("radius_A")
    r = g["radius_A"].to_numpy(dtype=float)
    fig = Figure(figsize=(5.0, 5.2), layout="constrained")
    ax_m, ax_s = fig.subplots(2, 1, sharex=True)
    ax_m.fill_between(r, m_scale * g["mean_lo"].to_numpy(dtype=float), m_scale * g["mean_hi"].to_numpy(dtype=float),
                      color=PALETTE[0], alpha=0.25, lw=0, label="interval of the mean")
    ax_m.plot(r, m_scale * g["mean"].to_numpy(dtype=float), marker="o", color=PALETTE[0], label="mean")
    ax_m.set_ylabel(f"mean {label} ({m_unit})")
    ax_s.fill_between(r, 1e3 * g["sigma_lo"].to_numpy(dtype=float), 1e3 * g["sigma_hi"].to_numpy(dtype=float),
                      color=PALETTE[1], alpha=0.25, lw=0, label="interval of σ")
    ax_s.plot(r, 1e3 * g["sigma"].to_numpy(dtype=float), marker="s", color=PALETTE[1], label="σ")
    ax_s.set_ylabel("disorder width σ (meV)")
    ax_s.set_xlabel("cluster radius (Å)")
    # one legend for both panels, below them: inside, it sat on the bands
    handles, labels = [], []
    for a in (ax_m, ax_s):
        h, lab = a.get_legend_handles_labels()
        handles, labels = handles + h, labels + lab
    _outside_legend(fig, ax_s, True, handles, labels)
    return fig


def plot_correlation(corr_df: pd.DataFrame, *, ax: Axes | None = None, min_pairs: int | None = None,
                     title: str | None = None) -> Figure:
    """Spatial correlation C(r) of site-energy fluctuations, with intervals and pair counts.

    Parameters
    ----------
    corr_df : pandas.DataFrame
        Output of :func:`clusterlab.stats.spatial_correlation` (columns
        ``r_A``, ``C``; ``n_pairs``, ``shown``, ``C_lo``, ``C_hi`` used when
        present).
    ax : matplotlib.axes.Axes, optional
    min_pairs : int, optional
        Bins with fewer pairs are not drawn; default: the table's ``shown``
        column (its ``min_pairs``), else every bin.
    title : str, optional
        Axes title (e.g. where the sites come from).

    Returns
    -------
    matplotlib.figure.Figure
        Lines: the zero line and C(r) (with its interval as error bars when
        the table has one). Each point is labelled with its pair count.
        When no bin can be drawn the axes hold the reason in words
        (:func:`clusterlab.stats.correlation_note`) instead of points.
    """
    _need(corr_df, ["r_A", "C"], "plot_correlation")
    d = corr_df
    if min_pairs is not None and "n_pairs" in d.columns:
        d = d[d["n_pairs"] >= min_pairs]
    elif "shown" in d.columns:
        d = d[d["shown"].astype(bool)]
    d = d[np.isfinite(pd.to_numeric(d["C"], errors="coerce"))]
    own = ax is None
    fig, ax = _new_axes(ax)
    ax.axhline(0.0, color=_GREY, lw=0.8)
    r_top = float(corr_df["r_hi_A"].max()) if "r_hi_A" in corr_df.columns and len(corr_df) else None
    if not len(d):
        note = correlation_note(corr_df.assign(shown=False)) if "n_pairs" in corr_df.columns else \
            "C(r) is not drawn: no distance bin has a value"
        ax.text(0.5, 0.5, "\n".join(textwrap.wrap(note, 48)), transform=ax.transAxes, ha="center", va="center",
                fontsize="small")
        ax.set_xlim(0.0, r_top if r_top else 1.0)
    else:
        r = d["r_A"].to_numpy(dtype=float)
        c = d["C"].to_numpy(dtype=float)
        has_ci = {"C_lo", "C_hi"} <= set(d.columns) and np.isfinite(d["C_lo"].to_numpy(dtype=float)).any()
        if has_ci:
            err = np.vstack([c - d["C_lo"].to_numpy(dtype=float), d["C_hi"].to_numpy(dtype=float) - c])
            ax.errorbar(r, c, yerr=np.where(np.isfinite(err), err, 0.0), marker="o", color=PALETTE[2], capsize=0,
                        label=f"C(r), {100 * float(corr_df.attrs.get('confidence', 0.95)):g} % bootstrap interval")
        else:
            ax.plot(r, c, marker="o", color=PALETTE[2], label="C(r)")
        if "n_pairs" in d.columns:
            # a row along the top edge, outside the data: beside each point they collided with the
            # point and its error bar
            for x, k in zip(r, d["n_pairs"].to_numpy()):
                ax.annotate(f"{int(k)}", (x, 1.0), xycoords=ax.get_xaxis_transform(), textcoords="offset points",
                            xytext=(0, 3), ha="center", va="bottom", fontsize="x-small", color=_GREY)
        ax.set_xlim(0.0, r_top if r_top else None)
        handles, labels = ax.get_legend_handles_labels()
        _outside_legend(fig, ax, own, handles, [f"{labels[0]} (numbers on top: pairs per bin)"] + labels[1:]
                        if "n_pairs" in d.columns else labels)
    ax.set_xlabel("centroid distance r (Å)")
    ax.set_ylabel("C(r) = ⟨δE_i δE_j⟩ / σ² (dimensionless)")
    if title:
        ax.set_title(title, fontsize="medium", pad=14)  # above the row of pair counts
    return fig


def plot_parity(
    x: npt.ArrayLike,
    y: npt.ArrayLike,
    *,
    ax: Axes | None = None,
    xlabel: str = "QM site energy",
    ylabel: str = "model site energy",
    unit: str = "eV",
) -> Figure:
    """Parity plot of a model against reference (QM) values.

    Annotates the RMS error sqrt(mean((y-x)²)), the mean error mean(y-x)
    (in meV when ``unit`` is eV) and Pearson's r (from 3 pairs on: two
    points always give ±1, which says nothing; the report's tables leave it
    blank below 3 as well). The note and the legend sit right of the axes, so
    they cover no point.

    Parameters
    ----------
    x : array_like, shape (n,)
        Reference (QM) values.
    y : array_like, shape (n,)
        Model values. Pairs with NaN in either are dropped.
    ax : matplotlib.axes.Axes, optional
    xlabel, ylabel : str
    unit : str, default "eV"

    Returns
    -------
    matplotlib.figure.Figure
        One scatter collection, one line (y = x) and the annotation text.

    Raises
    ------
    InputError
        If x and y differ in length or fewer than 2 complete pairs remain.
    """
    xa = np.asarray(x, dtype=float).ravel()
    ya = np.asarray(y, dtype=float).ravel()
    if xa.size != ya.size:
        raise InputError(f"plot_parity: x has {xa.size} values but y has {ya.size}; give one y per x")
    ok = np.isfinite(xa) & np.isfinite(ya)
    xa, ya = xa[ok], ya[ok]
    if xa.size < 2:
        raise InputError(f"plot_parity needs at least 2 complete pairs; got {xa.size}")
    err = ya - xa
    rms = float(np.sqrt(np.mean(err**2)))
    mean_err = float(np.mean(err))
    r = float(np.corrcoef(xa, ya)[0, 1]) if xa.size >= 3 and np.std(xa) > 0 and np.std(ya) > 0 else float("nan")
    fig, ax = _new_axes(ax, figsize=(6.0, 4.0))
    lo = float(min(xa.min(), ya.min()))
    hi = float(max(xa.max(), ya.max()))
    pad = 0.05 * (hi - lo if hi > lo else 1.0)
    ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color=_GREY, lw=1, ls="--", label="y = x")
    ax.scatter(xa, ya, s=18, color=PALETTE[0], alpha=0.8, label="sites")
    scale, eunit = (1e3, "meV") if unit == "eV" else (1.0, unit)
    r_text = f"r = {r:.3f}" if np.isfinite(r) else "r: needs 3 pairs" if xa.size < 3 else "r: a side is constant"
    text = (
        f"RMS error = {scale * rms:.1f} {eunit}\nmean error = {scale * mean_err:+.1f} {eunit}\n"
        f"{r_text}\nn = {xa.size}"
    )
    ax.text(1.04, 1.0, text, transform=ax.transAxes, va="top", ha="left", fontsize="small",
            bbox={"boxstyle": "round", "facecolor": "white", "alpha": 0.85, "edgecolor": _GREY})
    ax.set_xlim(lo - pad, hi + pad)
    ax.set_ylim(lo - pad, hi + pad)
    ax.set_aspect("equal")
    # few ticks: long labels (-0.015) of a square axes ran into each other
    ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5))
    ax.set_xlabel(f"{xlabel} ({unit})")
    ax.set_ylabel(f"{ylabel} ({unit})")
    ax.legend(fontsize="small", loc="lower left", bbox_to_anchor=(1.02, 0.0), frameon=False)
    return fig



def plot_torsion(result, *, species: str | None = None) -> Figure:
    """ΔEST and the hole-electron distance of each copy against its torsion.

    Parameters
    ----------
    result : clusterlab.study.doped.TorsionResult
    species : str, optional
        One species (default: every species of the result, one colour each).

    Returns
    -------
    matplotlib.figure.Figure
        Top: ΔEST (meV) per copy with the fitted smooth curve; bottom (when
        the result has them): the S1 and T1 hole-electron distances (Å).
    """
    t = result.table
    _need(t, ["species", "torsion_deg", "dEST_eV"], "plot_torsion")
    names = sorted(t["species"].unique()) if species is None else [species]
    if species is not None and species not in set(t["species"]):
        raise InputError(f"species={species!r} is not in the result; it has {sorted(t['species'].unique())}")
    ct_cols = [c for c in ("S1_ct_distance_A", "T1_ct_distance_A") if c in t.columns and t[c].notna().any()]
    fig = Figure(figsize=(5.4, 5.6 if ct_cols else 3.6), layout="constrained")
    axes = fig.subplots(2 if ct_cols else 1, 1, sharex=True, squeeze=False)[:, 0]
    for i, sp in enumerate(names):
        sub = t[t["species"] == sp]
        colour = PALETTE[i % len(PALETTE)]
        axes[0].scatter(sub["torsion_deg"], 1e3 * sub["dEST_eV"].astype(float), s=14, color=colour,
                        label=f"{sp} (n={len(sub)})")
        if sp in set(result.fits["species"]):
            th, y = result.curve(sp)
            frac = float(result.fits.loc[result.fits["species"] == sp, "torsion_fraction"].iloc[0])
            axes[0].plot(th, 1e3 * y, color=colour, lw=1.2, label=f"{sp} fit: {100 * frac:.0f} % of var")
        for c, marker in zip(ct_cols, ("o", "^")):
            axes[1].scatter(sub["torsion_deg"], sub[c].astype(float), s=14, color=colour, marker=marker,
                            label=f"{sp} {c.split('_')[0]}")
    axes[0].set_ylabel("ΔEST = S1 − T1 (meV)")
    # legends right of the axes: inside, they sat on the points
    axes[0].legend(fontsize="small", loc="center left", bbox_to_anchor=(1.02, 0.5), frameon=False)
    if ct_cols:
        axes[1].set_ylabel("hole–electron distance (Å)")
        axes[1].legend(fontsize="small", loc="center left", bbox_to_anchor=(1.02, 0.5), frameon=False)
    axes[-1].set_xlabel("torsion (degrees)")
    axes[-1].set_xlim(-180, 180)
    return fig
