"""Holdover time-error prediction and time to a budget (derived here; docs/fitting.md)."""

import numpy as np
import pytest
import scipy.integrate
import scipy.stats

from ensemble.assess.holdover import (DEFAULT_HORIZON_S, K_95, holdover_time,
                                      predict_time_error)
from ensemble.model import ClockNoise, q1_from_white_fm, q2_from_random_walk_fm

DAY_S = 86400.0
PS, NS = 1e-12, 1e-9
ZERO2, ZERO3 = np.zeros((2, 2)), np.zeros((3, 3))


def test_coverage_factor_default():
    # Cross-check: scipy.stats.norm.ppf(0.975), two-sided 95 % normal coverage factor.
    assert K_95 == pytest.approx(scipy.stats.norm.ppf(0.975), rel=1e-15)


@pytest.mark.parametrize("q3", [0.0, 4e-50])
def test_variance_growth_with_known_start(q3):
    # Cross-check: Zucca & Tavella 2005 (IEEE Trans. UFFC 52(2)) analytic phase-variance growth
    # of the clock model, Var = q1 t + q2 t^3/3 (+ q3 t^5/20), evaluated here independently as
    # the integral of [Phi(s) diag(q) Phi(s)^T]_11 = q1 + q2 s^2 + q3 s^4/4 by scipy quad.
    noise = ClockNoise(q1_s=1e-26, q2_per_s=3.5e-36, q3_per_s3=q3)
    t = np.array([1.0, 3600.0, DAY_S, 30 * DAY_S])
    pred = predict_time_error([0, 0, 0], ZERO3, noise, t, k=1.0)
    integrand = lambda s: noise.q1_s + noise.q2_per_s * s * s + noise.q3_per_s3 * s ** 4 / 4
    expected = [scipy.integrate.quad(integrand, 0.0, tt, epsrel=1e-13)[0] for tt in t]
    np.testing.assert_allclose(pred.std_s ** 2, expected, rtol=1e-10)
    np.testing.assert_allclose(pred.std_s ** 2, noise.q1_s * t + noise.q2_per_s * t ** 3 / 3
                               + q3 * t ** 5 / 20, rtol=1e-12)
    assert pred.std_s[0] > 0 and np.all(pred.time_error_s == 0)


def test_initial_covariance_terms_written_out():
    # Cross-check: the expansion of [Phi P Phi^T]_11, our own derivation (docs/fitting.md),
    # Pxx + 2t Pxy + t^2 (Pyy + Pxd) + t^3 Pyd + t^4 Pdd / 4.
    rng = np.random.default_rng(4)
    a = rng.normal(size=(3, 3)) * np.array([1e-9, 1e-14, 1e-20])
    p = a @ a.T
    t = np.array([0.0, 10.0, 1e4, 1e6])
    pred = predict_time_error([1e-9, 2e-13, 1e-19], p, ClockNoise(), t, k=0.0)
    expected = (p[0, 0] + 2 * t * p[0, 1] + t ** 2 * (p[1, 1] + p[0, 2]) + t ** 3 * p[1, 2]
                + t ** 4 * p[2, 2] / 4)
    np.testing.assert_allclose(pred.std_s ** 2, expected, rtol=1e-10)
    np.testing.assert_allclose(pred.time_error_s, 1e-9 + 2e-13 * t + 0.5e-19 * t * t, rtol=1e-14)
    np.testing.assert_array_equal(pred.bound_s, np.abs(pred.time_error_s))   # k = 0


def test_variance_against_euler_simulation_of_the_sde():
    # Cross-check: seeded Euler-Maruyama simulation of dx = y dt + sqrt(q1) dW1,
    # dy = d dt + sqrt(q2) dW2, dd = sqrt(q3) dW3 (Zucca & Tavella 2005), 400 steps, 20 000 paths,
    # started from N(x0, P).  The sample variance of x(t) has a relative sampling error of
    # 1 %; 5 % allows that plus the O(dt) Euler bias.
    rng = np.random.default_rng(8)
    noise = ClockNoise(q1_s=2e-22, q2_per_s=1e-32, q3_per_s3=1e-43)
    p = np.array([[4e-18, -1e-22, 0.0], [-1e-22, 1e-26, 0.0], [0.0, 0.0, 1e-36]])
    x0 = np.array([0.0, 1e-13, 0.0])
    t_end, steps, paths = 1e5, 400, 20000
    dt = t_end / steps
    state = x0 + rng.multivariate_normal(np.zeros(3), p, size=paths, method="eigh")
    x, y, d = state.T.copy()
    for _ in range(steps):
        w = rng.standard_normal((3, paths)) * np.sqrt(
            np.array([noise.q1_s, noise.q2_per_s, noise.q3_per_s3])[:, None] * dt)
        x, y, d = x + y * dt + w[0], y + d * dt + w[1], d + w[2]
    pred = predict_time_error(x0, p, noise, t_end, k=1.0)
    assert np.var(x) == pytest.approx(pred.std_s[0] ** 2, rel=0.05)
    assert np.mean(x) == pytest.approx(pred.time_error_s[0], abs=4 * pred.std_s[0] / np.sqrt(paths))


