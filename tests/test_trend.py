"""Trend test of a windowed statistic, with overlap-corrected significance."""

import math

import numpy as np
import pytest
import scipy.stats
from numpy.lib.stride_tricks import sliding_window_view

from ensemble.assess.trend import SECONDS_PER_YEAR, trend_test

DAY_S = 86400.0


def test_exact_exponential_level_gives_its_rate():
    # Cross-check: analytic, v = v0 exp(a t) has ln-slope a; relative change per year
    # exp(a year) - 1.
    a = math.log(2.0) / (2 * SECONDS_PER_YEAR)           # doubles in two years
    t = np.arange(24) * 30 * DAY_S
    res = trend_test(t, 1e-26 * np.exp(a * t), std=1e-27 * np.ones(24), overlap=0.5)
    assert res.slope == pytest.approx(a, rel=1e-10)
    assert res.relative_change_per_year == pytest.approx(math.sqrt(2.0) - 1.0, rel=1e-9)
    assert res.p_value < 1e-12 and res.significant and res.kendall_tau == pytest.approx(1.0)


def test_exact_linear_drift():
    # Cross-check: analytic, v = c + b t has slope b (kind "drift", values may change sign).
    b = 3e-30
    t = np.linspace(0.0, 400 * DAY_S, 12)
    res = trend_test(t, -1e-22 + b * t, kind="drift", name="drift", unit="1/s")
    assert res.slope == pytest.approx(b, rel=1e-9)
    assert res.change_per_year == pytest.approx(b * SECONDS_PER_YEAR, rel=1e-9)
    assert math.isnan(res.relative_change_per_year)
    assert "drift changes by +9.467e-23 1/s per year" in res.description


def test_unweighted_no_overlap_equals_linregress():
    # Cross-check: scipy.stats.linregress (slope, its standard error, two-sided p with n - 2
    # degrees of freedom) on ln(values).
    rng = np.random.default_rng(21)
    t = np.sort(rng.uniform(0, 3e7, 30))
    v = np.exp(0.05 * t / 3e7 + rng.normal(0, 0.1, 30))
    ref = scipy.stats.linregress(t, np.log(v))
    res = trend_test(t, v, alpha=0.05)
    assert res.slope == pytest.approx(ref.slope, rel=1e-10)
    assert res.slope_std == pytest.approx(ref.stderr, rel=1e-10)
    assert res.p_value == pytest.approx(ref.pvalue, rel=1e-8)
    assert res.dof == pytest.approx(28.0, rel=1e-12) and res.n_effective == pytest.approx(30.0)
    ktau, _ = scipy.stats.kendalltau(t, v)
    assert res.kendall_tau == pytest.approx(ktau, rel=1e-12)


def test_weighted_no_overlap_equals_polyfit():
    # Cross-check: numpy.polyfit with weights 1/std and its scaled covariance
    # (RSS_w / (n - 2)), the textbook weighted regression.
    rng = np.random.default_rng(22)
    t = np.arange(40) * 7 * DAY_S
    u = rng.uniform(0.5, 3.0, 40)
    v = 5.0 + 1e-8 * t + rng.normal(0, 1, 40) * u
    coef, cov = np.polyfit(t, v, 1, w=1 / u, cov=True)
    res = trend_test(t, v, std=u, kind="drift")
    assert res.slope == pytest.approx(coef[0], rel=1e-9)
    assert res.slope_std == pytest.approx(math.sqrt(cov[0, 0]), rel=1e-9)


def test_level_uncertainties_are_relative_in_log():
    # Cross-check: d ln v = dv / v, so std/v scaled by a common factor gives the same weights
    # as equal relative uncertainties (the residual scale absorbs the factor).
    rng = np.random.default_rng(23)
    t = np.arange(20) * DAY_S
    v = np.exp(rng.normal(0, 0.2, 20))
    a = trend_test(t, v, std=0.1 * v)
    b = trend_test(t, v)
    assert a.slope == pytest.approx(b.slope, rel=1e-10)
    assert a.slope_std == pytest.approx(b.slope_std, rel=1e-10)


