"""Statistics of site energies: disorder widths, decompositions, spatial
correlation and radius convergence.

Pure array kernels (layer 1): numpy / scipy / pandas in, numbers, Series,
DataFrames and small dataclasses out. No files, no MDAnalysis Universe
(only ``MDAnalysis.lib.distances`` for periodic minimum-image distances).

Energies may be in any unit; every output is in the unit of the input,
except the plain-text messages of :func:`converged_radius`, which assume eV
and print meV.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import special, stats

from .errors import InputError
from .labels import quantity_name
from .geometry import half_box_width_A

__all__ = [
    "disorder_stats",
    "grouped_disorder_stats",
    "static_dynamic",
    "conformational_environmental",
    "spatial_correlation",
    "converged_radius",
    "ConvergenceVerdict",
    "mean_offset",
    "periodic_fit",
    "fourier_basis",
]

#: Above this sample size the normality test switches from Shapiro-Wilk to
#: D'Agostino-Pearson (scipy's Shapiro-Wilk p-value is only reliable up to
#: about 5000 values).
SHAPIRO_MAX_N = 5000

#: smallest sample whose reported σ interval is the bootstrap one. Below it the
#: chi-square interval of a normal sample is reported: a bootstrap of σ from a
#: few values can only reshuffle those values, so its interval is far too
#: narrow (for Gaussian samples a nominal 95 % BCa interval covers the true σ
#: about 40 % of the time at n = 3 and about 84 % at n = 10), while the
#: chi-square interval is exact for Gaussian site energies, the usual disorder
#: model. From 30 values on the bootstrap BCa interval covers within a few
#: percent of nominal and needs no Gaussian assumption (site energies can be
#: skewed), so it is reported instead.
SIGMA_BOOTSTRAP_MIN_N = 30

#: Largest number of bootstrap values drawn in one block (memory bound).
_BOOT_BLOCK = 4_000_000


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------
def _as_1d_float(values: Any, name: str = "values") -> npt.NDArray[np.float64]:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be numbers; got {type(values).__name__} ({exc})") from exc
    if arr.ndim != 1:
        raise InputError(f"{name} must be one-dimensional; got shape {arr.shape}")
    return arr


def _check_confidence(confidence: float) -> float:
    if isinstance(confidence, (bool, np.bool_)) or not isinstance(confidence, (int, float, np.integer, np.floating)):
        raise InputError(f"confidence={confidence!r} is invalid; use a number between 0 and 1 (e.g. 0.95)")
    c = float(confidence)
    if not 0.0 < c < 1.0:
        raise InputError(f"confidence={confidence!r} is invalid; use a number between 0 and 1 (e.g. 0.95)")
    return c


def _bootstrap_indices(rng: np.random.Generator, n_boot: int, n: int) -> list[npt.NDArray[np.intp]]:
    """Resampling indices, (n_boot, n) in as few blocks as memory allows."""
    rows = max(1, _BOOT_BLOCK // max(n, 1))
    return [rng.integers(0, n, size=(min(rows, n_boot - start), n)) for start in range(0, n_boot, rows)]


def _bca(
    theta_hat: float,
    theta_boot: npt.NDArray[np.float64],
    theta_jack: npt.NDArray[np.float64],
    confidence: float,
) -> tuple[float, float]:
    """Bias-corrected and accelerated (BCa) bootstrap interval.

    Efron, J. Am. Stat. Assoc. 82, 171 (1987); Efron & Tibshirani,
    "An Introduction to the Bootstrap", Chapman & Hall (1993), ch. 14.
    """
    alpha = 0.5 * (1.0 - confidence)
    if np.ptp(theta_boot) == 0.0:
        return float(theta_boot[0]), float(theta_boot[0])
    # bias correction: fraction of replicates below the estimate (ties half)
    below = np.mean(theta_boot < theta_hat) + 0.5 * np.mean(theta_boot == theta_hat)
    below = min(max(below, 0.5 / theta_boot.size), 1.0 - 0.5 / theta_boot.size)
    z0 = special.ndtri(below)
    # acceleration from the jackknife
    d = theta_jack.mean() - theta_jack
    den = 6.0 * np.sum(d**2) ** 1.5
    a = np.sum(d**3) / den if den > 0 else 0.0
    z = special.ndtri(np.array([alpha, 1.0 - alpha]))
    adj = special.ndtr(z0 + (z0 + z) / (1.0 - a * (z0 + z)))
    lo, hi = np.quantile(theta_boot, adj)
    return float(lo), float(hi)


# --------------------------------------------------------------------------
# 1. one-sample disorder statistics
# --------------------------------------------------------------------------
def disorder_stats(
    values: npt.ArrayLike | pd.Series,
    *,
    n_boot: int = 2000,
    seed: int | np.random.Generator | None = None,
    confidence: float = 0.95,
    method: str = "BCa",
) -> pd.Series:
    """Mean, width and shape of a set of site energies, with confidence intervals.

    Parameters
    ----------
    values : array_like or pandas.Series, shape (n,), energy (e.g. eV)
        Site energies (or shifts). NaN values are dropped and counted.
    n_boot : int, default 2000
        Number of bootstrap resamples (drawn as one ``(n_boot, n)`` index
        array, in blocks when that would exceed a few million values).
    seed : int, numpy.random.Generator or None
        Seed of ``numpy.random.default_rng``; the same seed gives the same
        intervals.
    confidence : float, default 0.95
        Confidence level of every interval.
    method : {"BCa", "percentile"}, default "BCa"
        Bootstrap interval: bias-corrected and accelerated (Efron, J. Am.
        Stat. Assoc. 82, 171, 1987) or plain percentile.

    Returns
    -------
    pandas.Series
        ``n`` (values used), ``n_dropped`` (NaN dropped), ``mean``,
        ``sigma`` (sample standard deviation, ddof=1), ``mean_lo``,
        ``mean_hi``, ``sigma_lo``, ``sigma_hi`` (bootstrap intervals),
        ``sigma_chi2_lo``, ``sigma_chi2_hi`` (exact interval for σ of a
        Gaussian sample, from the chi-square law of (n-1)s²/σ²),
        ``skewness`` (moment estimator g1 = m3/m2^1.5, scipy's default
        ``bias=True``), ``excess_kurtosis`` (g2 = m4/m2² - 3),
        ``normality_p`` and ``normality_test`` (Shapiro-Wilk for
        n <= 5000, else D'Agostino-Pearson), ``gauss_mu``, ``gauss_sigma``
        (maximum-likelihood Gaussian: the mean and the ddof=0 standard
        deviation), ``confidence``, ``ci_method``, ``n_boot``, and the one
        σ interval to report: ``sigma_ci_lo``, ``sigma_ci_hi`` with
        ``sigma_ci_method`` (``"chi-square"`` for n below
        :data:`SIGMA_BOOTSTRAP_MIN_N`, else ``"bootstrap BCa"`` or
        ``"bootstrap percentile"``). Plots, tables and reports show ``sigma``
        with that interval; the other interval keys stay for comparison.
        Energies are in the unit of ``values``.

    Raises
    ------
    InputError
        If fewer than 3 finite values remain, ``values`` is not 1-D, or
        ``n_boot``, ``confidence`` or ``method`` is invalid.

    Notes
    -----
    Which σ interval is reported: see :data:`SIGMA_BOOTSTRAP_MIN_N`.
    A bootstrap interval for σ from a small sample is too narrow: at n = 40
    a nominal 95 % BCa interval covers the true σ of a Gaussian about 92-94 %
    of the time. For Gaussian data the chi-square interval is exact.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> s = disorder_stats(rng.normal(0.0, 0.1, 40), seed=2)
    >>> bool(s["sigma_lo"] < s["sigma"] < s["sigma_hi"])
    True
    """
    arr = _as_1d_float(values)
    confidence = _check_confidence(confidence)
    if (isinstance(n_boot, (bool, np.bool_)) or not isinstance(n_boot, (int, float, np.integer, np.floating))
            or not np.isfinite(n_boot) or int(n_boot) != n_boot or n_boot < 100):
        raise InputError(f"n_boot={n_boot!r} is invalid; use an integer of at least 100 (default 2000)")
    n_boot = int(n_boot)
    kind = {"bca": "BCa", "percentile": "percentile"}.get(str(method).lower())
    if kind is None:
        raise InputError(f"method={method!r} is invalid; use 'BCa' or 'percentile'")
    finite = np.isfinite(arr)
    n_dropped = int(arr.size - finite.sum())
    x = arr[finite]
    n = x.size
    if n < 3:
        raise InputError(f"disorder_stats needs at least 3 finite values; got {n} ({n_dropped} NaN dropped)")

    mean = float(x.mean())
    dev = x - mean
    ss = float(np.sum(dev**2))
    sigma = math.sqrt(ss / (n - 1))
    alpha = 0.5 * (1.0 - confidence)

    # bootstrap replicates of mean and sigma
    rng = np.random.default_rng(seed)
    boot_mean = np.empty(n_boot)
    boot_sigma = np.empty(n_boot)
    start = 0
    for idx in _bootstrap_indices(rng, n_boot, n):
        xb = x[idx]
        stop = start + idx.shape[0]
        boot_mean[start:stop] = xb.mean(axis=1)
        boot_sigma[start:stop] = xb.std(axis=1, ddof=1)
        start = stop
    if kind == "BCa":
        # jackknife (leave-one-out) values in closed form
        jack_mean = (n * mean - x) / (n - 1)
        jack_ss = np.maximum(ss - dev**2 * n / (n - 1), 0.0)
        jack_sigma = np.sqrt(jack_ss / (n - 2))
        mean_lo, mean_hi = _bca(mean, boot_mean, jack_mean, confidence)
        sigma_lo, sigma_hi = _bca(sigma, boot_sigma, jack_sigma, confidence)
    else:
        mean_lo, mean_hi = (float(v) for v in np.quantile(boot_mean, [alpha, 1 - alpha]))
        sigma_lo, sigma_hi = (float(v) for v in np.quantile(boot_sigma, [alpha, 1 - alpha]))

    # exact Gaussian interval: (n-1) s^2 / sigma^2 ~ chi2(n-1)
    chi_hi, chi_lo = stats.chi2.ppf([1 - alpha, alpha], n - 1)
    sigma_chi2_lo = math.sqrt(ss / chi_hi)
    sigma_chi2_hi = math.sqrt(ss / chi_lo)

    if ss > 0.0:
        skewness = float(stats.skew(x))
        excess_kurtosis = float(stats.kurtosis(x, fisher=True))
        if n <= SHAPIRO_MAX_N:
            test_name = "Shapiro-Wilk"
            normality_p = float(stats.shapiro(x).pvalue)
        else:
            test_name = "D'Agostino-Pearson"
            normality_p = float(stats.normaltest(x).pvalue)
    else:  # all values equal: shape undefined
        skewness = excess_kurtosis = normality_p = float("nan")
        test_name = "Shapiro-Wilk" if n <= SHAPIRO_MAX_N else "D'Agostino-Pearson"

    out = {
        "n": n,
        "n_dropped": n_dropped,
        "mean": mean,
        "sigma": sigma,
        "mean_lo": mean_lo,
        "mean_hi": mean_hi,
        "sigma_lo": sigma_lo,
        "sigma_hi": sigma_hi,
        "sigma_chi2_lo": sigma_chi2_lo,
        "sigma_chi2_hi": sigma_chi2_hi,
        "skewness": skewness,
        "excess_kurtosis": excess_kurtosis,
        "normality_p": normality_p,
        "normality_test": test_name,
        "gauss_mu": mean,
        "gauss_sigma": math.sqrt(ss / n),
        "confidence": confidence,
        "ci_method": kind,
        "n_boot": n_boot,
        **reported_sigma_interval(n, (sigma_lo, sigma_hi), (sigma_chi2_lo, sigma_chi2_hi), kind),
    }
    name = values.name if isinstance(values, pd.Series) else None
    return pd.Series(out, name=name, dtype=object)


def reported_sigma_interval(n: int, bootstrap: tuple[float, float], chi2: tuple[float, float],
                            bootstrap_kind: str = "BCa") -> dict[str, Any]:
    """The σ interval to report for a sample of ``n`` values (the rule of
    :data:`SIGMA_BOOTSTRAP_MIN_N`): ``sigma_ci_lo``, ``sigma_ci_hi``,
    ``sigma_ci_method``."""
    if n >= SIGMA_BOOTSTRAP_MIN_N:
        lo, hi, how = bootstrap[0], bootstrap[1], f"bootstrap {bootstrap_kind}"
    else:
        lo, hi, how = chi2[0], chi2[1], "chi-square"
    return {"sigma_ci_lo": float(lo), "sigma_ci_hi": float(hi), "sigma_ci_method": how}


def sigma_interval_note(stats: pd.Series | Mapping[str, Any]) -> str:
    """One line saying which σ interval ``stats`` reports and why (for plots, tables and reports)."""
    conf = 100 * float(stats.get("confidence", 0.95))
    if stats["sigma_ci_method"] == "chi-square":
        return (f"{conf:g} % chi-square interval of a normal sample (n = {int(stats['n'])} is below "
                f"{SIGMA_BOOTSTRAP_MIN_N}, where a bootstrap of σ is too narrow)")
    return f"{conf:g} % {stats['sigma_ci_method']} interval (n = {int(stats['n'])} ≥ {SIGMA_BOOTSTRAP_MIN_N})"


def disorder_summary(stats: pd.Series | Mapping[str, Any], *, unit: str = "eV") -> pd.DataFrame:
    """The rows a panel or report shows for :func:`disorder_stats` output:
    n, mean with its interval, σ with the one reported interval (in meV when
    ``unit`` is eV), the interval's kind and why, and the shape.

    Returns
    -------
    pandas.DataFrame
        Columns ``statistic`` and ``value`` (text).
    """
    scale, sunit = (1e3, "meV") if unit == "eV" else (1.0, unit)
    digits = 1 if unit == "eV" else 3
    rows = [
        ("n", f"{int(stats['n'])}"),
        (f"mean ({unit})", f"{float(stats['mean']):.3f} [{float(stats['mean_lo']):.3f}, "
                           f"{float(stats['mean_hi']):.3f}]"),
        (f"σ ({sunit})", f"{scale * float(stats['sigma']):.{digits}f} [{scale * float(stats['sigma_ci_lo']):.{digits}f}"
                         f", {scale * float(stats['sigma_ci_hi']):.{digits}f}]"),
        ("σ interval", sigma_interval_note(stats)),
        ("skewness", f"{float(stats['skewness']):.2f}"),
        ("excess kurtosis", f"{float(stats['excess_kurtosis']):.2f}"),
        (f"normality p ({stats['normality_test']})", f"{float(stats['normality_p']):.3f}"),
    ]
    return pd.DataFrame(rows, columns=["statistic", "value"])


# --------------------------------------------------------------------------
# 2. decompositions
# --------------------------------------------------------------------------
def grouped_disorder_stats(
    values: npt.ArrayLike | pd.Series,
    groups: npt.ArrayLike | pd.Series,
    *,
    name: str = "group",
    **kw: Any,
) -> pd.DataFrame:
    """:func:`disorder_stats` of each group of values (e.g. per molecular species).

    Parameters
    ----------
    values : array_like, shape (n,), energy
    groups : array_like, shape (n,)
        Group label of each value (e.g. the ``species`` column of a site table).
    name : str, default "group"
        Name of the label column of the result.
    **kw
        Passed to :func:`disorder_stats` (``n_boot``, ``seed``, ``confidence``,
        ``method``); every group gets the same seed.

    Returns
    -------
    pandas.DataFrame
        One row per group, in the order groups first appear: the label
        column ``name``, then the fields of :func:`disorder_stats`. A group
        with fewer than 3 finite values keeps its row with ``n``,
        ``n_dropped`` and NaN statistics.

    Raises
    ------
    InputError
        Values and groups of different lengths, or an invalid option.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> t = grouped_disorder_stats(rng.normal(0, [0.1] * 50 + [0.2] * 50), ["H"] * 50 + ["G"] * 50,
    ...                            name="species", seed=1)
    >>> t["species"].tolist(), bool(t["sigma"].iloc[1] > t["sigma"].iloc[0])
    (['H', 'G'], True)
    """
    arr = _as_1d_float(values)
    labels = np.asarray(groups, dtype=object)
    if labels.shape != arr.shape:
        raise InputError(f"groups must hold one label per value ({arr.size}); got shape {labels.shape}")
    rows = []
    for g in dict.fromkeys(labels.tolist()):
        x = arr[labels == g]
        n_ok = int(np.isfinite(x).sum())
        if n_ok < 3:
            rows.append({name: g, "n": n_ok, "n_dropped": int(x.size - n_ok)})
            continue
        rows.append({name: g, **disorder_stats(x, **kw).to_dict()})
    return pd.DataFrame(rows, columns=[name, *disorder_stats(np.arange(3.0), n_boot=100).index])


# --------------------------------------------------------------------------
# 2. decompositions
# --------------------------------------------------------------------------


def _tidy_columns(df: pd.DataFrame, columns: list[str], what: str) -> pd.DataFrame:
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{what} needs a pandas DataFrame; got {type(df).__name__}")
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(
            f"{what}: column {missing[0]!r} is missing; the table has columns {list(df.columns)}"
        )
    return df[columns]


def static_dynamic(df: pd.DataFrame, value: str = "S1_eV") -> pd.Series:
    """Split the spread of site energies into a static and a dynamic part.

    Static: the spread across molecules of each molecule's time average.
    Dynamic: the spread in time of each molecule's energy, averaged over
    molecules.

    Parameters
    ----------
    df : pandas.DataFrame
        Tidy table with columns ``frame``, ``molecule`` and ``value``, one
        row per (frame, molecule). Rows with NaN in ``value`` are dropped.
    value : str, default "S1_eV"
        Column holding the energies.

    Returns
    -------
    pandas.Series
        In the unit of ``value`` (variances in its square):

        ``sigma_static``, ``sigma_dynamic``, ``sigma_total`` and
        ``var_static``, ``var_dynamic``, ``var_total``
            Population (ddof=0) quantities, with molecules weighted by their
            number of frames (equal weights when every molecule is seen in
            every frame). ``var_static`` is the weighted variance of the
            molecule means, ``var_dynamic`` the weighted mean of each
            molecule's ddof=0 variance in time, ``var_total`` the ddof=0
            variance of all values. With this convention
            ``var_total = var_static + var_dynamic`` holds exactly (law of
            total variance); ``identity_residual`` is the difference.
        ``var_static_corrected``, ``var_dynamic_corrected``, ``sigma_static_corrected``
            One-way random-effects ANOVA estimators (Searle, Casella &
            McCulloch, "Variance Components", Wiley 1992, ch. 3):
            ``var_dynamic_corrected = MSW``, ``var_static_corrected =
            (MSB - MSW)/n0`` with n0 the (mean) number of frames per
            molecule. For balanced data this is
            M/(M-1)·var_static - var_dynamic_corrected/n_frames: the static
            variance with the finite-frame bias removed. It can come out
            negative when the static part is small; the sigma is then 0.
        ``n_molecules``, ``n_frames`` (distinct frames), ``n_values``,
        ``n_dropped``, ``balanced``.

    Raises
    ------
    InputError
        If a column is missing, a (frame, molecule) pair appears twice, or
        fewer than 2 molecules remain.
    """
    sub = _tidy_columns(df, ["frame", "molecule", value], "static_dynamic")
    n_all = len(sub)
    sub = sub[np.isfinite(sub[value].to_numpy(dtype=np.float64))]
    n_dropped = n_all - len(sub)
    if sub.duplicated(["frame", "molecule"]).any():
        bad = sub[sub.duplicated(["frame", "molecule"], keep=False)].iloc[0]
        raise InputError(
            f"static_dynamic: (frame={bad['frame']!r}, molecule={bad['molecule']!r}) appears more than "
            "once; give one row per frame and molecule"
        )
    codes, _ = pd.factorize(sub["molecule"])
    m = int(codes.max()) + 1 if codes.size else 0
    if m < 2:
        raise InputError(f"static_dynamic needs at least 2 molecules with finite {value!r}; got {m}")
    e = sub[value].to_numpy(dtype=np.float64)
    n_i = np.bincount(codes, minlength=m).astype(np.float64)
    n_tot = e.size
    mean_i = np.bincount(codes, weights=e, minlength=m) / n_i
    grand = e.mean()
    within_ss = float(np.sum((e - mean_i[codes]) ** 2))
    between_ss = float(np.sum(n_i * (mean_i - grand) ** 2))
    var_total = float(np.mean((e - grand) ** 2))
    var_static = between_ss / n_tot
    var_dynamic = within_ss / n_tot
    # ANOVA (Searle et al. 1992): E[MSW] = s_d^2, E[MSB] = s_d^2 + n0 s_s^2
    if n_tot > m:
        msw = within_ss / (n_tot - m)
        msb = between_ss / (m - 1)
        n0 = (n_tot - np.sum(n_i**2) / n_tot) / (m - 1)
        var_static_corr = (msb - msw) / n0
    else:
        msw = var_static_corr = float("nan")
    return pd.Series(
        {
            "sigma_static": math.sqrt(var_static),
            "sigma_dynamic": math.sqrt(var_dynamic),
            "sigma_total": math.sqrt(var_total),
            "var_static": var_static,
            "var_dynamic": var_dynamic,
            "var_total": var_total,
            "identity_residual": var_total - (var_static + var_dynamic),
            "var_static_corrected": float(var_static_corr),
            "var_dynamic_corrected": float(msw),
            "sigma_static_corrected": math.sqrt(max(var_static_corr, 0.0))
            if np.isfinite(var_static_corr)
            else float("nan"),
            "n_molecules": m,
            "n_frames": int(sub["frame"].nunique()),
            "n_values": int(n_tot),
            "n_dropped": int(n_dropped),
            "balanced": bool(np.all(n_i == n_i[0])),
        },
        name=value,
        dtype=object,
    )


def conformational_environmental(
    df: pd.DataFrame, vacuum: str = "S1_vacuum_eV", shift: str = "S1_shift_eV"
) -> pd.Series:
    """Split the spread of site energies into conformational and environmental parts.

    The site energy is E = E_vac + ΔE_env: the vacuum energy at the
    molecule's own geometry (conformational disorder) plus the environment
    shift. Then var(E) = var(E_vac) + var(ΔE_env) + 2 cov(E_vac, ΔE_env),
    exactly, for sample (ddof=1) variances and covariance.

    Parameters
    ----------
    df : pandas.DataFrame
        One row per site, with columns ``vacuum`` and ``shift``. Rows with
        NaN in either are dropped.
    vacuum, shift : str
        Column names.

    Returns
    -------
    pandas.Series
        ``sigma_total``, ``sigma_conf``, ``sigma_env`` (ddof=1),
        ``covariance``, ``correlation`` (Pearson), ``frac_conf``,
        ``frac_env``, ``frac_cov`` (var_vac, var_shift and 2 cov as
        fractions of var_total; they sum to 1), ``identity_residual``,
        ``n``, ``n_dropped``. Units of the columns (variances squared).

    Raises
    ------
    InputError
        If a column is missing or fewer than 3 complete rows remain.
    """
    sub = _tidy_columns(df, [vacuum, shift], "conformational_environmental")
    a = sub[vacuum].to_numpy(dtype=np.float64)
    b = sub[shift].to_numpy(dtype=np.float64)
    ok = np.isfinite(a) & np.isfinite(b)
    a, b = a[ok], b[ok]
    n = a.size
    if n < 3:
        raise InputError(f"conformational_environmental needs at least 3 complete rows; got {n}")
    cov = np.cov(np.vstack([a, b]), ddof=1)
    var_a, var_b, c_ab = float(cov[0, 0]), float(cov[1, 1]), float(cov[0, 1])
    var_t = float(np.var(a + b, ddof=1))
    corr = c_ab / math.sqrt(var_a * var_b) if var_a > 0 and var_b > 0 else float("nan")
    frac = (lambda v: v / var_t) if var_t > 0 else (lambda v: float("nan"))
    return pd.Series(
        {
            "sigma_total": math.sqrt(var_t),
            "sigma_conf": math.sqrt(var_a),
            "sigma_env": math.sqrt(var_b),
            "covariance": c_ab,
            "correlation": corr,
            "frac_conf": frac(var_a),
            "frac_env": frac(var_b),
            "frac_cov": frac(2.0 * c_ab),
            "identity_residual": var_t - (var_a + var_b + 2.0 * c_ab),
            "n": int(n),
            "n_dropped": int(ok.size - n),
        },
        dtype=object,
    )


# --------------------------------------------------------------------------
# 3. spatial correlation
# --------------------------------------------------------------------------
def _check_box(box: Any) -> npt.NDArray[np.float64] | None:
    if box is None:
        return None
    b = np.asarray(box, dtype=np.float64).ravel()
    if b.size == 3:
        b = np.concatenate([b, [90.0, 90.0, 90.0]])
    bad = b.size != 6 or not np.all(np.isfinite(b))
    if bad or np.any(b[:3] <= 0) or np.any(b[3:] <= 0) or np.any(b[3:] >= 180):
        raise InputError(
            f"box={box!r} is invalid; use [lx, ly, lz, alpha, beta, gamma] in Å and degrees "
            "(lengths > 0, angles in (0, 180)) or None"
        )
    return b


#: fewest pairs a distance bin of C(r) needs to be shown. For independent
#: Gaussian values the covariance of a bin of k pairs has a standard error of
#: about σ²/√k, so C(r) of a bin scatters by about 1/√k around its true value:
#: 0.18 at k = 30, already a fifth of the whole range of a typical C(r); pairs
#: that share sites scatter more. Bins below this are counted but not drawn.
MIN_PAIRS_PER_BIN = 30


def spatial_correlation(
    positions_A: npt.ArrayLike,
    values: npt.ArrayLike,
    box: npt.ArrayLike | Mapping[Any, npt.ArrayLike] | None = None,
    *,
    r_max_A: float | None = None,
    n_bins: int = 20,
    frames: npt.ArrayLike | None = None,
    n_boot: int = 0,
    seed: int | np.random.Generator | None = None,
    confidence: float = 0.95,
    min_pairs: int = MIN_PAIRS_PER_BIN,
) -> pd.DataFrame:
    """Correlation of site-energy fluctuations against centroid distance.

    C(r) = <δE_i δE_j>_{|r_ij| in bin} / σ², with δE = E - <E> and σ² the
    ddof=0 variance of all values (mean and variance over every frame
    together). Distances are periodic minimum-image distances from
    ``MDAnalysis.lib.distances`` (orthorhombic and triclinic boxes).

    Parameters
    ----------
    positions_A : array_like, shape (n, 3), Å
        Site (molecule centroid) positions.
    values : array_like, shape (n,)
        Site energies; rows with NaN are dropped.
    box : array_like shape (6,), mapping frame -> box, or None
        ``[lx, ly, lz, alpha, beta, gamma]`` (Å, degrees) as MDAnalysis
        uses, one box per frame through a mapping, or None for no periodic
        boundaries.
    r_max_A : float, optional
        Largest distance binned. Default: half the smallest face-to-face
        width of the box (the largest radius where the minimum image is
        unique), or the largest pair distance without a box. Must not
        exceed that half width with a box.
    n_bins : int, default 20
        Number of equal-width bins on [0, r_max_A].
    frames : array_like, shape (n,), optional
        Frame label of each row; pairs are only formed within a frame.
    n_boot : int, default 0
        Bootstrap resamples of the sites for the interval of C in each bin
        (0: no interval). A resample gives each site a multiplicity (a
        multinomial draw) and each pair the product of its two sites'; mean,
        variance and every bin are recomputed with those weights, so a site
        never pairs with its own copy.
    seed : int, numpy.random.Generator or None
        Seed of the bootstrap.
    confidence : float, default 0.95
        Level of the percentile interval ``C_lo``, ``C_hi``.
    min_pairs : int, default :data:`MIN_PAIRS_PER_BIN`
        Bins with fewer pairs get ``shown = False``.

    Returns
    -------
    pandas.DataFrame
        One row per bin: ``r_A`` (bin centre), ``r_lo_A``, ``r_hi_A``,
        ``n_pairs``, ``covariance`` (<δE_i δE_j>, unit of values squared;
        NaN for empty bins), ``C`` (covariance / σ²), ``C_lo``, ``C_hi``
        (bootstrap interval; NaN without ``n_boot``), ``shown`` (at least
        ``min_pairs`` pairs and a finite C). ``attrs`` holds ``variance``,
        ``mean``, ``n_sites``, ``min_pairs`` and ``n_boot``.

    Raises
    ------
    InputError
        On mismatched shapes, an invalid box, r_max_A beyond half the box
        width, fewer than 2 sites, zero variance, a negative ``n_boot`` or
        ``min_pairs``.
    """
    from MDAnalysis.lib import distances as mda_dist  # layer-1 use: array routines only

    pos = np.asarray(positions_A, dtype=np.float64)
    val = _as_1d_float(values)
    if pos.ndim != 2 or pos.shape[1] != 3 or pos.shape[0] != val.size:
        raise InputError(
            f"positions_A must have shape (n, 3) with n = len(values) = {val.size}; got {pos.shape}"
        )
    if frames is None:
        fr = np.zeros(val.size, dtype=np.intp)
        labels: list[Any] = [None]
    else:
        fr_raw = np.asarray(frames)
        if fr_raw.shape != (val.size,):
            raise InputError(f"frames must have shape ({val.size},); got {fr_raw.shape}")
        fr, uniq = pd.factorize(fr_raw, sort=True)
        labels = uniq.tolist() if hasattr(uniq, "tolist") else list(uniq)
    ok = np.isfinite(val) & np.all(np.isfinite(pos), axis=1)
    pos, val, fr = pos[ok], val[ok], fr[ok]
    if val.size < 2:
        raise InputError(f"spatial_correlation needs at least 2 sites with finite values; got {val.size}")
    if int(n_bins) != n_bins or n_bins < 1:
        raise InputError(f"n_bins={n_bins!r} is invalid; use a positive integer")
    n_bins = int(n_bins)
    for name, v in (("n_boot", n_boot), ("min_pairs", min_pairs)):
        if isinstance(v, (bool, np.bool_)) or int(v) != v or v < 0:
            raise InputError(f"{name}={v!r} is invalid; use a non-negative integer")
    confidence = _check_confidence(confidence)

    if isinstance(box, Mapping):
        boxes = []
        for lab in labels:
            if lab not in box:
                raise InputError(f"box has no entry for frame {lab!r}; give one box per frame")
            boxes.append(_check_box(box[lab]))
    else:
        boxes = [_check_box(box)] * len(labels)

    mean = float(val.mean())
    dv = val - mean
    var = float(np.mean(dv**2))
    if var <= 0.0:
        raise InputError("spatial_correlation: all values are equal (zero variance); C(r) is undefined")

    if r_max_A is None:
        if boxes[0] is not None:
            # a hair (2e-7, about 3 float32 ulps) inside half the box: MDAnalysis's pair search compares the cutoff with its
            # single-precision box and refuses the exact half-width
            r_max = min(half_box_width_A(b) for b in boxes if b is not None) * (1.0 - 2e-7)
        else:
            r_max = 0.0
            for f in range(len(labels)):
                p = pos[fr == f]
                if len(p) > 1:
                    r_max = max(r_max, float(mda_dist.self_distance_array(p).max()))
            r_max *= 1.0 + 1e-9
    else:
        r_max = float(r_max_A)
        if not r_max > 0:
            raise InputError(f"r_max_A={r_max_A!r} is invalid; use a positive distance in Å")
        for b in boxes:
            if b is not None and r_max > half_box_width_A(b) * (1 + 1e-12):
                raise InputError(
                    f"r_max_A={r_max_A!r} Å exceeds half the box width ({half_box_width_A(b):.3f} Å), "
                    "beyond which minimum-image distances undercount pairs; use a smaller r_max_A"
                )
    edges = np.linspace(0.0, r_max, n_bins + 1)
    counts = np.zeros(n_bins, dtype=np.int64)
    sums = np.zeros(n_bins)
    kept: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.intp], npt.NDArray[np.intp]]] = []
    for f in range(len(labels)):
        sel = np.flatnonzero(fr == f)
        if sel.size < 2:
            continue
        pairs, dist = mda_dist.self_capped_distance(pos[sel], r_max, box=boxes[f])
        if len(dist) == 0:
            continue
        keep = dist < r_max
        pairs, dist = pairs[keep], dist[keep]
        k = np.minimum((dist / r_max * n_bins).astype(np.intp), n_bins - 1)
        prod = dv[sel[pairs[:, 0]]] * dv[sel[pairs[:, 1]]]
        counts += np.bincount(k, minlength=n_bins)
        sums += np.bincount(k, weights=prod, minlength=n_bins)
        if n_boot:
            kept.append((sel[pairs[:, 0]], sel[pairs[:, 1]], k))
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    c_lo = np.full(n_bins, np.nan)
    c_hi = np.full(n_bins, np.nan)
    if n_boot and kept:
        boot = _bootstrap_correlation(val, kept, n_bins, int(n_boot), np.random.default_rng(seed))
        alpha = 0.5 * (1.0 - confidence)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns: bins no resample filled
            c_lo, c_hi = np.nanquantile(boot, [alpha, 1.0 - alpha], axis=0)
        c_lo = np.where(counts > 0, c_lo, np.nan)
        c_hi = np.where(counts > 0, c_hi, np.nan)
    c = cov / var
    out = pd.DataFrame(
        {
            "r_A": 0.5 * (edges[:-1] + edges[1:]),
            "r_lo_A": edges[:-1],
            "r_hi_A": edges[1:],
            "n_pairs": counts,
            "covariance": cov,
            "C": c,
            "C_lo": c_lo,
            "C_hi": c_hi,
            "shown": (counts >= max(int(min_pairs), 1)) & np.isfinite(c),
        }
    )
    out.attrs.update({"variance": var, "mean": mean, "n_sites": int(val.size), "min_pairs": int(min_pairs),
                      "n_boot": int(n_boot), "confidence": confidence})
    return out


def _bootstrap_correlation(
    val: npt.NDArray[np.float64],
    kept: list[tuple[npt.NDArray[np.intp], npt.NDArray[np.intp], npt.NDArray[np.intp]]],
    n_bins: int,
    n_boot: int,
    rng: np.random.Generator,
) -> npt.NDArray[np.float64]:
    """C(r) of ``n_boot`` site resamples, shape (n_boot, n_bins) (NaN where a resample has no pair).

    With site weights w (a multinomial draw of n) and pair weights w_i w_j:
    mean m = Σ w x / n, variance v = Σ w x² / n - m², and per bin
    cov = (Σ w_ij x_i x_j - m Σ w_ij (x_i + x_j)) / Σ w_ij + m².
    """
    n = val.size
    i = np.concatenate([p[0] for p in kept])
    j = np.concatenate([p[1] for p in kept])
    k = np.concatenate([p[2] for p in kept])
    onehot = np.zeros((k.size, n_bins))
    onehot[np.arange(k.size), k] = 1.0
    xx, xs = val[i] * val[j], val[i] + val[j]
    out = np.empty((n_boot, n_bins))
    rows = max(1, _BOOT_BLOCK // max(k.size, n))
    for start in range(0, n_boot, rows):
        w = rng.multinomial(n, np.full(n, 1.0 / n), size=min(rows, n_boot - start)).astype(np.float64)
        m = w @ val / n
        v = w @ (val**2) / n - m**2
        wp = w[:, i] * w[:, j]
        s1 = wp @ onehot
        with np.errstate(invalid="ignore", divide="ignore"):
            cov = ((wp * xx) @ onehot - m[:, None] * ((wp * xs) @ onehot)) / s1 + m[:, None] ** 2
            out[start:start + w.shape[0]] = np.where((s1 > 0) & (v[:, None] > 0), cov / v[:, None], np.nan)
    return out


def correlation_note(corr: pd.DataFrame) -> str | None:
    """Why C(r) cannot be drawn (no bin reaches ``min_pairs`` pairs), in words; None when some bin can."""
    if "shown" in corr.columns and bool(corr["shown"].any()):
        return None
    need = int(corr.attrs.get("min_pairs", MIN_PAIRS_PER_BIN))
    n_sites = corr.attrs.get("n_sites")
    total = int(corr["n_pairs"].sum())
    most = int(corr["n_pairs"].max()) if len(corr) else 0
    who = f"{n_sites} sites give" if n_sites is not None else "the sites give"
    return (f"C(r) is not drawn: {who} {total} pairs within {float(corr['r_hi_A'].max()):g} Å, at most {most} in "
            f"one distance bin, and a bin needs {need} pairs to say more than noise; sample more sites (or "
            "frames), or use the film-wide model's table of every molecule")


# --------------------------------------------------------------------------
# 4. radius convergence
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class ConvergenceVerdict:
    """Outcome of :func:`converged_radius`.

    Attributes
    ----------
    converged : bool
        Whether every quantity stays within ``tol`` of its reference from
        ``radius_A`` on.
    radius_A : float or None
        Smallest such radius (Å); None when not converged.
    reference : float or dict of str to float
        Reference value(s) used (one per quantity for a table).
    reference_kind : {"largest radius", "periodic limit"}
    max_deviation_after : float
        Largest |value - reference| at radii >= ``radius_A`` over all
        quantities (NaN when not converged). Unit of the values.
    message : str
        Plain-text verdict (assumes eV, prints meV).
    quantity : str or None
        The slowest quantity (the one that decides the verdict).
    tol : float
        Tolerance used (unit of the values).
    radius_by_quantity : dict of str to float or None
        Converged radius of each quantity.
    judged : bool
        False when the radii given cannot decide convergence (too few
        finite radii for the reference, see :data:`MIN_RADII_TO_JUDGE`):
        then ``converged`` is False and the message says what to add.
    """

    converged: bool
    radius_A: float | None
    reference: float | dict[str, float]
    reference_kind: str
    max_deviation_after: float
    message: str
    quantity: str | None = None
    tol: float = 0.010
    radius_by_quantity: dict[str, float | None] = field(default_factory=dict)
    judged: bool = True

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (JSON-ready)."""
        return asdict(self)


def _pretty(name: str) -> str:
    """A quantity's display name in messages ('dEST_eV' -> 'ΔEST'; :mod:`clusterlab.labels`)."""
    return quantity_name(str(name))


def _fmt_r(r: float) -> str:
    return f"{r:g} Å"


#: finite radii a quantity needs before a verdict against its largest-radius
#: value can say "converged": two radii always agree with one of them (the
#: reference), so with two the band test says nothing; with three the last two
#: must agree inside the band and a third shows the approach. Against the
#: periodic limit (an independent reference) one radius can be judged.
MIN_RADII_TO_JUDGE = 3


def _names(cols: Sequence[str]) -> str:
    return ", ".join(_pretty(c) for c in cols)


def converged_radius(
    radii: npt.ArrayLike,
    values: npt.ArrayLike | pd.Series | pd.DataFrame,
    *,
    tol: float = 0.010,
    reference: float | Mapping[str, float] | pd.Series | None = None,
    radius_label: str | None = None,
) -> ConvergenceVerdict:
    """Smallest cluster radius from which a quantity stays converged.

    The converged radius is the smallest radius R such that the value at R
    and at every larger radius lies within ``tol`` of the reference. The
    reference is the value at the largest radius, or the periodic limit
    when ``reference`` is given. Against the largest-radius value at least
    two radii must agree (R below the largest radius), otherwise the scan
    is not converged, and a quantity needs :data:`MIN_RADII_TO_JUDGE` (3)
    finite radii before it can be called converged: with fewer, radii that
    already disagree beyond ``tol`` give "not converged", and radii that
    agree give a verdict with ``judged=False`` whose message says what
    radius to add. Against the periodic limit one radius can be judged.

    Parameters
    ----------
    radii : array_like, shape (n,), Å
        Cluster radii, in any order (duplicates not allowed).
    values : array_like shape (n,), pandas.Series or pandas.DataFrame shape (n, k), eV
        One quantity, or one column per quantity (e.g. ``S1_shift_eV``,
        ``T1_shift_eV``). NaN entries are dropped, per quantity.
    tol : float, default 0.010
        Tolerance (eV: 0.010 = 10 meV).
    reference : float, mapping or Series, optional
        Periodic (Ewald) limit: a number for one quantity, or a value per
        column name for a table.
    radius_label : str, optional
        Which radius ``radii`` are, named in the message (e.g. ``"outer
        radius"``, ``"inner (polarizable) radius"``); default: the message
        says only the radius in Å.

    Returns
    -------
    ConvergenceVerdict
        For a table every quantity must be converged; the verdict's radius
        is the largest of their converged radii and ``quantity`` names the
        slowest.

    Raises
    ------
    InputError
        On mismatched lengths, duplicate or non-finite radii, a
        non-positive tolerance, or a reference missing for a column.

    Examples
    --------
    >>> r = np.array([6.0, 10.0, 14.0, 18.0, 22.0])
    >>> converged_radius(r, 0.2 - 5.0 / r**3, tol=0.01).radius_A
    10.0
    """
    r = _as_1d_float(radii, "radii")
    named = "" if radius_label is None else f"{radius_label} "
    tol = float(tol)
    if not tol > 0:
        raise InputError(f"tol={tol!r} is invalid; use a positive tolerance in eV (e.g. 0.010)")
    if isinstance(values, pd.DataFrame):
        table = values.reset_index(drop=True)
    else:
        v = values if isinstance(values, pd.Series) else _as_1d_float(values)
        name = values.name if isinstance(values, pd.Series) and values.name is not None else "value"
        table = pd.DataFrame({name: np.asarray(v, dtype=np.float64)})
    if table.shape[1] == 0:
        raise InputError("values has no columns; give one column per quantity (e.g. 'S1_shift_eV')")
    if len(table) != r.size:
        raise InputError(f"radii has {r.size} entries but values has {len(table)}; give one value per radius")
    if not np.all(np.isfinite(r)):
        raise InputError(f"radii must be finite; got {r.tolist()}")
    if np.unique(r).size != r.size:
        raise InputError(f"radii contain duplicates: {r.tolist()}; give each radius once")
    order = np.argsort(r)
    r = r[order]
    table = table.iloc[order].reset_index(drop=True)

    periodic = reference is not None
    if periodic and not isinstance(reference, (Mapping, pd.Series)):
        if table.shape[1] != 1:
            raise InputError(
                f"reference={reference!r} is one number but values has {table.shape[1]} columns; "
                "give a mapping column -> periodic limit"
            )
        reference = {table.columns[0]: float(reference)}  # type: ignore[arg-type]

    refs: dict[str, float] = {}
    radius_by: dict[str, float | None] = {}
    info: dict[str, dict[str, Any]] = {}
    unjudged: list[str] = []
    for col in table.columns:
        y = table[col].to_numpy(dtype=np.float64)
        ok = np.isfinite(y)
        rr, yy = r[ok], y[ok]
        if periodic:
            if col not in reference:  # type: ignore[operator]
                raise InputError(f"reference has no periodic limit for {col!r}; give one per column")
            ref = float(reference[col])  # type: ignore[index]
        else:
            ref = float(yy[-1]) if yy.size else float("nan")
        if yy.size < (1 if periodic else MIN_RADII_TO_JUDGE):
            # too few radii: not converged when the ones given already disagree, else not judged
            dev = np.abs(yy - ref)
            if yy.size >= 2 and not np.all(dev <= tol * (1 + 1e-9)):
                radius_by[str(col)] = None
            else:
                unjudged.append(str(col))
            refs[str(col)] = ref
            info[str(col)] = {"r": rr, "y": yy, "dev": dev, "k": yy.size}
            continue
        dev = np.abs(yy - ref)
        within = dev <= tol * (1 + 1e-9)
        # first index of the all-within tail
        bad = np.flatnonzero(~within)
        k = int(bad[-1]) + 1 if bad.size else 0
        last_ok = k < yy.size if periodic else k < yy.size - 1
        refs[str(col)] = ref
        radius_by[str(col)] = float(rr[k]) if last_ok else None
        info[str(col)] = {"r": rr, "y": yy, "dev": dev, "k": k}

    not_conv = [c for c, rad in radius_by.items() if rad is None]
    kind = "periodic limit" if periodic else "largest radius"
    target = "the periodic limit" if periodic else "the largest-radius value"
    ref_out: float | dict[str, float] = refs if len(refs) > 1 else next(iter(refs.values()))
    if not_conv:
        # slowest: the one furthest out of tolerance at its end
        def badness(c: str) -> float:
            d = info[c]
            return float(d["dev"][-1]) if periodic else float(abs(d["y"][-1] - d["y"][-2]))

        slow = max(not_conv, key=badness)
        d = info[slow]
        if periodic:
            detail = (
                f"{_pretty(slow)} at {named}{_fmt_r(d['r'][-1])} is {1e3 * d['dev'][-1]:.0f} meV from the "
                f"periodic limit, tolerance {1e3 * tol:g} meV"
            )
        else:
            detail = (
                f"{_pretty(slow)} still changes by {1e3 * abs(d['y'][-1] - d['y'][-2]):.0f} meV between "
                f"{named}{d['r'][-2]:g} and {_fmt_r(d['r'][-1])}, tolerance {1e3 * tol:g} meV"
            )
        return _radius_less_verdict(f"not converged within the radii given ({detail})", slow, ref_out, kind, tol,
                                    radius_by, judged=True)
    if unjudged:
        return _unjudged_verdict(unjudged, info, ref_out, kind, tol, named, radius_by)
    slow = max(radius_by, key=lambda c: radius_by[c])  # type: ignore[arg-type,return-value]
    radius = float(radius_by[slow])  # type: ignore[arg-type]
    max_dev = max(float(np.max(d["dev"][d["r"] >= radius])) for d in info.values())
    n_q = len(radius_by)
    who = (_pretty(slow) if n_q == 1 else
           f"all {n_q} quantities ({_names(list(radius_by))}; slowest: {_pretty(slow)})")
    return ConvergenceVerdict(
        converged=True,
        radius_A=radius,
        reference=ref_out,
        reference_kind=kind,
        max_deviation_after=max_dev,
        message=f"{who} converged to within {1e3 * tol:g} meV of {target} from {named}{_fmt_r(radius)} on",
        quantity=slow,
        tol=tol,
        radius_by_quantity=radius_by,
    )



def _unjudged_verdict(unjudged: list[str], info: dict[str, dict[str, Any]],
                      ref_out: float | dict[str, float], kind: str, tol: float, named: str,
                      radius_by: dict[str, float | None]) -> ConvergenceVerdict:
    """The verdict when some quantity has too few finite radii to be judged."""
    for c in unjudged:
        radius_by[c] = None
    r_all = np.unique(np.concatenate([info[c]["r"] for c in unjudged]))
    n_r = int(r_all.size)
    what = (f"{_pretty(unjudged[0])}" if len(unjudged) == 1 else
            f"{len(unjudged)} quantities ({_names(unjudged)})")
    if n_r == 0:
        seen = "no finite value"
        add = f"run at least {MIN_RADII_TO_JUDGE} radii"
    else:
        radii_txt = " and ".join(f"{x:g}" for x in r_all) if n_r <= 2 else ", ".join(f"{x:g}" for x in r_all)
        moved = max((float(np.ptp(info[c]["y"])) for c in unjudged if info[c]["y"].size), default=0.0)
        seen = f"{n_r} radius" if n_r == 1 else f"{n_r} radii"
        seen += f" ({named}{radii_txt} Å"
        seen += f"; moved {1e3 * moved:.1f} meV, tolerance {1e3 * tol:g} meV)" if n_r > 1 else ")"
        need = MIN_RADII_TO_JUDGE - n_r
        add = (f"add a radius beyond {r_all[-1]:g} Å" if need <= 1 else
               f"add {need} radii beyond {r_all[-1]:g} Å")
    return _radius_less_verdict(f"convergence of {what} cannot be judged yet from {seen}: {add} (a verdict "
                                f"needs {MIN_RADII_TO_JUDGE} radii, or the periodic limit)", unjudged[0], ref_out,
                                kind, tol, radius_by, judged=False)


def _radius_less_verdict(message: str, quantity: str, ref_out: float | dict[str, float], kind: str, tol: float,
                         radius_by: dict[str, float | None], *, judged: bool) -> ConvergenceVerdict:
    """A verdict without a converged radius (not converged, or not judged)."""
    return ConvergenceVerdict(converged=False, radius_A=None, reference=ref_out, reference_kind=kind,
                              max_deviation_after=float("nan"), message=message, quantity=quantity, tol=tol,
                              radius_by_quantity=radius_by, judged=judged)


# --------------------------------------------------------------------------
# 5. two-sample offsets and fits against an angle
# --------------------------------------------------------------------------
def mean_offset(
    first: npt.ArrayLike,
    second: npt.ArrayLike,
    *,
    n_boot: int = 2000,
    seed: int | np.random.Generator | None = None,
    confidence: float = 0.95,
) -> pd.Series:
    """Offset ``mean(first) - mean(second)`` of two independent samples, with
    its spread and a bootstrap interval.

    Parameters
    ----------
    first, second : array_like, shape (n,) and (m,), energy
        The two samples (e.g. host and guest site energies). NaN values are
        dropped.
    n_boot : int, default 2000
        Bootstrap resamples; each sample is resampled on its own (stratified
        bootstrap: the two samples are independent).
    seed : int, numpy.random.Generator or None
    confidence : float, default 0.95

    Returns
    -------
    pandas.Series
        ``offset`` (difference of the means), ``offset_lo``, ``offset_hi``
        (percentile bootstrap interval), ``spread`` = sqrt(σ1² + σ2²) (ddof=1):
        the standard deviation of the difference between a random member of
        ``first`` and a random member of ``second``, with its interval by the
        one σ rule of :func:`reported_sigma_interval` on the smaller sample
        (``spread_ci_lo``, ``spread_ci_hi``, ``spread_ci_method``: chi-square
        with Satterthwaite's ``spread_dof`` degrees of freedom below
        :data:`SIGMA_BOOTSTRAP_MIN_N`, else the stratified percentile
        bootstrap), ``n_first``, ``n_second``, ``confidence``, ``n_boot``.
        Unit of the input.

    Raises
    ------
    InputError
        If either sample has fewer than 2 finite values, or ``n_boot`` or
        ``confidence`` is invalid.

    Examples
    --------
    >>> s = mean_offset([5.0, 5.0, 5.0], [4.7, 4.7], seed=0)
    >>> round(float(s["offset"]), 12), round(float(s["offset_lo"]), 12)
    (0.3, 0.3)
    """
    a = _as_1d_float(first, "first")
    b = _as_1d_float(second, "second")
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    confidence = _check_confidence(confidence)
    if isinstance(n_boot, (bool, np.bool_)) or not isinstance(n_boot, (int, np.integer)) or n_boot < 100:
        raise InputError(f"n_boot={n_boot!r} is invalid; use an integer of at least 100 (default 2000)")
    if a.size < 2 or b.size < 2:
        raise InputError(f"mean_offset needs at least 2 finite values in each sample; got {a.size} and {b.size}")
    rng = np.random.default_rng(seed)
    boot = np.empty(int(n_boot))
    boot_spread = np.empty(int(n_boot))
    rows = max(1, _BOOT_BLOCK // max(a.size, b.size))
    for start in range(0, int(n_boot), rows):
        k = min(rows, int(n_boot) - start)
        ra = a[rng.integers(0, a.size, size=(k, a.size))]
        rb = b[rng.integers(0, b.size, size=(k, b.size))]
        boot[start:start + k] = ra.mean(axis=1) - rb.mean(axis=1)
        boot_spread[start:start + k] = np.sqrt(ra.var(axis=1, ddof=1) + rb.var(axis=1, ddof=1))
    alpha = 0.5 * (1.0 - confidence)
    lo, hi = np.quantile(boot, [alpha, 1.0 - alpha])
    offset = float(a.mean() - b.mean())
    if np.ptp(boot) <= 1e-12 * max(1.0, abs(offset)):  # constant samples: the interval is the value
        lo = hi = offset
    va, vb = float(np.var(a, ddof=1)), float(np.var(b, ddof=1))
    spread = math.sqrt(va + vb)
    # the spread is a width like σ: its interval follows the one rule (reported_sigma_interval) on the
    # smaller sample; the chi-square branch uses Satterthwaite's degrees of freedom for a sum of two
    # variances (Satterthwaite, Biometrics Bulletin 2, 110, 1946), exact when the two σ are equal
    if va + vb > 0.0:
        nu = (va + vb) ** 2 / (va**2 / (a.size - 1) + vb**2 / (b.size - 1))
        chi_hi, chi_lo = stats.chi2.ppf([1.0 - alpha, alpha], nu)
        chi2 = (spread * math.sqrt(nu / chi_hi), spread * math.sqrt(nu / chi_lo))
        boot_ci = tuple(float(v) for v in np.quantile(boot_spread, [alpha, 1.0 - alpha]))
    else:
        nu, chi2, boot_ci = float("nan"), (0.0, 0.0), (0.0, 0.0)
    ci = reported_sigma_interval(min(a.size, b.size), boot_ci, chi2, "percentile")
    return pd.Series({
        "offset": offset, "offset_lo": float(lo), "offset_hi": float(hi), "spread": spread,
        "spread_ci_lo": ci["sigma_ci_lo"], "spread_ci_hi": ci["sigma_ci_hi"], "spread_ci_method": ci["sigma_ci_method"],
        "spread_dof": float(nu),
        "n_first": int(a.size), "n_second": int(b.size), "confidence": confidence, "n_boot": int(n_boot),
    }, dtype=object)


def fourier_basis(angle_deg: npt.ArrayLike, n_harmonics: int) -> npt.NDArray[np.float64]:
    """Columns ``1, cos θ, sin θ, ..., cos kθ, sin kθ`` (k = ``n_harmonics``)
    of an angle in degrees, shape (n, 2 k + 1): the design matrix of
    :func:`periodic_fit`, and with its ``coefficients`` the fitted curve."""
    th = np.radians(np.asarray(angle_deg, dtype=np.float64))
    cols = [np.ones(th.shape)]
    for k in range(1, int(n_harmonics) + 1):
        cols += [np.cos(k * th), np.sin(k * th)]
    return np.column_stack(cols)


def periodic_fit(
    angle_deg: npt.ArrayLike,
    values: npt.ArrayLike,
    *,
    n_harmonics: int = 2,
) -> pd.Series:
    """Least-squares Fourier series of ``values`` in an angle, and the fraction
    of their variance it explains.

    ``y(θ) = c0 + Σ_k (a_k cos kθ + b_k sin kθ)``, k = 1..``n_harmonics``: a
    smooth, periodic function of a torsion. The explained fraction
    R² = 1 - SS_res/SS_tot is the part of the variance of ``values`` that a
    smooth dependence on the angle accounts for; ``r2_adjusted`` corrects it
    for the number of fitted terms p: 1 - (1 - R²)(n - 1)/(n - p), an
    (almost) unbiased estimate of the population fraction.

    Parameters
    ----------
    angle_deg : array_like, shape (n,), degrees
    values : array_like, shape (n,)
        Rows with NaN in either are dropped.
    n_harmonics : int, default 2

    Returns
    -------
    pandas.Series
        ``n``, ``n_harmonics``, ``variance`` (ddof=1, unit² of values),
        ``r2``, ``r2_adjusted``, ``explained_variance`` (r2_adjusted ×
        variance, floored at 0), ``residual_sigma`` (ddof = n - p),
        ``coefficients`` (list: c0, a1, b1, a2, b2, ...).

    Raises
    ------
    InputError
        On mismatched shapes, a bad ``n_harmonics``, or too few rows
        (at least 2 n_harmonics + 3).

    Examples
    --------
    >>> th = np.linspace(0.0, 360.0, 24, endpoint=False)
    >>> round(float(periodic_fit(th, np.cos(np.radians(2 * th)))["r2"]), 12)
    1.0
    """
    th = _as_1d_float(angle_deg, "angle_deg")
    y = _as_1d_float(values)
    if th.size != y.size:
        raise InputError(f"angle_deg has {th.size} values but values has {y.size}; give one angle per value")
    if isinstance(n_harmonics, (bool, np.bool_)) or not isinstance(n_harmonics, (int, np.integer)) or n_harmonics < 1:
        raise InputError(f"n_harmonics={n_harmonics!r} is invalid; use a positive integer (default 2)")
    ok = np.isfinite(th) & np.isfinite(y)
    th, y = th[ok], y[ok]
    p = 2 * int(n_harmonics) + 1
    n = y.size
    if n < p + 2:
        raise InputError(f"periodic_fit with {n_harmonics} harmonic(s) needs at least {p + 2} complete rows; got {n}")
    design = fourier_basis(th, n_harmonics)
    coef, *_ = np.linalg.lstsq(design, y, rcond=None)
    res = y - design @ coef
    ss_res = float(res @ res)
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    var = ss_tot / (n - 1)
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan")
    r2_adj = 1.0 - (1.0 - r2) * (n - 1) / (n - p) if ss_tot > 0 else float("nan")
    return pd.Series({
        "n": int(n), "n_harmonics": int(n_harmonics), "variance": var, "r2": r2, "r2_adjusted": r2_adj,
        "explained_variance": max(r2_adj, 0.0) * var if ss_tot > 0 else float("nan"),
        "residual_sigma": math.sqrt(ss_res / (n - p)), "coefficients": [float(c) for c in coef],
    }, dtype=object)