# --- worked holdover table (our derivation) -----------------------------------------------------

HOLDOVER_T = np.array([0.1, 1.0, 10.0, 30.0]) * DAY_S
# Cross-check: worked values of our own derivation (table in docs/fitting.md), state known at
# t = 0, k = 1 (1 sigma), RW FM level b at tau_1 converted with q2 = 3 b^2 / tau_1 (from
# AVAR = q2 tau / 3, derived here).  Printed to two significant digits (one for 9 ps), so the
# tolerance is half a unit of the last digit.
MASER = ClockNoise(q1_s=q1_from_white_fm(1e-13), q2_per_s=q2_from_random_walk_fm(1e-15, 10 * DAY_S))
CESIUM = ClockNoise(q1_s=q1_from_white_fm(8.5e-12),
                    q2_per_s=q2_from_random_walk_fm(1e-14, 30 * DAY_S))


def test_holdover_table_maser_column():
    pred = predict_time_error([0, 0], ZERO2, MASER, HOLDOVER_T, k=1.0)
    printed = np.array([9 * PS, 40 * PS, 0.87 * NS, 4.5 * NS])
    half_unit = np.array([0.5 * PS, 0.5 * PS, 0.005 * NS, 0.05 * NS])
    assert np.all(np.abs(pred.std_s - printed) <= half_unit), pred.std_s


def test_holdover_table_extra_from_initial_frequency_error():
    # The printed extra is the deterministic 1e-15 t (0.1 d: 8.64 ps, 30 d: 2.59 ns), i.e. a
    # known initial offset in the state, not an uncertainty added in quadrature (that reading
    # gives +3.4 ps, +55 ps, +0.36 ns, +0.69 ns and does not reproduce the table).
    base = predict_time_error([0, 0], ZERO2, MASER, HOLDOVER_T, k=1.0)
    off = predict_time_error([0, 1e-15], ZERO2, MASER, HOLDOVER_T, k=1.0)
    extra = off.bound_s - base.bound_s
    printed = np.array([9 * PS, 86 * PS, 0.86 * NS, 2.6 * NS])
    half_unit = np.array([0.5 * PS, 0.5 * PS, 0.005 * NS, 0.05 * NS])
    assert np.all(np.abs(extra - printed) <= half_unit), extra
    np.testing.assert_allclose(off.std_s, base.std_s, rtol=1e-15)


def test_holdover_table_cesium_column():
    pred = predict_time_error([0, 0], ZERO2, CESIUM, HOLDOVER_T, k=1.0)
    printed = np.array([0.79 * NS, 2.5 * NS, 9.3 * NS, 29 * NS])
    half_unit = np.array([0.005 * NS, 0.05 * NS, 0.05 * NS, 0.5 * NS])
    assert np.all(np.abs(pred.std_s - printed) <= half_unit), pred.std_s


def test_two_and_three_state_agree_without_drift():
    p3 = np.diag([1e-18, 1e-28, 0.0])
    a = predict_time_error([1e-9, 1e-14, 0.0], p3, MASER, HOLDOVER_T)
    b = predict_time_error([1e-9, 1e-14], p3[:2, :2], MASER, HOLDOVER_T)
    np.testing.assert_allclose(a.bound_s, b.bound_s, rtol=1e-14)


def test_optional_terms_add_as_documented():
    # Cross-check: rule x_rms ~ t sigma_y (recalled from memory): flicker floor adds
    # (sigma_floor t)^2; white PM adds r.
    noise = ClockNoise(q1_s=1e-24, r_s2=1e-20)
    t = np.array([100.0, 1e4])
    base = predict_time_error([0, 0], ZERO2, noise, t).std_s ** 2
    more = predict_time_error([0, 0], ZERO2, noise, t, flicker_adev=3e-15,
                              include_output_noise=True).std_s ** 2
    np.testing.assert_allclose(more - base, (3e-15 * t) ** 2 + 1e-20, rtol=1e-9)


