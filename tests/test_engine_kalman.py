"""The ensemble Kalman filter: agreement with filterpy, Riccati steady state, the frame."""

import numpy as np
import pytest
import scipy.linalg

from ensemble.engine.kalman import SCALE, EnsembleFilter, reference_filterpy_step
from ensemble.model import ClockNoise, process_noise, transition_matrix

DAY = 86400.0


def _dense(filt, dt_s):
    """Dense Phi and Q of the whole filter in scaled units (for the filterpy comparison)."""
    n = filt.n_clocks
    t = dt_s / DAY
    phi1 = transition_matrix(t)
    phi = np.kron(np.eye(n), phi1)
    q = np.zeros((3 * n, 3 * n))
    for i in range(n):
        if filt.active[i]:
            q1, q2, q3 = filt.q[i]
            q[3 * i:3 * i + 3, 3 * i:3 * i + 3] = process_noise(ClockNoise(q1, q2, q3), t)
    return phi, q


def _random_filter(rng, n=4):
    f = EnsembleFilter(n)
    for i in range(n):
        f.set_noise(i, 10 ** rng.uniform(-26, -23), 10 ** rng.uniform(-36, -33),
                    10 ** rng.uniform(-50, -47), (10 ** rng.uniform(-12, -11)) ** 2)
        a = rng.normal(size=(3, 3))
        g = np.array([1.0, 1e-1, 1e-2]) / SCALE
        cov = (a @ a.T + np.eye(3)) * np.outer(g, g)
        f.activate(i, rng.normal(size=3) / SCALE, cov)
    return f


def test_update_equals_filterpy_joseph(rng):
    # Cross-check: filterpy 2.0.0 KalmanFilter predict + update (dense Joseph form) on the same
    # model; our structured Joseph update must agree to round-off.
    f = _random_filter(rng)
    for step in range(5):
        dt = 3600.0 * (1 + step % 3)
        phi, q = _dense(f, dt)
        ref = step % 4
        clocks = np.array([i for i in range(4) if i != ref])
        z_s = rng.normal(size=3) * 1e-9
        h = np.zeros((3, 12))
        for row, i in enumerate(clocks):
            h[row, 3 * i] = 1.0
            h[row, 3 * ref] = -1.0
        r = np.diag(f.r[clocks])
        x_ref, p_ref = reference_filterpy_step(f.x, f.P, phi, q, z_s * 1e9, h, r)
        f.predict(dt)
        f.update(z_s, clocks, ref)
        np.testing.assert_allclose(f.x, x_ref, rtol=1e-9, atol=1e-12 * np.abs(x_ref).max())
        np.testing.assert_allclose(f.P, p_ref, rtol=1e-8, atol=1e-10 * np.abs(p_ref).max())


def test_pair_steady_state_equals_dare():
    # Cross-check: scipy.linalg.solve_discrete_are for the difference of a clock pair
    # (the filter as the dual of scipy's control form, derived here: a-priori
    # P = solve_discrete_are(Phi^T, H^T, Q, R)).
    tau = 3600.0
    qa, qb = ClockNoise(1e-24, 1e-34), ClockNoise(4e-25, 3e-35)
    r_a = (5e-12) ** 2
    f = EnsembleFilter(2)
    f.set_noise(0, qa.q1_s, qa.q2_per_s, 0.0, r_a)
    f.set_noise(1, qb.q1_s, qb.q2_per_s, 0.0, 0.0)
    cov = np.diag([1e-18, 1e-26, 0.0])
    f.activate(0, np.zeros(3), cov)
    f.activate(1, np.zeros(3), cov)
    for _ in range(3000):
        f.predict(tau)
        prior = f.P.copy()
        res = f.update(np.array([0.0]), np.array([0]), 1)
        f.project(np.array([0.5, 0.5]))
    t = tau / DAY
    phi = transition_matrix(t, 2)
    s2 = SCALE[:2]
    qd = (process_noise(qa, tau, 2) + process_noise(qb, tau, 2)) * np.outer(s2, s2)
    hm = np.array([[1.0, 0.0]])
    p_dare = scipy.linalg.solve_discrete_are(phi.T, hm.T, qd, np.array([[r_a * 1e18]]))
    k_dare = p_dare @ hm.T / (hm @ p_dare @ hm.T + r_a * 1e18)
    d = np.zeros((2, 6))
    d[0, 0], d[0, 3], d[1, 1], d[1, 4] = 1, -1, 1, -1
    np.testing.assert_allclose(d @ prior @ d.T, p_dare, rtol=1e-9)
    np.testing.assert_allclose((d @ res.gain).ravel(), k_dare.ravel(), rtol=1e-9)


