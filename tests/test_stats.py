"""Tests of clusterlab.stats against exact facts and independent libraries."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from clusterlab.errors import InputError
from clusterlab.stats import (
    ConvergenceVerdict,
    conformational_environmental,
    converged_radius,
    MIN_RADII_TO_JUDGE,
    SIGMA_BOOTSTRAP_MIN_N,
    MIN_PAIRS_PER_BIN,
    correlation_note,
    disorder_summary,
    sigma_interval_note,
    disorder_stats,
    spatial_correlation,
    static_dynamic,
)


# ---------------------------------------------------------------------------
# disorder_stats
# ---------------------------------------------------------------------------
def test_moments_match_scipy_and_numpy():
    # independent library: scipy.stats skew / kurtosis / norm.fit, numpy std
    rng = np.random.default_rng(11)
    x = rng.gamma(3.0, 0.05, size=57)  # skewed on purpose
    s = disorder_stats(x, seed=1)
    assert s["n"] == 57 and s["n_dropped"] == 0
    assert s["mean"] == pytest.approx(np.mean(x), rel=1e-14)
    assert s["sigma"] == pytest.approx(np.std(x, ddof=1), rel=1e-13)
    assert s["skewness"] == pytest.approx(sps.skew(x), rel=1e-12)
    assert s["excess_kurtosis"] == pytest.approx(sps.kurtosis(x, fisher=True), rel=1e-12)
    mu, sg = sps.norm.fit(x)  # scipy maximum-likelihood Gaussian fit
    assert s["gauss_mu"] == pytest.approx(mu, rel=1e-12)
    assert s["gauss_sigma"] == pytest.approx(sg, rel=1e-12)
    assert s["normality_test"] == "Shapiro-Wilk"
    assert s["normality_p"] == pytest.approx(sps.shapiro(x).pvalue, rel=1e-12)
    assert s["mean_lo"] < s["mean"] < s["mean_hi"]
    assert s["sigma_lo"] < s["sigma"] < s["sigma_hi"]


def test_chi2_interval_is_exact_formula():
    # exact: (n-1)s^2/sigma^2 ~ chi2(n-1) for Gaussian data (textbook,
    # e.g. Casella & Berger, "Statistical Inference", 2nd ed. 2002, ex. 9.2.2)
    x = np.array([0.11, -0.05, 0.02, 0.07, -0.12, 0.03, 0.00, -0.02])
    s = disorder_stats(x, seed=0, confidence=0.90)
    n = x.size
    ss = (n - 1) * np.var(x, ddof=1)
    assert s["sigma_chi2_lo"] == pytest.approx(np.sqrt(ss / sps.chi2.ppf(0.95, n - 1)), rel=1e-12)
    assert s["sigma_chi2_hi"] == pytest.approx(np.sqrt(ss / sps.chi2.ppf(0.05, n - 1)), rel=1e-12)
    assert s["confidence"] == 0.90


def test_nan_dropped_and_counted_and_series_name_kept():
    x = pd.Series([0.1, np.nan, 0.3, 0.2, np.nan, 0.25], name="S1_eV")
    s = disorder_stats(x, seed=3, n_boot=200)
    assert s["n"] == 4 and s["n_dropped"] == 2
    assert s["mean"] == pytest.approx(0.2125)
    assert s.name == "S1_eV"


def test_reproducible_by_seed_and_seed_matters():
    x = np.random.default_rng(5).normal(size=30)
    a = disorder_stats(x, seed=42)
    b = disorder_stats(x, seed=42)
    c = disorder_stats(x, seed=43)
    assert a["sigma_lo"] == b["sigma_lo"] and a["mean_hi"] == b["mean_hi"]
    assert a["sigma_lo"] != c["sigma_lo"]


def test_bca_agrees_with_scipy_bootstrap():
    # independent implementation of BCa: scipy.stats.bootstrap (Efron 1987,
    # J. Am. Stat. Assoc. 82, 171). Monte-Carlo noise at 20000 resamples is
    # a few per mille of sigma; allow 3 % of sigma.
    x = np.random.default_rng(7).normal(0.0, 0.08, 40)
    s = disorder_stats(x, seed=1, n_boot=20000)
    ref = sps.bootstrap((x,), lambda a, axis: np.std(a, ddof=1, axis=axis), n_resamples=20000,
                        method="BCa", rng=2).confidence_interval
    refm = sps.bootstrap((x,), np.mean, n_resamples=20000, method="BCa", rng=2).confidence_interval
    tol = 0.03 * s["sigma"]
    assert s["sigma_lo"] == pytest.approx(ref.low, abs=tol)
    assert s["sigma_hi"] == pytest.approx(ref.high, abs=tol)
    assert s["mean_lo"] == pytest.approx(refm.low, abs=tol)
    assert s["mean_hi"] == pytest.approx(refm.high, abs=tol)


def test_coverage_of_sigma_interval_over_many_samples():
    """The interval for sigma covers the true sigma at about the nominal rate,
    and a 90 % interval handed out for a 95 % one would fail this test.

    2000 Gaussian samples of n=150, sigma=0.1 eV. Binomial standard error of
    a covering rate p over T=2000 trials: sqrt(p(1-p)/T), 0.0049 at p=0.95 and
    0.0067 at p=0.90. The chi-square interval is exact for Gaussian data, so its
    coverage must be 0.95 +- 3 SE. Bootstrap intervals undercover by O(1/n)
    (Efron & Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 14;
    about 0.92 for a standard deviation at n=40, measured here 0.917 with
    2000 trials, 0.94 at n=150), so the BCa intervals (sigma, and mean,
    close to a t interval) may lie a further 0.01 below nominal:
    lower bound 0.95 - 0.01 - 3 SE = 0.925. A true 90 % interval would have
    to cover at 0.925 = 0.90 + 3.8 SE(0.90) to pass: below 1e-4 by the
    normal approximation to the binomial; the upper bound 0.95 + 3 SE = 0.965
    likewise rejects a 99 % interval (0.99 - 8 SE(0.99)). The same samples at
    confidence=0.90 are run below to show the bound rejects them.
    """
    rng = np.random.default_rng(2024)
    true_sigma, n, trials = 0.1, 150, 2000
    samples = rng.normal(1.5, true_sigma, size=(trials, n))

    def coverage(confidence):
        res = pd.DataFrame([disorder_stats(row, n_boot=500, seed=k, confidence=confidence)
                            for k, row in enumerate(samples)])
        cov_boot = np.mean((res["sigma_lo"] <= true_sigma) & (true_sigma <= res["sigma_hi"]))
        cov_chi2 = np.mean((res["sigma_chi2_lo"] <= true_sigma) & (true_sigma <= res["sigma_chi2_hi"]))
        cov_mean = np.mean((res["mean_lo"] <= 1.5) & (1.5 <= res["mean_hi"]))
        return res, cov_boot, cov_chi2, cov_mean

    se = np.sqrt(0.95 * 0.05 / trials)
    lower, upper = 0.95 - 0.01 - 3 * se, 0.95 + 3 * se
    res, cov_boot, cov_chi2, cov_mean = coverage(0.95)
    assert 0.95 - 3 * se <= cov_chi2 <= upper
    assert lower <= cov_boot <= upper
    assert lower <= cov_mean <= upper
    # the exact interval is not the bootstrap one (they are computed separately)
    assert not np.allclose(res["sigma_lo"].astype(float), res["sigma_chi2_lo"].astype(float))
    # 90 % intervals of the same samples fall below the bound: the check can fail
    _, cov90_boot, cov90_chi2, cov90_mean = coverage(0.90)
    assert max(cov90_boot, cov90_chi2, cov90_mean) < lower


def test_large_sample_uses_dagostino_pearson():
    x = np.random.default_rng(1).normal(size=6000)
    s = disorder_stats(x, n_boot=100, seed=0)
    assert s["normality_test"] == "D'Agostino-Pearson"
    assert s["normality_p"] == pytest.approx(sps.normaltest(x).pvalue, rel=1e-12)


def test_percentile_method_and_constant_values():
    s = disorder_stats([0.2, 0.2, 0.2, 0.2], seed=0, n_boot=100, method="percentile")
    assert s["ci_method"] == "percentile"
    assert s["sigma"] == 0.0 and s["sigma_lo"] == 0.0 and s["sigma_hi"] == 0.0
    assert np.isnan(s["skewness"])


@pytest.mark.parametrize(
    ("values", "kw", "match"),
    [
        ([1.0, np.nan, 2.0], {}, "at least 3 finite values; got 2"),
        ([[1.0, 2.0, 3.0]], {}, "one-dimensional"),
        ([1.0, 2.0, 3.0], {"confidence": 1.5}, "confidence=1.5"),
        ([1.0, 2.0, 3.0], {"n_boot": 10}, "n_boot=10"),
        ([1.0, 2.0, 3.0], {"method": "bc"}, "method='bc'"),
    ],
)
def test_disorder_stats_errors(values, kw, match):
    with pytest.raises(InputError, match=match):
        disorder_stats(values, **kw)


# ---------------------------------------------------------------------------
# decompositions
# ---------------------------------------------------------------------------
def _mixture(n_mol=400, n_frames=50, s_static=0.08, s_dyn=0.03, seed=0):
    rng = np.random.default_rng(seed)
    static = rng.normal(0.0, s_static, n_mol)
    dyn = rng.normal(0.0, s_dyn, (n_frames, n_mol))
    e = 3.1 + static[None, :] + dyn
    fr, mol = np.meshgrid(np.arange(n_frames), np.arange(n_mol), indexing="ij")
    return pd.DataFrame({"frame": fr.ravel(), "molecule": mol.ravel(), "S1_eV": e.ravel()})


def test_static_dynamic_known_mixture():
    # model E_it = s_i + d_it with var(s)=0.08^2, var(d)=0.03^2; sampling
    # SE of an estimated variance from k values is about var*sqrt(2/k)
    # (Gaussian), so static: 0.0064*0.071 = 4.5e-4, dynamic: tiny. 4 SE allowed.
    df = _mixture()
    out = static_dynamic(df, value="S1_eV")
    assert out["n_molecules"] == 400 and out["n_frames"] == 50 and out["balanced"]
    assert out["var_static_corrected"] == pytest.approx(0.08**2, abs=4 * 4.5e-4)
    assert out["var_dynamic_corrected"] == pytest.approx(0.03**2, abs=4 * 0.03**2 * np.sqrt(2 / 19600))
    assert out["sigma_dynamic"] == pytest.approx(0.03 * np.sqrt(49 / 50), rel=0.02)
    # balanced closed form: corrected = M/(M-1) var_static - MSW/T (Searle et al. 1992)
    assert out["var_static"] - out["var_static_corrected"] == pytest.approx(
        out["var_dynamic_corrected"] / 50 - out["var_static"] / 399, rel=1e-9
    )


def test_static_dynamic_finite_frame_bias_removed():
    # few frames, small static part: E[var of molecule means] = s_s^2 + s_d^2/T
    # = 0.0004 + 0.0009 (exact for the model); the ANOVA estimator removes the
    # s_d^2/T term. SE of the estimate about 0.0013*sqrt(2/2000) = 4.1e-5; 4 SE.
    df = _mixture(n_mol=2000, n_frames=4, s_static=0.02, s_dyn=0.06, seed=12)
    out = static_dynamic(df)
    assert out["var_static"] == pytest.approx(0.02**2 + 0.06**2 / 4, abs=1.6e-4)
    assert out["var_static_corrected"] == pytest.approx(0.02**2, abs=1.6e-4)
    assert out["sigma_static_corrected"] == pytest.approx(0.02, rel=0.2)


def test_static_dynamic_exact_identity_and_numpy():
    # law of total variance, exact for ddof=0 quantities (common practice);
    # checked also against a plain numpy computation of each piece
    df = _mixture(n_mol=13, n_frames=7, seed=3)
    out = static_dynamic(df, value="S1_eV")
    e = df.pivot(index="frame", columns="molecule", values="S1_eV").to_numpy()
    assert out["var_total"] == pytest.approx(np.var(e), rel=1e-13)
    assert out["var_static"] == pytest.approx(np.var(e.mean(axis=0)), rel=1e-12)
    assert out["var_dynamic"] == pytest.approx(np.mean(np.var(e, axis=0)), rel=1e-12)
    assert abs(out["identity_residual"]) < 1e-15
    assert out["var_total"] == pytest.approx(out["var_static"] + out["var_dynamic"], rel=1e-13)
    # ANOVA estimator against its balanced closed form (Searle et al. 1992)
    m, t = 13, 7
    msb = t * np.sum((e.mean(axis=0) - e.mean()) ** 2) / (m - 1)
    msw = np.sum((e - e.mean(axis=0)) ** 2) / (m * (t - 1))
    assert out["var_static_corrected"] == pytest.approx((msb - msw) / t, rel=1e-12)


def test_static_dynamic_unbalanced_identity_and_nan():
    df = _mixture(n_mol=10, n_frames=6, seed=4)
    df = df.drop(index=[0, 5, 17]).reset_index(drop=True)
    df.loc[3, "S1_eV"] = np.nan
    out = static_dynamic(df, value="S1_eV")
    assert not out["balanced"] and out["n_dropped"] == 1
    assert abs(out["identity_residual"]) < 1e-15
    e = df["S1_eV"].dropna().to_numpy()
    assert out["var_total"] == pytest.approx(np.var(e), rel=1e-13)


def test_static_dynamic_errors():
    df = _mixture(n_mol=3, n_frames=2)
    with pytest.raises(InputError, match="'T1_eV' is missing"):
        static_dynamic(df, value="T1_eV")
    dup = pd.concat([df, df.iloc[:1]])
    with pytest.raises(InputError, match="appears more than once"):
        static_dynamic(dup)
    with pytest.raises(InputError, match="at least 2 molecules"):
        static_dynamic(df[df["molecule"] == 0])


def test_conformational_environmental_constructed_covariance():
    # bivariate Gaussian with known covariance: sigma_conf 0.05, sigma_env 0.09,
    # correlation -0.4; var(a+b) = var a + var b + 2 cov exactly (common practice)
    rng = np.random.default_rng(8)
    sa, sb, rho = 0.05, 0.09, -0.4
    cov = np.array([[sa**2, rho * sa * sb], [rho * sa * sb, sb**2]])
    ab = rng.multivariate_normal([3.0, -0.2], cov, size=20000)
    df = pd.DataFrame({"S1_vacuum_eV": ab[:, 0], "S1_shift_eV": ab[:, 1]})
    out = conformational_environmental(df)
    assert out["sigma_conf"] == pytest.approx(sa, rel=0.03)
    assert out["sigma_env"] == pytest.approx(sb, rel=0.03)
    assert out["correlation"] == pytest.approx(rho, abs=0.03)
    assert out["correlation"] == pytest.approx(sps.pearsonr(ab[:, 0], ab[:, 1]).statistic, rel=1e-10)
    assert out["sigma_total"] == pytest.approx(np.std(ab.sum(axis=1), ddof=1), rel=1e-12)
    assert abs(out["identity_residual"]) < 1e-15
    assert out["frac_conf"] + out["frac_env"] + out["frac_cov"] == pytest.approx(1.0, abs=1e-12)
    true_total = sa**2 + sb**2 + 2 * rho * sa * sb
    assert out["frac_cov"] == pytest.approx(2 * rho * sa * sb / true_total, abs=0.03)


def test_conformational_environmental_errors():
    df = pd.DataFrame({"S1_vacuum_eV": [1.0, 2.0, np.nan, 4.0], "S1_shift_eV": [0.1, np.nan, 0.2, 0.3]})
    with pytest.raises(InputError, match="at least 3 complete rows; got 2"):
        conformational_environmental(df)
    with pytest.raises(InputError, match="'T1_shift_eV' is missing"):
        conformational_environmental(df, shift="T1_shift_eV")


# ---------------------------------------------------------------------------
# spatial correlation
# ---------------------------------------------------------------------------
def _lattice(n_side, spacing=1.0):
    g = np.arange(n_side) * spacing
    return np.array(list(itertools.product(g, g, g)), dtype=float)


def test_correlation_recovers_exponential_field():
    """Gaussian random field with covariance exp(-r/xi), built by Cholesky of
    the covariance matrix (an independent construction; exp(-r) is a
    positive-definite kernel in 3-D, Matern nu=1/2, common practice). Each
    realisation is a separate frame, so pairs across realisations must not
    be formed (they would be uncorrelated and drag C towards 0)."""
    rng = np.random.default_rng(3)
    xi, n_side, n_real = 1.5, 6, 120
    pos = _lattice(n_side)
    d = np.linalg.norm(pos[:, None, :] - pos[None, :, :], axis=-1)
    chol = np.linalg.cholesky(np.exp(-d / xi) + 1e-12 * np.eye(len(pos)))
    field = (chol @ rng.standard_normal((len(pos), n_real))).T  # (n_real, N)
    frames = np.repeat(np.arange(n_real), len(pos))
    out = spatial_correlation(np.tile(pos, (n_real, 1)), field.ravel(), None, r_max_A=4.05, n_bins=9,
                              frames=frames)
    # bins centred on lattice distances 1, sqrt2, sqrt3, 2 ... ; use pair-averaged exp(-r/xi)
    dd = d[np.triu_indices(len(pos), 1)]
    k = np.minimum((dd / 4.05 * 9).astype(int), 8)
    inside = dd < 4.05
    expect = np.bincount(k[inside], weights=np.exp(-dd[inside] / xi), minlength=9) / np.maximum(
        np.bincount(k[inside], minlength=9), 1)
    have = out["n_pairs"].to_numpy() > 0
    assert np.all(out["n_pairs"].to_numpy()[have] % n_real == 0)  # same pairs in every frame
    np.testing.assert_allclose(out["C"].to_numpy()[have], expect[have], atol=0.06)
    # without frame grouping, pairs across 10 realisations (uncorrelated)
    # outnumber the within-realisation ones 9:1 and C(1 Å) collapses
    n_mix = 10 * len(pos)
    mixed = spatial_correlation(np.tile(pos, (10, 1)), field[:10].ravel(), r_max_A=4.05, n_bins=9)
    assert mixed["n_pairs"].iloc[2] == 10 * n_mix // len(pos) * (out["n_pairs"].iloc[2] // n_real)
    assert mixed["C"].iloc[2] < 0.5 * out["C"].iloc[2]


def test_uncorrelated_values_give_zero():
    rng = np.random.default_rng(9)
    pos = rng.uniform(0, 30.0, size=(1500, 3))
    vals = rng.normal(0, 0.1, 1500)
    out = spatial_correlation(pos, vals, [30.0, 30.0, 30.0, 90, 90, 90], n_bins=10)
    assert out["r_hi_A"].iloc[-1] == pytest.approx(15.0)
    # SE of a mean of k products of independent unit normals is 1/sqrt(k)
    ok = out["n_pairs"] > 200
    assert np.all(np.abs(out["C"][ok]) < 5 / np.sqrt(out["n_pairs"][ok]))
    assert out.attrs["variance"] == pytest.approx(np.var(vals), rel=1e-12)


def test_correlation_bootstrap_weights_match_an_explicit_resample():
    # a resample with multiplicities w is the sample with site i copied w_i times, pairs only between
    # copies of different sites: check the weighted formula against that explicit construction
    from clusterlab.stats import _bootstrap_correlation

    rng = np.random.default_rng(3)
    pos = rng.uniform(0, 12.0, size=(9, 3))
    vals = rng.normal(size=9)
    w = np.array([[2, 0, 1, 1, 3, 0, 1, 1, 0]])

    class Draw:
        def multinomial(self, n, p, size):
            assert n == 9 and size == 1
            return w

    out = spatial_correlation(pos, vals, None, r_max_A=12.0, n_bins=3)
    i, j = np.triu_indices(9, 1)
    d = np.linalg.norm(pos[i] - pos[j], axis=1)
    keep = d < 12.0
    k = np.minimum((d[keep] / 12.0 * 3).astype(int), 2)
    boot = _bootstrap_correlation(vals, [(i[keep], j[keep], k)], 3, 1, Draw())
    copies = np.repeat(np.arange(9), w[0])
    x = vals[copies]
    m, v = x.mean(), x.var()
    expect = np.full(3, np.nan)
    for b in range(3):
        num = den = 0.0
        for a in range(len(copies)):
            for c in range(a + 1, len(copies)):
                s1, s2 = sorted((copies[a], copies[c]))
                if s1 == s2:
                    continue
                dist = np.linalg.norm(pos[s1] - pos[s2])
                if dist < 12.0 and min(int(dist / 12.0 * 3), 2) == b:
                    num += (vals[s1] - m) * (vals[s2] - m)
                    den += 1
        if den:
            expect[b] = num / den / v
    np.testing.assert_allclose(boot[0], expect, rtol=1e-10)
    assert out["C_lo"].isna().all() and out.attrs["n_boot"] == 0


def test_correlation_intervals_pair_counts_and_shown_bins():
    rng = np.random.default_rng(8)
    pos = rng.uniform(0, 20.0, size=(120, 3))
    vals = rng.normal(size=120)
    box = [20.0, 20.0, 20.0, 90, 90, 90]
    a = spatial_correlation(pos, vals, box, n_bins=6, n_boot=300, seed=2)
    b = spatial_correlation(pos, vals, box, n_bins=6, n_boot=300, seed=2)
    pd.testing.assert_frame_equal(a, b)
    plain = spatial_correlation(pos, vals, box, n_bins=6)
    pd.testing.assert_series_equal(a["C"], plain["C"])  # the interval does not move the estimate
    assert (a.shown == (a.n_pairs >= MIN_PAIRS_PER_BIN)).all() and a.attrs["min_pairs"] == MIN_PAIRS_PER_BIN
    ok = a.shown
    assert np.all(a.C_lo[ok] < a.C_hi[ok])
    # independent values: the intervals hold 0 in most bins with many pairs
    assert np.mean((a.C_lo[ok] <= 0) & (0 <= a.C_hi[ok])) >= 0.5
    assert correlation_note(a) is None
    few = spatial_correlation(pos[:4], vals[:4], box, n_bins=6)
    note = correlation_note(few)
    assert note is not None and "4 sites give" in note and f"needs {MIN_PAIRS_PER_BIN} pairs" in note
    with pytest.raises(InputError, match="n_boot=-1"):
        spatial_correlation(pos, vals, box, n_boot=-1)


def _brute_min_image(pos, box_vecs):
    """Minimum-image distances by enumerating the 27 neighbouring images
    (independent of MDAnalysis; exact for r below half the cell width)."""
    shifts = np.array(list(itertools.product((-1, 0, 1), repeat=3))) @ box_vecs
    i, j = np.triu_indices(len(pos), 1)
    dv = pos[j] - pos[i]
    return np.min(np.linalg.norm(dv[:, None, :] + shifts[None, :, :], axis=-1), axis=1)


@pytest.mark.parametrize("box", [[20.0, 22.0, 25.0, 90, 90, 90], [20.0, 22.0, 25.0, 75.0, 100.0, 65.0]])
def test_periodic_pair_counts_match_brute_force(box):
    from clusterlab.geometry import box_vectors as _box_vectors
    from clusterlab.geometry import half_box_width_A

    rng = np.random.default_rng(4)
    vecs = _box_vectors(np.array(box, float))
    # check the cell against its definition: lengths and angles
    assert np.linalg.norm(vecs, axis=1) == pytest.approx(box[:3])
    assert np.degrees(np.arccos(vecs[1] @ vecs[2] / (box[1] * box[2]))) == pytest.approx(box[3])
    assert np.degrees(np.arccos(vecs[0] @ vecs[1] / (box[0] * box[1]))) == pytest.approx(box[5])
    frac = rng.uniform(0, 1, size=(300, 3))
    pos = frac @ vecs
    vals = rng.normal(size=300)
    rmax = half_box_width_A(np.array(box, float))
    out = spatial_correlation(pos, vals, box, n_bins=8)
    d = _brute_min_image(pos, vecs)
    i, j = np.triu_indices(300, 1)
    keep = d < rmax
    k = np.minimum((d[keep] / rmax * 8).astype(int), 7)
    np.testing.assert_array_equal(out["n_pairs"].to_numpy(), np.bincount(k, minlength=8))
    dv = vals - vals.mean()
    prod = np.bincount(k, weights=(dv[i] * dv[j])[keep], minlength=8)
    np.testing.assert_allclose(out["covariance"].to_numpy(), prod / np.bincount(k, minlength=8), rtol=1e-10)
    # periodic pairs exist that the non-periodic count misses
    flat = spatial_correlation(pos, vals, None, r_max_A=rmax, n_bins=8)
    assert out["n_pairs"].sum() > flat["n_pairs"].sum()


def test_spatial_correlation_errors():
    pos = np.zeros((4, 3)) + np.arange(4)[:, None]
    with pytest.raises(InputError, match=r"shape \(n, 3\)"):
        spatial_correlation(pos[:3], [1.0, 2.0, 3.0, 4.0])
    with pytest.raises(InputError, match="exceeds half the box width"):
        spatial_correlation(pos, [1.0, 2.0, 3.0, 4.0], [10, 10, 10, 90, 90, 90], r_max_A=6.0)
    with pytest.raises(InputError, match="box="):
        spatial_correlation(pos, [1.0, 2.0, 3.0, 4.0], [10, 10, -1, 90, 90, 90])
    with pytest.raises(InputError, match="zero variance"):
        spatial_correlation(pos, [1.0, 1.0, 1.0, 1.0])
    with pytest.raises(InputError, match="no entry for frame 1"):
        spatial_correlation(pos, [1.0, 2.0, 3.0, 4.0], {0: [10, 10, 10]}, frames=[0, 0, 1, 1])


def test_reported_sigma_interval_follows_the_sample_size():
    rng = np.random.default_rng(5)
    for n in (3, SIGMA_BOOTSTRAP_MIN_N - 1):
        s = disorder_stats(rng.normal(0.0, 0.05, n), seed=0)
        assert s["sigma_ci_method"] == "chi-square"
        assert (s["sigma_ci_lo"], s["sigma_ci_hi"]) == (s["sigma_chi2_lo"], s["sigma_chi2_hi"])
        assert f"is below {SIGMA_BOOTSTRAP_MIN_N}" in sigma_interval_note(s)
    for method, name in (("BCa", "bootstrap BCa"), ("percentile", "bootstrap percentile")):
        s = disorder_stats(rng.normal(0.0, 0.05, SIGMA_BOOTSTRAP_MIN_N), seed=0, method=method)
        assert s["sigma_ci_method"] == name
        assert (s["sigma_ci_lo"], s["sigma_ci_hi"]) == (s["sigma_lo"], s["sigma_hi"])
    # the summary rows show that σ and that interval, in meV
    s = disorder_stats([3.00, 3.10, 3.12], seed=0)
    rows = dict(disorder_summary(s).itertuples(index=False))
    assert rows["σ (meV)"] == (f"{1e3 * s['sigma']:.1f} [{1e3 * s['sigma_chi2_lo']:.1f}, "
                               f"{1e3 * s['sigma_chi2_hi']:.1f}]")
    assert "chi-square" in rows["σ interval"] and rows["n"] == "3"


# ---------------------------------------------------------------------------
# converged_radius
# ---------------------------------------------------------------------------
R = np.array([6.0, 8.0, 10.0, 12.0, 14.0, 18.0, 22.0, 26.0, 30.0])


def test_monotone_inverse_cube():
    # v(r) = v_inf - A/r^3; |v(r) - v(30)| <= tol has the closed-form
    # solution r >= (A / (tol + A/30^3))^(1/3) (exact)
    a, tol = 40.0, 0.01
    v = 0.25 - a / R**3
    out = converged_radius(R, v, tol=tol)
    r_star = (a / (tol + a / 30.0**3)) ** (1 / 3)
    assert isinstance(out, ConvergenceVerdict)
    assert out.converged and out.reference_kind == "largest radius"
    assert out.radius_A == R[R >= r_star].min()
    assert out.reference == pytest.approx(v[-1])
    assert out.max_deviation_after == pytest.approx(abs(v[R == out.radius_A][0] - v[-1]))
    assert "converged to within 10 meV of the largest-radius value from 18 Å on" in out.message


def test_damped_oscillation_uses_last_excursion():
    # a damped cosine crosses the reference repeatedly; the converged radius is
    # past the last excursion beyond tol, not the first time it is inside
    r = np.arange(6.0, 41.0, 1.0)
    v = 0.1 + 0.2 * np.exp(-r / 6.0) * np.cos(r)
    tol = 0.01
    out = converged_radius(r, v, tol=tol)
    dev = np.abs(v - v[-1])
    last_bad = r[dev > tol].max()
    assert out.converged and out.radius_A == r[r > last_bad].min()
    assert np.any(dev[r < last_bad] <= tol)  # it was inside earlier, too


def test_not_converged_inverse_r():
    v = -1.2 / R  # 1/r: 10 meV change between 26 and 30 Å, tol 1 meV
    out = converged_radius(R, v, tol=0.001)
    assert not out.converged and out.radius_A is None and np.isnan(out.max_deviation_after)
    change = abs(v[-1] - v[-2]) * 1e3
    assert out.message == (
        f"not converged within the radii given (value still changes by {change:.0f} meV between "
        "26 and 30 Å, tolerance 1 meV)"
    )


def test_periodic_reference():
    a = 40.0
    v = 0.25 - a / R**3
    out = converged_radius(R, v, tol=0.01, reference=0.25)
    r_star = (a / 0.01) ** (1 / 3)  # exact: a/r^3 <= tol
    assert out.converged and out.reference_kind == "periodic limit"
    assert out.radius_A == R[R >= r_star].min()
    assert "of the periodic limit from" in out.message
    # a limit the scan never reaches: not converged even at the last radius
    far = converged_radius(R, v, tol=0.01, reference=0.40)
    assert not far.converged and "from the periodic limit" in far.message


def test_table_of_quantities_names_the_slowest():
    df = pd.DataFrame({"S1_shift_eV": -0.05 - 5.0 / R**3, "IP_shift_eV": -1.0 + 3.0 / R})
    out = converged_radius(R, df, tol=0.1)
    assert out.converged and out.quantity == "IP_shift_eV"
    assert out.radius_by_quantity["S1_shift_eV"] == 6.0
    assert out.radius_A == out.radius_by_quantity["IP_shift_eV"] > 6.0
    assert "slowest: IP shift" in out.message
    # messages use display names: ΔEST, not the column name dEST_eV
    gap = converged_radius(R, pd.DataFrame({"dEST_eV": 0.3 + 3.0 / R}), tol=0.1)
    assert "ΔEST converged" in gap.message and "dEST" not in gap.message
    with_ref = converged_radius(R, df, tol=0.1, reference={"S1_shift_eV": -0.05, "IP_shift_eV": -1.0})
    assert with_ref.reference == {"S1_shift_eV": -0.05, "IP_shift_eV": -1.0}
    with pytest.raises(InputError, match="no periodic limit for 'IP_shift_eV'"):
        converged_radius(R, df, reference={"S1_shift_eV": 0.0})


def test_unsorted_and_nan():
    v = 0.25 - 40.0 / R**3
    perm = np.random.default_rng(0).permutation(R.size)
    ref = converged_radius(R, v, tol=0.01)
    shuffled = converged_radius(R[perm], v[perm], tol=0.01)
    assert shuffled.radius_A == ref.radius_A and shuffled.reference == ref.reference
    w = v.copy()
    w[-1] = np.nan  # failed largest radius: reference falls back to 26 Å
    out = converged_radius(R, pd.Series(w, name="T1_shift_eV"), tol=0.01)
    assert out.reference == pytest.approx(v[-2])
    assert out.converged and "T1 shift" in out.message


def test_converged_radius_names_the_radius_it_judges():
    v = 0.25 - 40.0 / R**3
    plain = converged_radius(R, v, tol=0.01)
    named = converged_radius(R, v, tol=0.01, radius_label="inner (polarizable) radius")
    assert (named.converged, named.radius_A) == (plain.converged, plain.radius_A) and plain.converged
    assert named.message == plain.message.replace(f"from {plain.radius_A:g} Å", f"from inner (polarizable) "
                                                  f"radius {plain.radius_A:g} Å")
    stuck = converged_radius(R, 0.25 - 4000.0 / R**3, tol=0.001, radius_label="outer radius")
    assert not stuck.converged and f"between outer radius {R[-2]:g} and {R[-1]:g} Å" in stuck.message


def test_converged_radius_errors():
    with pytest.raises(InputError, match="radii has 3 entries but values has 2"):
        converged_radius([1.0, 2.0, 3.0], [0.1, 0.2])
    with pytest.raises(InputError, match="duplicates"):
        converged_radius([1.0, 2.0, 2.0], [0.1, 0.2, 0.3])
    with pytest.raises(InputError, match="tol=0.0"):
        converged_radius([1.0, 2.0], [0.1, 0.2], tol=0.0)
    # one finite value used to raise (and broke a scan cancelled after its first radius); it is now a
    # verdict that says it cannot judge (see test_too_few_radii_cannot_be_judged)
    one = converged_radius([1.0, 2.0], [np.nan, 0.2])
    assert not one.converged and not one.judged and "from 1 radius (2 Å)" in one.message


def test_too_few_radii_cannot_be_judged():
    # two radii 7.3 meV apart with a 10 meV band: the last radius is its own reference, so the band
    # test says nothing; the verdict must not say "converged"
    df = pd.DataFrame({"S1_shift_eV": [-0.0800, -0.0873], "T1_shift_eV": [-0.050, -0.052]})
    out = converged_radius([5.0, 8.0], df, tol=0.010)
    assert not out.converged and not out.judged and out.radius_A is None
    assert out.radius_by_quantity == {"S1_shift_eV": None, "T1_shift_eV": None}
    assert "cannot be judged yet" in out.message and "add a radius beyond 8 Å" in out.message
    assert "2 quantities (S1 shift, T1 shift)" in out.message and "moved 7.3 meV" in out.message
    assert "converged to" not in out.message
    # radii that already disagree beyond the band are judged: not converged
    apart = converged_radius([5.0, 8.0], [-0.05, -0.09], tol=0.010)
    assert apart.judged and not apart.converged and "still changes by 40 meV" in apart.message
    # a third radius inside the band decides it
    three = converged_radius([5.0, 8.0, 11.0], [-0.0800, -0.0873, -0.0880], tol=0.010)
    assert three.judged and three.converged and three.radius_A == 5.0
    # the periodic limit is an independent reference: one radius can be judged against it
    per = converged_radius([8.0], [-0.088], tol=0.010, reference=-0.090)
    assert per.judged and per.converged and per.radius_A == 8.0
    # nothing finite: not judged, and says how many radii a verdict needs
    none = converged_radius([5.0], [np.nan])
    assert not none.judged and f"run at least {MIN_RADII_TO_JUDGE} radii" in none.message


def test_verdict_names_every_quantity_it_counts():
    df = pd.DataFrame({"S1_shift_eV": -0.05 - 5.0 / R**3, "T1_shift_eV": -0.03 - 4.0 / R**3})
    out = converged_radius(R, df, tol=0.01)
    assert out.converged and "all 2 quantities (S1 shift, T1 shift; slowest:" in out.message


def test_spatial_correlation_default_cutoff_fits_a_single_precision_box():
    """The default cutoff is half the box; MDAnalysis checks it against its
    float32 copy of the box, so an exact double-precision half-width was
    refused for half of these boxes (measured before the fix: 20 of 40)."""
    rng = np.random.default_rng(0)
    for length in np.linspace(38.0, 39.0, 40):
        box = np.array([length, length * 1.0000003, length * 0.9999997, 90, 90, 90])
        pos = rng.uniform(0, length, (200, 3))
        df = spatial_correlation(pos, rng.standard_normal(200), box)
        assert df["r_hi_A"].max() == pytest.approx(0.5 * length * 0.9999997, rel=2e-6)
        assert df["n_pairs"].sum() > 0