# --- time to a budget ---------------------------------------------------------------------------

def test_holdover_time_analytic_roots():
    # Cross-check: closed-form roots of |TE| + k sigma = budget.
    k = 2.0
    white = ClockNoise(q1_s=1e-20)                        # k sqrt(q1 t) = b -> t = (b/k)^2/q1
    t = holdover_time([0, 0], ZERO2, white, [100 * NS, 1e-6], k=k)
    np.testing.assert_allclose(t, (np.array([100 * NS, 1e-6]) / k) ** 2 / 1e-20, rtol=1e-9)
    rw = ClockNoise(q2_per_s=1e-32)                       # k sqrt(q2 t^3/3) = b
    t = holdover_time([0, 0], ZERO2, rw, 100 * NS, k=k)
    assert t[0] == pytest.approx((3 * (100 * NS / k) ** 2 / 1e-32) ** (1 / 3), rel=1e-9)
    # Deterministic frequency offset only: |y0| t = b.
    t = holdover_time([0, -2e-13], ZERO2, ClockNoise(), [100 * NS, 1e-6])
    np.testing.assert_allclose(t, np.array([100 * NS, 1e-6]) / 2e-13, rtol=1e-9)


def test_holdover_time_never_and_immediately():
    assert holdover_time([0, 0], ZERO2, ClockNoise(), 1 * NS).tolist() == [np.inf]
    # Within budget at the horizon -> inf; just beyond -> finite.
    noise = ClockNoise(q1_s=1e-24)
    at_horizon = K_95 * np.sqrt(1e-24 * DEFAULT_HORIZON_S)
    assert holdover_time([0, 0], ZERO2, noise, 1.001 * at_horizon)[0] == np.inf
    assert holdover_time([0, 0], ZERO2, noise, 0.999 * at_horizon)[0] < DEFAULT_HORIZON_S
    assert holdover_time([50 * NS, 0], ZERO2, noise, 40 * NS)[0] == 0.0


def test_holdover_time_first_crossing_of_non_monotone_bound():
    # Cross-check: dense brute-force scan.  A clock 50 ns ahead and running slow by 1e-12
    # first approaches zero time error, then runs away: with a 60 ns budget the first
    # crossing is after the zero crossing, near t = 1.1e5 s.
    state = [50 * NS, -1e-12]
    noise = ClockNoise(q1_s=1e-26)
    got = holdover_time(state, ZERO2, noise, 60 * NS, k=2.0)[0]
    grid = np.linspace(0.0, 2e5, 2_000_001)
    bound = predict_time_error(state, ZERO2, noise, grid, k=2.0).bound_s
    first = grid[np.argmax(bound > 60 * NS)]
    assert got == pytest.approx(first, abs=0.1)
    pred = predict_time_error(state, ZERO2, noise, got, k=2.0)
    assert pred.bound_s[0] == pytest.approx(60 * NS, rel=1e-9)
    # With a negative Pxy the uncertainty shrinks first; the first crossing is still found.
    p = np.array([[1e-16, -9.9e-22], [-9.9e-22, 1e-26]])
    t = holdover_time([0, 0], p, ClockNoise(q1_s=1e-26), [20 * NS, 30 * NS], k=1.0)
    grid = np.linspace(0.0, 1e7, 1_000_001)
    bound = predict_time_error([0, 0], p, ClockNoise(q1_s=1e-26), grid, k=1.0).bound_s
    assert bound[0] < 20 * NS and bound.min() < 0.5 * bound[0]
    np.testing.assert_allclose(t, [grid[np.argmax(bound > b)] for b in (20 * NS, 30 * NS)],
                               atol=10.0)


def test_bad_input_messages():
    with pytest.raises(ValueError, match=r"shape \(2, 2\)"):
        predict_time_error([0, 0], ZERO3, MASER, 1.0)
    with pytest.raises(ValueError, match="symmetric"):
        predict_time_error([0, 0], np.array([[1.0, 2.0], [0.0, 1.0]]), MASER, 1.0)
    with pytest.raises(ValueError, match=">= 0"):
        predict_time_error([0, 0], ZERO2, MASER, [-1.0])
    with pytest.raises(ValueError, match=r"\(x, y\) or \(x, y, d\)"):
        predict_time_error([0], np.zeros((1, 1)), MASER, 1.0)
    with pytest.raises(ValueError, match="budgets_s"):
        holdover_time([0, 0], ZERO2, MASER, [0.0])
