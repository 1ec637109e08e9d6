"""Steering gains: LQG via the discrete Riccati equation, critically damped pole placement."""

import math

import numpy as np
import pytest
import scipy.linalg

from ensemble.steering.gains import (closed_loop_matrix, closed_loop_poles, critical_gains,
                                     drift_feedforward, lqg_gains, lqg_riccati, policy_gains)

DAY = 86400.0


def _iterated_riccati(interval_d, rho, w_y, n_iter=20000):
    """Value iteration of the Riccati difference equation from S = W (textbook LQR recursion)."""
    phi = np.array([[1.0, interval_d], [0.0, 1.0]])
    b = np.array([[interval_d], [1.0]])
    w = np.diag([1.0, w_y])
    s = w.copy()
    for _ in range(n_iter):
        g = np.linalg.solve(rho + b.T @ s @ b, b.T @ s @ phi)
        s_new = phi.T @ s @ phi - phi.T @ s @ b @ g + w
        if np.max(np.abs(s_new - s)) < 1e-13 * np.max(np.abs(s)):
            s = s_new
            break
        s = s_new
    g = np.linalg.solve(rho + b.T @ s @ b, b.T @ s @ phi)[0]
    return s, g


# Cross-check: our own earlier computation (w_y = 0; gains computed independently with
# scipy.linalg.solve_discrete_are in ns and days, no published source), printed to 2-3 digits.
LQG_WY0_TABLE = [(1.0, 0.48, 0.77, 0.48), (10.0, 0.211, 0.553, 0.67), (100.0, 0.080, 0.36, 0.80),
            (1000.0, 0.028, 0.22, 0.88)]
# Cross-check: our own earlier computation, LQG with w_y = 1 (same method, no published
# source), printed to 4 digits.
LQG_WY1_TABLE = [(1.0, 0.4221, 0.8218), (10.0, 0.2054, 0.5781), (100.0, 0.0795, 0.3687),
          (1000.0, 0.0279, 0.2241)]


def _half_unit(printed: float) -> float:
    """Half a unit in the last printed digit of a table value (the table's rounding)."""
    text = f"{printed}"
    decimals = len(text.split(".")[1]) if "." in text else 0
    return 0.5 * 10.0 ** (-decimals) * (1 + 1e-9)


@pytest.mark.parametrize("rho, g_x, g_y, pole", LQG_WY0_TABLE)
def test_lqg_gain_matches_our_table_wy0(rho, g_x, g_y, pole):
    gx_si, gy = lqg_gains(DAY, rho, 0.0)
    assert abs(gx_si * DAY - g_x) <= _half_unit(g_x)
    assert abs(gy - g_y) <= _half_unit(g_y)
    # the table's |p| column: both closed-loop poles have this modulus (complex pair)
    poles = closed_loop_poles(DAY, gx_si, gy)
    assert np.all(np.abs(np.abs(poles) - pole) <= _half_unit(pole))
    assert abs(poles[0].imag) > 0  # slightly underdamped pair, as that computation found


@pytest.mark.parametrize("rho, g_x, g_y", LQG_WY1_TABLE)
def test_lqg_gain_matches_our_table_wy1(rho, g_x, g_y):
    gx_si, gy = lqg_gains(DAY, rho, 1.0)
    assert abs(gx_si * DAY - g_x) <= _half_unit(g_x)
    assert abs(gy - g_y) <= _half_unit(g_y)


@pytest.mark.parametrize("interval_d", [1.0, 1.0 / 24.0, 7.0])
@pytest.mark.parametrize("rho, w_y", [(1.0, 0.0), (30.0, 0.0), (1000.0, 1.0), (5.0, 20.0)])
def test_lqg_equals_riccati_solution_and_iteration(interval_d, rho, w_y):
    # Cross-check: the gain is the scipy.linalg.solve_discrete_are solution of the same model
    # (residual of the DARE) and equals the limit of the Riccati difference equation iterated
    # from S = W (an independent route; both to ~1e-9 relative).
    s, gain = lqg_riccati(interval_d, rho, w_y)
    phi = np.array([[1.0, interval_d], [0.0, 1.0]])
    b = np.array([[interval_d], [1.0]])
    w = np.diag([1.0, w_y])
    residual = (phi.T @ s @ phi - phi.T @ s @ b @ np.linalg.solve(rho + b.T @ s @ b, b.T @ s @ phi)
                + w - s)
    assert np.max(np.abs(residual)) <= 1e-9 * np.max(np.abs(s))
    ref = scipy.linalg.solve_discrete_are(phi, b, w, np.array([[rho]]))
    np.testing.assert_allclose(s, ref, rtol=1e-10, atol=1e-12 * np.abs(ref).max())
    s_it, g_it = _iterated_riccati(interval_d, rho, w_y)
    np.testing.assert_allclose(gain, g_it, rtol=1e-8)
    # the regulator is stabilising
    gx_si, gy = lqg_gains(interval_d * DAY, rho, w_y)
    assert np.max(np.abs(closed_loop_poles(interval_d * DAY, gx_si, gy))) < 1.0
    # SI conversion: g_x [1/s] = g_x' [1/d] / 86400, g_y unchanged
    assert gx_si == pytest.approx(gain[0] / DAY, rel=1e-15)
    assert gy == pytest.approx(gain[1], rel=1e-15)