def _white_noise_windows(rng, n_windows, length, overlap):
    step = int(round(length * (1 - overlap)))
    y = rng.normal(size=length + step * (n_windows - 1))
    values = sliding_window_view(y, length)[::step].var(axis=1)
    return (np.arange(n_windows) * step + length / 2) * 3600.0, values


@pytest.mark.parametrize("overlap", [0.0, 0.5, 0.75])
def test_false_alarm_rate_of_trend_free_series(overlap):
    # Cross-check: on 200 seeded trend-free series the rejection fraction at alpha = 0.05 lies
    # in the binomial 99 % interval [3, 19] / 200 (scipy.stats.binom.interval(0.99, 200,
    # 0.05)).  Values are sample variances of white noise in 60 windows of 100 samples
    # overlapping by the given fraction; the Mann-Kendall cross-check must hold the same rate.
    lo, hi = scipy.stats.binom.interval(0.99, 200, 0.05)
    rng = np.random.default_rng(int(100 * overlap) + 1)
    results = [trend_test(*_white_noise_windows(rng, 60, 100, overlap), overlap=overlap,
                          alpha=0.05) for _ in range(200)]
    rejected = sum(r.significant for r in results)
    kendall = sum(r.kendall_p_value < 0.05 for r in results)
    assert lo <= rejected <= hi, rejected
    assert lo <= kendall <= hi, kendall
    assert (results[0].n_effective == pytest.approx(60.0)) == (overlap == 0.0)


def test_ignoring_overlap_would_raise_false_alarms():
    # The reason for the correction: the same overlapping series tested as if independent
    # rejects far more often than alpha (Regression: seeded run, 0.75 overlap).
    rng = np.random.default_rng(76)
    series = [_white_noise_windows(rng, 60, 100, 0.75) for _ in range(200)]
    naive = sum(trend_test(t, v, overlap=0.0, alpha=0.05).significant for t, v in series)
    right = sum(trend_test(t, v, overlap=0.75, alpha=0.05).significant for t, v in series)
    assert naive > 2 * max(right, 10)


def test_doubling_over_the_span_is_detected():
    # A level doubling over 400 days with 15 % scatter in 40 half-overlapping windows.
    rng = np.random.default_rng(31)
    span = 400 * DAY_S
    t = np.linspace(0.0, span, 40)
    v = 1e-26 * 2.0 ** (t / span) * np.exp(rng.normal(0, 0.15, 40))
    res = trend_test(t, v, overlap=0.5, name="white-FM level q1")
    assert res.significant and res.alpha == 0.01 and res.p_value < 1e-4
    # Cross-check: analytic rate 2^(year/span) - 1 = 0.883 per year, within 3 std.
    expected = 2.0 ** (SECONDS_PER_YEAR / span) - 1.0
    rate = math.log1p(expected) / SECONDS_PER_YEAR
    assert abs(res.slope - rate) < 3 * res.slope_std
    up = trend_test(t, v, overlap=0.5, alternative="increasing")
    down = trend_test(t, v, overlap=0.5, alternative="decreasing")
    assert up.p_value == pytest.approx(res.p_value / 2, rel=1e-9)
    assert down.p_value > 0.999 and not down.significant
    assert res.description.startswith("white-FM level q1 rises by ")
    assert "% per year" in res.description and "significant at alpha = 0.01" in res.description
    assert f"{res.n_effective:.1f} effective of 40 windows" in res.description


def test_bad_input_messages():
    t = np.arange(6.0)
    with pytest.raises(ValueError, match=r"values\[2\] = -1.0; a level must be > 0"):
        trend_test(t, [1, 1, -1, 1, 1, 1])
    with pytest.raises(ValueError, match="strictly increasing"):
        trend_test([0, 1, 1, 2, 3], np.ones(5))
    with pytest.raises(ValueError, match="at least 4 windows"):
        trend_test([0, 1, 2], np.ones(3))
    with pytest.raises(ValueError, match=r"overlap must be a fraction in \[0, 1\)"):
        trend_test(t, np.ones(6), overlap=1.0)
    with pytest.raises(ValueError, match=r"std\[0\]"):
        trend_test(t, np.ones(6), std=np.zeros(6))
