"""TIE, TIE rms and MTIE (ITU-T G.810 Appendix II definitions, recalled from memory)."""

import numpy as np
import pytest
import scipy.stats
from numpy.lib.stride_tricks import sliding_window_view

from ensemble.stability.timeerror import mtie, octave_window_lengths, tie, tie_rms

NS = 1e-9


def brute_mtie(x, n):
    """MTIE by its definition: max over windows of n + 1 samples without NaN of (max - min)."""
    w = sliding_window_view(x, n + 1)
    ok = np.isfinite(w).all(axis=1)
    if not ok.any():
        return np.nan, 0
    w = w[ok]
    return float(np.max(w.max(axis=1) - w.min(axis=1))), int(ok.sum())


def test_constant_frequency_offset():
    # Cross-check: analytic, x = y0 t gives MTIE = |y0| tau and TIE = y0 tau (derived here).
    y0, tau0 = -3.2e-12, 10.0
    x = y0 * tau0 * np.arange(5000)
    res = mtie(x, tau0, [1, 7, 64, 4999])
    np.testing.assert_allclose(res.value_s, abs(y0) * res.tau_s, rtol=1e-9)
    np.testing.assert_array_equal(res.n_used, 5000 - res.n)
    np.testing.assert_allclose(tie(x, 7), y0 * 70.0, rtol=1e-9)
    rms = tie_rms(x, tau0, [1, 100])
    np.testing.assert_allclose(rms.value_s, abs(y0) * rms.tau_s, rtol=1e-9)
    flat = tie_rms(x, tau0, [1, 100], remove_frequency=True)
    assert flat.frequency_removed == pytest.approx(y0, rel=1e-9)
    assert np.all(flat.value_s < 1e-9 * abs(y0) * flat.tau_s)


@pytest.mark.parametrize("n", [1, 100, 1000])
def test_quadratic_phase(n):
    # Cross-check: analytic, x = D t^2/2 over a record of length T gives MTIE = D tau (T - tau/2)
    # (our own derivation, checked numerically at n = 1, 100, 1000 on 10 001 points).
    d, tau0 = 2e-21, 1.0
    t = np.arange(10001) * tau0
    res = mtie(0.5 * d * t * t, tau0, n)
    tau, total = n * tau0, t[-1]
    assert res.value_s[0] == pytest.approx(d * tau * (total - tau / 2), rel=1e-9)


@pytest.mark.parametrize("n", [2, 20, 50, 100, 200, 300, 1000, 3999])
def test_sinusoid(n):
    # Cross-check: analytic, x = A sin(2 pi f t) gives MTIE = 2A sin(pi f tau) for
    # tau <= 1/(2f) and 2A beyond (derived here).  Period 400 samples, even n: the optimal
    # window (centred on a zero crossing) and the extremes fall on samples.
    a, period = 5 * NS, 400.0
    t = np.arange(4000.0)
    res = mtie(a * np.sin(2 * np.pi * t / period), 1.0, n)
    tau = float(n)
    expected = 2 * a * np.sin(np.pi * tau / period) if tau <= period / 2 else 2 * a
    assert res.value_s[0] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("step", [7 * NS, -2 * NS])
def test_phase_step(step):
    # Cross-check: analytic, one phase step A gives |A| for every window containing it
    # (derived here); a window not containing it has range 0.
    x = np.zeros(101)
    x[60:] = step
    res = mtie(x, 1.0, octave_window_lengths(x.size))
    np.testing.assert_allclose(res.value_s, abs(step), rtol=1e-12)
    # A step at the very last sample is seen only by the last window of each length.
    x_end = np.zeros(101)
    x_end[-1] = step
    np.testing.assert_allclose(mtie(x_end, 1.0, [1, 50, 100]).value_s, abs(step), rtol=1e-12)
    # Windows holding a NaN are skipped (documented rule): with samples 59 and 60 missing,
    # every window that sees both sides of the step holds the gap, so the step is not seen.
    # Windows [k, k + n] touching 59 or 60 are the n + 2 with 59 - n <= k <= 60.
    x_gap = x.copy()
    x_gap[59:61] = np.nan
    res_gap = mtie(x_gap, 1.0, [1, 2, 3, 40])
    np.testing.assert_array_equal(res_gap.value_s, [0.0, 0.0, 0.0, 0.0])
    np.testing.assert_array_equal(res_gap.n_used, [101 - n - (n + 2) for n in (1, 2, 3, 40)])