@pytest.mark.parametrize("lam1, lam2, alpha, beta", [
    # Cross-check: our own Riccati fixed point of the clock model (derived here, no literature
    # source): beta^2 = lam2 (1 - alpha), alpha^2 - beta (2 - alpha) = (lam1 - lam2/6)(1 - alpha).
    (0.01, 1e-4, 0.158994433913, 9.170635561872e-03),
    (1.0, 0.1, 0.710252570408, 1.702196902806e-01),
])
def test_pair_gain_table(lam1, lam2, alpha, beta):
    # Normalised units r = 1, tau = 1 d: q1 = lam1 r / tau, q2 = lam2 r / tau^3 on one clock.
    f = EnsembleFilter(2)
    r_s2 = 1e-18  # 1 ns^2 -> r' = 1
    f.set_noise(0, lam1 * 1e-18 / DAY, lam2 * 1e-18 / DAY ** 3, 0.0, r_s2)
    f.set_noise(1, 0.0, 0.0, 0.0, 0.0)
    f.activate(0, np.zeros(3), np.diag([1e-18, 1e-36, 0.0]))
    f.activate(1, np.zeros(3), np.zeros((3, 3)))
    for _ in range(4000):
        f.predict(DAY)
        res = f.update(np.array([0.0]), np.array([0]), 1)
    k = res.gain
    assert k[0, 0] - k[3, 0] == pytest.approx(alpha, rel=1e-9)
    assert k[1, 0] - k[4, 0] == pytest.approx(beta, rel=1e-9)


def test_projection_is_transparent_and_bounded(rng):
    # Analytic: the full-mode projection commutes with Phi and H, so differences between clocks
    # equal those of the unprojected filter; the projected covariance stays bounded.
    raw, proj = _random_filter(rng), _random_filter(np.random.default_rng(20261201))
    raw.x, raw.P = proj.x.copy(), proj.P.copy()
    v = np.array([0.4, 0.3, 0.2, 0.1])
    for k in range(2000):
        z = rng.normal(size=3) * 1e-9
        for f in (raw, proj):
            f.predict(3600.0)
            f.update(z, np.array([0, 1, 2]), 3)
        proj.project(v)
    d_raw = raw.states_si() - raw.states_si()[3]
    d_proj = proj.states_si() - proj.states_si()[3]
    np.testing.assert_allclose(d_proj, d_raw, rtol=1e-6, atol=1e-20)
    assert np.abs(proj.P).max() < 1e-3 * np.abs(raw.P).max()
    assert proj.min_eigenvalue() > -1e-9 * np.abs(proj.P).max()
    np.testing.assert_allclose(v @ proj.states_si(), 0.0, atol=1e-25)


def test_covariance_stays_symmetric_positive(rng):
    f = _random_filter(rng)
    v = np.full(4, 0.25)
    for k in range(3000):
        f.predict(3600.0 * (1 + (k % 7 == 0) * 5))
        ref = (k // 500) % 4
        clocks = np.array([i for i in range(4) if i != ref and (k + i) % 11])
        f.update(rng.normal(size=clocks.size) * 1e-10, clocks, ref)
        f.project(v)
        assert np.array_equal(f.P, f.P.T)
    assert f.min_eigenvalue() > -1e-12 * np.abs(f.P).max()
    assert np.isfinite(f.P).all()
