"""Plots of radius scans and site-energy statistics (matplotlib).

Every function returns a :class:`matplotlib.figure.Figure`. Figures are
built with the object-oriented API (``Figure()``, not ``pyplot``), so they
work headless, never open windows and are not kept alive by pyplot; save
with ``fig.savefig("scan.png")``. Pass ``ax=`` to draw into an existing
axes (the figure of that axes is returned).

Energies are taken to be in eV; widths σ are drawn in meV where marked.

Palette: the eight-colour set of Okabe & Ito ("Color Universal Design",
2008), which stays distinguishable under the common colour-vision
deficiencies; the order below is this module's own.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..errors import InputError
from ..labels import column_label
from ..stats import converged_radius, correlation_note, disorder_stats

__all__ = [
    "PALETTE",
    "plot_convergence",
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


def _label_of(col: str) -> str:
    """'S1_shift_eV' -> 'S1'."""
    return col[: -len("_shift_eV")] if col.endswith("_shift_eV") else col


def plot_convergence(
    scan_df: pd.DataFrame,
    states: Sequence[str] | None = None,
    *,
    tol_eV: float = 0.010,
    periodic: float | Mapping[str, float] | None = None,
    ax: Axes | None = None,
) -> Figure:
    """Environment shift against cluster radius, one line per quantity.

    Draws each shift (eV) vs ``radius_A``, a band of ±``tol_eV`` around
    each quantity's reference (the periodic limit when given, else the
    largest-radius value), the periodic limit as a dashed line, and the
    converged radius from :func:`clusterlab.stats.converged_radius` as a
    dotted vertical line.

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
        Lines: one per quantity, one dashed per periodic limit, one dotted
        per converged quantity. Patches: one tolerance band per quantity.

    Raises
    ------
    InputError
        If ``radius_A`` or a requested column is missing, or no shift column
        is found.
    """
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
            for key in (c, _label_of(c)):
                if key in periodic:
                    limits[c] = float(periodic[key])
    fig, ax = _new_axes(ax)
    rows = scan_df[np.isfinite(pd.to_numeric(scan_df["radius_A"], errors="coerce"))]
    rows = rows.sort_values("radius_A")
    r = rows["radius_A"].to_numpy(dtype=float)
    # a judged quantity that is not a shift (ΔEST, a few eV) gets its own axis on the right, so the
    # shifts (tens of meV) stay readable
    others = [c for c in cols if not str(c).endswith("_shift_eV")]
    right = ax.twinx() if others else None
    main = ax
    for i, c in enumerate(cols):
        colour = PALETTE[i % len(PALETTE)]
        y = rows[c].to_numpy(dtype=float)
        name = _label_of(c)
        ax = right if c in others else main
        ax.plot(r, y, marker="o", color=colour, ls="--" if c in others else "-",
                label=f"{column_label(c)}, right axis" if c in others else f"{name} shift")
        ref = limits.get(c)
        finite = np.isfinite(y)
        if ref is None and finite.any():
            ref_val = float(y[finite][-1])
        else:
            ref_val = ref  # type: ignore[assignment]
        if ref_val is not None and np.isfinite(ref_val):
            ax.axhspan(ref_val - tol_eV, ref_val + tol_eV, color=colour, alpha=0.12, lw=0)
        if ref is not None:
            ax.axhline(ref, color=colour, ls="--", lw=1.2, label=f"{name} periodic limit")
        if finite.sum() >= 2:
            verdict = converged_radius(r, y, tol=tol_eV, reference=ref)
            if verdict.converged:
                ax.axvline(verdict.radius_A, color=colour, ls=":", lw=1.2,
                           label=f"{name} converged at {verdict.radius_A:g} Å")
    ax = main
    ax.set_xlabel("cluster radius (Å)")
    ax.set_ylabel("environment shift (eV)")
    ax.set_title(f"shift vs radius (band: ±{1e3 * tol_eV:g} meV)", fontsize="medium")
    handles, labels = ax.get_legend_handles_labels()
    if right is not None:
        right.set_ylabel(", ".join(column_label(c) for c in others))
        more = right.get_legend_handles_labels()
        handles, labels = handles + more[0], labels + more[1]
    # below the axes: inside, the legend of several quantities covered their curves
    ax.legend(handles, labels, fontsize="small", loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2,
              frameon=False)
    return fig



def plot_histogram(
    values: npt.ArrayLike,
    stats: pd.Series | None = None,
    *,
    ax: Axes | None = None,
    label: str = "site energy",
    unit: str = "eV",
    bins: int | str = "auto",
    seed: int | None = 0,
) -> Figure:
    """Histogram of site energies with the Gaussian fit and the interval on the mean.

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
        Passed to numpy's histogram.
    seed : int or None, default 0
        Bootstrap seed when ``stats`` is computed here.

    Returns
    -------
    matplotlib.figure.Figure
        Lines: the Gaussian fit and the mean. Patches: the histogram bars
        and the shaded interval of the mean. A text box gives mean, σ and
        their intervals.
    """
    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    if stats is None:
        stats = disorder_stats(x, seed=seed)
    for key in ("mean", "sigma", "gauss_mu", "gauss_sigma", "mean_lo", "mean_hi", "sigma_lo", "sigma_hi",
                "sigma_ci_lo", "sigma_ci_hi", "sigma_ci_method"):
        if key not in stats.index:
            raise InputError(f"plot_histogram: stats has no entry {key!r}; pass disorder_stats(values)")
    fig, ax = _new_axes(ax)
    ax.hist(x, bins=bins, density=True, color=PALETTE[5], edgecolor="white", alpha=0.9, label="sites")
    # the curve uses the σ the text reports (ddof=1), not a second estimate
    mu, sg = float(stats["mean"]), float(stats["sigma"])
    grid = np.linspace(x.min() - 0.5 * sg, x.max() + 0.5 * sg, 300)
    if sg > 0:
        pdf = np.exp(-0.5 * ((grid - mu) / sg) ** 2) / (sg * np.sqrt(2.0 * np.pi))
        ax.plot(grid, pdf, color=PALETTE[0], lw=2, label="Gaussian (mean, σ)")
    ax.axvline(float(stats["mean"]), color=PALETTE[1], lw=1.5, label="mean")
    ax.axvspan(float(stats["mean_lo"]), float(stats["mean_hi"]), color=PALETTE[1], alpha=0.2, lw=0)
    conf = float(stats.get("confidence", 0.95))
    scale, sunit = (1e3, "meV") if unit == "eV" else (1.0, unit)
    text = (
        f"n = {int(stats.get('n', x.size))}\n"
        f"mean = {float(stats['mean']):.3f} {unit} "
        f"[{float(stats['mean_lo']):.3f}, {float(stats['mean_hi']):.3f}]\n"
        f"σ = {scale * float(stats['sigma']):.0f} {sunit} "
        f"[{scale * float(stats['sigma_ci_lo']):.0f}, {scale * float(stats['sigma_ci_hi']):.0f}]\n"
        f"({100 * conf:g} % intervals; σ: {stats['sigma_ci_method']})"
    )
    ax.text(0.02, 0.98, text, transform=ax.transAxes, va="top", ha="left", fontsize="small",
            bbox={"boxstyle": "round", "facecolor": "white", "alpha": 0.85, "edgecolor": _GREY})
    ax.set_xlabel(f"{label} ({unit})")
    ax.set_ylabel(f"probability density (1/{unit})")
    ax.legend(fontsize="small", loc="upper right")
    return fig


def plot_growth(growth_df: pd.DataFrame, *, label: str = "environment shift") -> Figure:
    """Mean shift and disorder width σ against cluster radius, with interval bands.

    Parameters
    ----------
    growth_df : pandas.DataFrame
        One row per radius, columns ``radius_A`` (Å), ``mean``, ``mean_lo``,
        ``mean_hi`` (eV), ``sigma``, ``sigma_lo``, ``sigma_hi`` (eV): e.g.
        :func:`clusterlab.stats.disorder_stats` rows per radius.
    label : str
        What the values are, for the y axis of the top panel.

    Returns
    -------
    matplotlib.figure.Figure
        Two axes (mean in eV on top, σ in meV below), one line and one
        shaded band each.
    """
    cols = ["radius_A", "mean", "mean_lo", "mean_hi", "sigma", "sigma_lo", "sigma_hi"]
    _need(growth_df, cols, "plot_growth")
    g = growth_df[cols].apply(pd.to_numeric, errors="coerce").sort_values("radius_A")
    r = g["radius_A"].to_numpy(dtype=float)
    fig = Figure(figsize=(5.0, 5.2), layout="constrained")
    ax_m, ax_s = fig.subplots(2, 1, sharex=True)
    ax_m.fill_between(r, g["mean_lo"].to_numpy(dtype=float), g["mean_hi"].to_numpy(dtype=float),
                      color=PALETTE[0], alpha=0.25, lw=0, label="confidence interval")
    ax_m.plot(r, g["mean"].to_numpy(dtype=float), marker="o", color=PALETTE[0], label="mean")
    ax_m.set_ylabel(f"mean {label} (eV)")
    ax_m.legend(fontsize="small")
    ax_s.fill_between(r, 1e3 * g["sigma_lo"].to_numpy(dtype=float), 1e3 * g["sigma_hi"].to_numpy(dtype=float),
                      color=PALETTE[1], alpha=0.25, lw=0, label="confidence interval")
    ax_s.plot(r, 1e3 * g["sigma"].to_numpy(dtype=float), marker="s", color=PALETTE[1], label="σ")
    ax_s.set_ylabel("disorder width σ (meV)")
    ax_s.set_xlabel("cluster radius (Å)")
    ax_s.legend(fontsize="small")
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
            for x, y, k in zip(r, c, d["n_pairs"].to_numpy()):
                ax.annotate(f"{int(k)}", (x, y), textcoords="offset points", xytext=(0, 6), ha="center",
                            fontsize="x-small", color=_GREY)
        ax.set_xlim(0.0, r_top if r_top else None)
        ax.legend(fontsize="small", title="numbers: pairs per bin", title_fontsize="x-small")
    ax.set_xlabel("centroid distance r (Å)")
    ax.set_ylabel("C(r) = ⟨δE_i δE_j⟩ / σ² (dimensionless)")
    if title:
        ax.set_title(title, fontsize="medium")
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
    (in meV when ``unit`` is eV) and Pearson's r.

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
    r = float(np.corrcoef(xa, ya)[0, 1]) if np.std(xa) > 0 and np.std(ya) > 0 else float("nan")
    fig, ax = _new_axes(ax, figsize=(4.2, 4.0))
    lo = float(min(xa.min(), ya.min()))
    hi = float(max(xa.max(), ya.max()))
    pad = 0.05 * (hi - lo if hi > lo else 1.0)
    ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color=_GREY, lw=1, ls="--", label="y = x")
    ax.scatter(xa, ya, s=18, color=PALETTE[0], alpha=0.8, label="sites")
    scale, eunit = (1e3, "meV") if unit == "eV" else (1.0, unit)
    text = (
        f"RMS error = {scale * rms:.1f} {eunit}\nmean error = {scale * mean_err:+.1f} {eunit}\n"
        f"r = {r:.3f}   (n = {xa.size})"
    )
    ax.text(0.03, 0.97, text, transform=ax.transAxes, va="top", ha="left", fontsize="small",
            bbox={"boxstyle": "round", "facecolor": "white", "alpha": 0.85, "edgecolor": _GREY})
    ax.set_xlim(lo - pad, hi + pad)
    ax.set_ylim(lo - pad, hi + pad)
    ax.set_aspect("equal")
    ax.set_xlabel(f"{xlabel} ({unit})")
    ax.set_ylabel(f"{ylabel} ({unit})")
    ax.legend(fontsize="small", loc="lower right")
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
    axes[0].legend(fontsize="small")
    if ct_cols:
        axes[1].set_ylabel("hole–electron distance (Å)")
        axes[1].legend(fontsize="small")
    axes[-1].set_xlabel("torsion (degrees)")
    axes[-1].set_xlim(-180, 180)
    return fig