@pytest.mark.parametrize("n_samples", [2, 3, 8, 31, 257])
def test_mtie_equals_brute_force_on_random_data(n_samples):
    # Cross-check: brute-force definition (ITU-T G.810, brute_mtie above) on seeded random data
    # with gaps.
    rng = np.random.default_rng(n_samples)
    x = np.cumsum(rng.normal(size=n_samples)) * NS
    if n_samples > 5:
        x[rng.choice(n_samples, size=n_samples // 6, replace=False)] = np.nan
    ns = np.arange(1, n_samples)
    res = mtie(x, 2.5, ns)
    for k, n in enumerate(ns):
        value, used = brute_mtie(x, n)
        assert res.n_used[k] == used
        if used:
            assert res.value_s[k] == value
        else:
            assert np.isnan(res.value_s[k])
    np.testing.assert_allclose(res.tau_s, 2.5 * ns)


def test_mtie_long_record_against_brute_force():
    # Cross-check: brute-force definition on 3000 seeded points, several window lengths.
    rng = np.random.default_rng(3)
    x = np.cumsum(rng.normal(size=3000)) * NS
    ns = [1, 2, 17, 128, 500, 2999]
    res = mtie(x, 1.0, ns)
    assert res.value_s.tolist() == [brute_mtie(x, n)[0] for n in ns]


def test_tie_and_tie_rms_with_gaps():
    # Cross-check: definitions written out (G.810 TIE; rms over available differences).
    rng = np.random.default_rng(11)
    x = rng.normal(size=200) * NS
    x[[10, 11, 150]] = np.nan
    np.testing.assert_array_equal(tie(x, 3), x[3:] - x[:-3])
    res = tie_rms(x, 60.0, [1, 3, 64])
    for k, n in enumerate([1, 3, 64]):
        d = x[n:] - x[:-n]
        d = d[np.isfinite(d)]
        assert res.n_used[k] == d.size
        assert res.value_s[k] == pytest.approx(np.sqrt(np.mean(d * d)), rel=1e-12)
    assert res.frequency_removed == 0.0


def test_tie_rms_frequency_removal_matches_linear_regression():
    # Cross-check: scipy.stats.linregress slope and residuals as the frequency-removed phase.
    rng = np.random.default_rng(12)
    tau0 = 30.0
    t = np.arange(500) * tau0
    x = 4e-12 * t + 1e-9 + rng.normal(size=t.size) * NS
    fit = scipy.stats.linregress(t, x)
    resid = x - (fit.intercept + fit.slope * t)
    res = tie_rms(x, tau0, [1, 10], remove_frequency=True)
    assert res.frequency_removed == pytest.approx(fit.slope, rel=1e-9)
    for k, n in enumerate([1, 10]):
        d = resid[n:] - resid[:-n]
        assert res.value_s[k] == pytest.approx(np.sqrt(np.mean(d * d)), rel=1e-9)


def test_octave_window_lengths():
    assert octave_window_lengths(2).tolist() == [1]
    assert octave_window_lengths(9).tolist() == [1, 2, 4, 8]
    assert octave_window_lengths(10).tolist() == [1, 2, 4, 8]
    assert mtie(np.arange(10.0), 1.0).n.tolist() == [1, 2, 4, 8]


def test_bad_input_messages():
    with pytest.raises(ValueError, match="one-dimensional"):
        mtie(np.zeros((3, 3)), 1.0)
    with pytest.raises(ValueError, match="infinite; use NaN"):
        mtie(np.array([0.0, np.inf, 1.0]), 1.0)
    with pytest.raises(ValueError, match=r"integer in 1\.\.4"):
        mtie(np.zeros(5), 1.0, 5)
    with pytest.raises(ValueError, match=r"integer in 1\.\.4"):
        tie(np.zeros(5), 1.5)
    with pytest.raises(ValueError, match="tau0_s must be finite and > 0"):
        tie_rms(np.zeros(5), 0.0)
    with pytest.raises(ValueError, match="at least 2 phase samples"):
        tie_rms(np.array([np.nan, np.nan, 1.0]), 1.0, remove_frequency=True)
