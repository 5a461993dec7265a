"""tdkit.stats against scipy and against the published definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import special
from scipy import stats as sps

from tdkit import InvalidParameterError
from tdkit.stats import (
    ScoreSummary,
    betainc,
    bootstrap_band,
    bootstrap_ci,
    chi2_sf,
    gammaincc,
    iqm,
    mean,
    student_t_isf,
    student_t_sf,
    summarize_scores,
    welch_test,
)

finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)
samples = st.lists(finite, min_size=2, max_size=40)


# ---------------------------------------------------------------- special functions
@settings(max_examples=200)
@given(st.floats(0.01, 200.0), st.floats(0.01, 200.0),
       st.one_of(st.just(0.0), st.floats(1e-300, 1.0)))
def test_betainc_matches_scipy(a, b, x):
    # x is 0 or a normal float: at subnormal x scipy itself drifts (at x = 5e-324,
    # a = 1/64, b = 2 it is 0.5% below the leading term x^a / (a B(a, b))).
    assert betainc(a, b, x) == pytest.approx(special.betainc(a, b, x), abs=1e-12, rel=1e-9)


@settings(max_examples=200)
@given(st.floats(0.01, 200.0), st.floats(0.0, 500.0))
def test_gammaincc_matches_scipy(a, x):
    assert gammaincc(a, x) == pytest.approx(special.gammaincc(a, x), abs=1e-12, rel=1e-9)


@settings(max_examples=200)
@given(st.floats(-50.0, 50.0), st.floats(0.5, 500.0))
def test_student_t_sf_matches_scipy(t, df):
    # abs 1e-8: near t = 0 scipy's sf loses digits (at t = 1e-8, df = 1 it is off by 1.6e-9
    # from the exact 1/2 - arctan(t)/pi); the closed forms below pin those cases down.
    assert student_t_sf(t, df) == pytest.approx(sps.t.sf(t, df), abs=1e-8, rel=1e-9)


@settings(max_examples=200)
@given(st.floats(1e-9, 0.5), st.floats(0.5, 200.0))
def test_student_t_isf_inverts_the_survival_function_like_scipy(p, df):
    t = student_t_isf(p, df)
    assert student_t_sf(t, df) == pytest.approx(p, rel=1e-6, abs=1e-15)
    assert t == pytest.approx(sps.t.isf(p, df), rel=1e-6, abs=1e-9)


@pytest.mark.parametrize("p", [0.0, -0.1, 0.6, float("nan")])
def test_student_t_isf_refuses_a_level_outside_its_range(p):
    with pytest.raises(InvalidParameterError, match="student_t_isf: p"):
        student_t_isf(p, 5)


@settings(max_examples=200)
@given(st.floats(0.0, 300.0), st.integers(1, 60))
def test_chi2_sf_matches_scipy(x, df):
    assert chi2_sf(x, df) == pytest.approx(sps.chi2.sf(x, df), abs=1e-12, rel=1e-9)


def test_closed_forms():
    # Cauchy (t with 1 df): P(T > t) = 1/2 - arctan(t)/pi (Johnson, Kotz & Balakrishnan
    # 1995, Continuous Univariate Distributions, vol. 2, ch. 28).
    for t in (1e-8, 0.3, 1.0, 7.0):
        assert student_t_sf(t, 1) == pytest.approx(0.5 - math.atan(t) / math.pi, abs=1e-14)
    # Chi-square with 2 df is exponential with mean 2: P(X > x) = exp(-x/2).
    assert chi2_sf(5.0, 2) == pytest.approx(math.exp(-2.5), rel=1e-13)
    # I_x(1, 1) = x (the uniform distribution).
    assert betainc(1.0, 1.0, 0.37) == pytest.approx(0.37, rel=1e-14)


def test_special_functions_reject_bad_arguments():
    with pytest.raises(InvalidParameterError, match="x must be in"):
        betainc(1.0, 1.0, 1.5)
    with pytest.raises(InvalidParameterError, match="a and b"):
        betainc(0.0, 1.0, 0.5)
    with pytest.raises(InvalidParameterError, match="df"):
        student_t_sf(1.0, 0)
    with pytest.raises(InvalidParameterError, match="df"):
        chi2_sf(1.0, -1)


# ---------------------------------------------------------------- Welch
@settings(max_examples=150)
@given(samples, samples)
def test_welch_matches_scipy(a, b):
    ours = welch_test(a, b)
    theirs = sps.ttest_ind(a, b, equal_var=False)
    if np.var(a) == 0 and np.var(b) == 0:
        # Undefined statistic: our documented convention.
        assert ours.p_value == (1.0 if np.mean(a) == np.mean(b) else 0.0)
        return
    # scipy squares the variances in the Welch-Satterthwaite df, which underflow to 0
    # below about 1e-154 (a = [0, 0], b = [0, 0, 5e-157] gives df = nan there and 2 here,
    # the exact value since var(a) = 0); compare only where scipy's formula is exact.
    assume(min(v for v in (np.var(a) / len(a), np.var(b) / len(b)) if v > 0) > 1e-150)
    assert ours.statistic == pytest.approx(theirs.statistic, rel=1e-9, abs=1e-12)
    assert ours.p_value == pytest.approx(theirs.pvalue, rel=1e-8, abs=1e-12)
    assert ours.mean_difference == pytest.approx(np.mean(a) - np.mean(b), rel=1e-12, abs=1e-9)


def test_welch_degrees_of_freedom_by_hand():
    # Welch-Satterthwaite by hand: a = [1, 2, 3] (var 1, n 3), b = [2, 4, 6, 8] (var 20/3, n 4).
    va, vb = 1 / 3, (20 / 3) / 4
    expected_df = (va + vb) ** 2 / (va**2 / 2 + vb**2 / 3)
    result = welch_test([1, 2, 3], [2, 4, 6, 8])
    assert result.df == pytest.approx(expected_df, rel=1e-12)
    assert result.statistic == pytest.approx((2 - 5) / math.sqrt(va + vb), rel=1e-12)


def test_welch_constant_samples():
    assert welch_test([1, 1, 1], [1, 1]).p_value == 1.0
    differ = welch_test([1, 1, 1], [2, 2])
    assert differ.p_value == 0.0 and differ.statistic == -math.inf


def test_welch_needs_two_scores_each():
    with pytest.raises(InvalidParameterError, match="at least 2"):
        welch_test([1.0], [1.0, 2.0])
    with pytest.raises(InvalidParameterError, match="finite"):
        welch_test([1.0, float("nan")], [1.0, 2.0])


# ---------------------------------------------------------------- IQM
@given(st.lists(finite, min_size=1, max_size=15).map(lambda x: x * 4))
def test_iqm_is_the_25_percent_trimmed_mean_when_n_is_a_multiple_of_4(values):
    # Agarwal et al. (2021), Sec. 4.2: discard the bottom and top 25%, average the rest;
    # scipy.stats.trim_mean removes exactly n/4 from each end when 4 divides n.
    assert iqm(values) == pytest.approx(sps.trim_mean(values, 0.25), rel=1e-9, abs=1e-6)


@given(st.lists(finite, min_size=1, max_size=40))
def test_iqm_integrates_the_empirical_quantile_function(values):
    # 2 * integral over [1/4, 3/4] of the step quantile function, by a fine midpoint rule
    # evaluated exactly per step: each sorted value weighs its overlap with [1/4, 3/4].
    x = np.sort(values)
    n = len(x)
    u = (np.arange(200 * n) + 0.5) / (200 * n)
    inside = (u > 0.25) & (u < 0.75)
    quantile = x[np.minimum((u * n).astype(int), n - 1)]
    approx = 2 * quantile[inside].sum() / (200 * n)
    # The midpoint grid puts the boundaries 1/4 and 3/4 within one cell of width 1/(200n).
    bound = 2 * 2 * np.abs(x).max() / (200 * n) + 1e-9
    assert abs(iqm(values) - approx) <= bound


def test_iqm_small_cases_and_axis():
    assert iqm([5.0]) == 5.0
    assert iqm([1.0, 3.0]) == 2.0
    assert iqm([1.0, 2.0, 30.0]) == pytest.approx(1 / 6 + 2 * 2 / 3 + 30 / 6)
    table = np.array([[0.0, 10.0], [1.0, 11.0], [2.0, 12.0], [100.0, 13.0]])
    assert iqm(table, axis=0) == pytest.approx([1.5, 11.5])
    assert mean([1.0, 2.0, 6.0]) == 3.0
    assert mean(table, axis=0) == pytest.approx([25.75, 11.5])


# ---------------------------------------------------------------- bootstrap
def test_bootstrap_is_reproducible_and_equivariant():
    rng = np.random.default_rng(0)
    x = rng.normal(size=25)
    first = bootstrap_ci(x, "iqm", seed=3)
    assert bootstrap_ci(x, "iqm", seed=3) == first
    # With the same resampling indices, shifting and scaling the data maps the
    # percentile interval exactly (the statistic is affine-equivariant).
    shifted = bootstrap_ci(3.0 * x + 7.0, "iqm", seed=3)
    assert shifted.low == pytest.approx(3.0 * first.low + 7.0)
    assert shifted.high == pytest.approx(3.0 * first.high + 7.0)
    assert shifted.estimate == pytest.approx(3.0 * first.estimate + 7.0)


def test_bootstrap_interval_grows_with_confidence_and_stays_in_the_data_range():
    x = np.random.default_rng(1).exponential(size=30)
    narrow = bootstrap_ci(x, "mean", confidence=0.5, seed=0)
    wide = bootstrap_ci(x, "mean", confidence=0.99, seed=0)
    assert wide.low <= narrow.low <= narrow.high <= wide.high
    assert x.min() <= wide.low and wide.high <= x.max()


def test_stratified_bootstrap_resamples_within_tasks():
    # Two tasks on very different scales: resampling runs within each task keeps
    # every bootstrap set half from each task, so the mean stays near the overall
    # mean (about 50) and never collapses onto one task (about 0 or 100).
    rng = np.random.default_rng(2)
    scores = np.column_stack([rng.normal(0.0, 1.0, 10), rng.normal(100.0, 1.0, 10)])
    ci = bootstrap_ci(scores, "mean", confidence=0.999, seed=0)
    assert 45.0 < ci.low <= ci.estimate <= ci.high < 55.0
    assert ci.estimate == pytest.approx(scores.mean())


def test_bootstrap_percentile_interval_covers_the_mean_at_about_the_nominal_rate():
    # 400 samples of size 30 from N(0, 1); 90% percentile intervals of the mean.
    # The percentile interval of a mean under-covers by about 1-2 points at n = 30
    # (Efron & Tibshirani 1993, Table 13.2 reports such small-sample shortfalls);
    # the binomial standard error of a coverage estimate from 400 trials is
    # sqrt(0.9 * 0.1 / 400) = 0.015. Allowed: 0.9 +- (0.02 + 4 * 0.015) = [0.82, 0.98].
    rng = np.random.default_rng(12345)
    hits = 0
    for i in range(400):
        ci = bootstrap_ci(rng.normal(size=30), "mean", confidence=0.9, n_resamples=500, seed=i)
        hits += ci.low <= 0.0 <= ci.high
    assert 0.82 <= hits / 400 <= 0.98


def test_bootstrap_accepts_a_vectorised_callable():
    x = np.arange(10.0)
    ci = bootstrap_ci(x, lambda a: np.median(a, axis=-1), seed=0)
    assert ci.estimate == 4.5


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"scores": [1.0]}, "at least 2"),
        ({"scores": [1.0, 2.0], "statistic": "median"}, "statistic"),
        ({"scores": [1.0, 2.0], "confidence": 1.0}, "confidence"),
        ({"scores": [1.0, 2.0], "n_resamples": 0}, "n_resamples"),
        ({"scores": np.zeros((2, 2, 2))}, "shape"),
        ({"scores": [1.0, float("inf")]}, "finite"),
    ],
)
def test_bootstrap_rejects_bad_input_naming_it(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        bootstrap_ci(**kwargs)


# ---------------------------------------------------------------- one bootstrap, one summary
def test_the_band_at_each_point_is_the_bootstrap_ci_of_that_column():
    # bootstrap_band and bootstrap_ci draw their resamples through one function, so with
    # the same seed the band at point j is exactly the percentile interval of the mean of
    # column j (Efron & Tibshirani 1993, Chapter 13), up to the summation order.
    curves = np.random.default_rng(4).normal(size=(7, 5)).cumsum(axis=1)
    low, high = bootstrap_band(curves, confidence=0.9, n_resamples=300, seed=11)
    for j in range(curves.shape[1]):
        ci = bootstrap_ci(curves[:, j], "mean", confidence=0.9, n_resamples=300, seed=11)
        assert (low[j], high[j]) == pytest.approx((ci.low, ci.high), rel=1e-12, abs=1e-12)
    with pytest.raises(InvalidParameterError, match=r"shape \(runs, points\)"):
        bootstrap_band(np.zeros(4))
    with pytest.raises(InvalidParameterError, match="at least 2"):
        bootstrap_band(np.zeros((1, 4)))


@settings(max_examples=50)
@given(samples)
def test_summarize_scores_is_bootstrap_ci_and_numpy(values):
    summary = summarize_scores(values, label="A", n_resamples=200, seed=5)
    assert isinstance(summary, ScoreSummary) and summary.n_runs == len(values)
    assert summary.scores == tuple(float(v) for v in values)
    assert summary.mean == bootstrap_ci(values, "mean", n_resamples=200, seed=5)
    assert summary.iqm == bootstrap_ci(values, "iqm", n_resamples=200, seed=5)
    assert summary.std == pytest.approx(np.std(values, ddof=1), rel=1e-9, abs=1e-9)


def test_one_score_has_an_estimate_but_no_interval():
    one = summarize_scores([2.5], setting_index=3, setting={"n": 2})
    assert (one.mean.estimate, one.iqm.estimate, one.setting_index, one.setting) == (
        2.5, 2.5, 3, {"n": 2})
    assert math.isnan(one.mean.low) and math.isnan(one.std)