# Cross-check: critically damped gains g_y = 1 - p^2, g_x = (1 - p)^2 / tau, p = exp(-tau/T),
# evaluated by us beforehand (derived here, docs/steering.md), printed to 4-6 digits.
CRITICAL_TABLE = [(2.0, 0.1548, 0.6321), (5.0, 0.032859, 0.329680), (10.0, 0.0091, 0.1813),
               (30.0, 0.0011, 0.0645)]


@pytest.mark.parametrize("T_d, g_x, g_y", CRITICAL_TABLE)
def test_critical_gains_match_our_table(T_d, g_x, g_y):
    # Cross-check: our own values (table above, derived here); tolerance half a unit of the
    # last printed digit.
    gx_si, gy = critical_gains(DAY, T_d * DAY)
    assert abs(gx_si * DAY - g_x) <= _half_unit(g_x)
    assert abs(gy - g_y) <= _half_unit(g_y)


@pytest.mark.parametrize("interval_s, T_s", [(DAY, 2 * DAY), (DAY, 30 * DAY), (3600.0, 5 * DAY),
                                             (7 * DAY, 50 * DAY)])
def test_critical_double_pole(interval_s, T_s):
    # Cross-check (analytic, derived here): the closed loop lambda^2 - (2 - tau g_x - g_y) lambda
    # + (1 - g_y) equals (lambda - p)^2 with p = exp(-tau/T): trace 2p, determinant p^2.
    # (Eigenvalues of a double pole are ill-conditioned, so trace and determinant are compared.)
    g_x, g_y = critical_gains(interval_s, T_s)
    p = math.exp(-interval_s / T_s)
    a = closed_loop_matrix(interval_s, g_x, g_y)
    assert np.trace(a) == pytest.approx(2 * p, rel=1e-12)
    assert np.linalg.det(a) == pytest.approx(p * p, rel=1e-12)
    assert np.trace(a) == pytest.approx(2 - interval_s * g_x - g_y, rel=1e-12)
    np.testing.assert_allclose(np.abs(closed_loop_poles(interval_s, g_x, g_y)), p, rtol=1e-6)


@pytest.mark.parametrize("policy", ["critical", "lqg"])
def test_drift_feedforward_steady_state(policy):
    # Cross-check (analytic, our derivation in gains.py): with g_d = tau (1 - g_y/2) a constant
    # drift leaves x -> 0 at the command epochs, y -> tau d / 2 and u -> -tau d; without it x
    # settles at a nonzero offset.  Plant of docs/steering.md with the drift term, exact state.
    tau = DAY
    d = 1e-16 / DAY
    g_x, g_y, g_d = policy_gains(policy, tau, time_constant_s=5 * DAY, effort_weight_d2=10.0)
    assert g_d == pytest.approx(drift_feedforward(tau, g_y))
    for gd, expect_zero in ((g_d, True), (0.0, False)):
        x, y = 3e-9, 2e-15
        for _ in range(400):
            u = -(g_x * x + g_y * y + gd * d)
            x, y = x + tau * (y + u) + 0.5 * tau * tau * d, y + u + tau * d
        if expect_zero:
            assert abs(x) < 1e-18
            assert y == pytest.approx(0.5 * tau * d, rel=1e-9)
            assert u == pytest.approx(-tau * d, rel=1e-9)
        else:
            assert abs(x) > 1e-12


def test_bad_arguments():
    with pytest.raises(ValueError):
        critical_gains(0.0, DAY)
    with pytest.raises(ValueError):
        lqg_riccati(1.0, 0.0)
    with pytest.raises(ValueError):
        policy_gains("pid", DAY)
