"""Frequency, drift and end state relative to the scale (ensemble/assess/tracking.py)."""

import numpy as np
import pytest

from ensemble.assess.tracking import offset_noise, track_offsets
from ensemble.model import ClockNoise

TAU0 = 3600.0


def _series(rng, n, q1, q2, r, y0, d):
    t = np.arange(n) * TAU0
    y = np.cumsum(rng.normal(0.0, np.sqrt(q2 * TAU0), n)) if q2 else np.zeros(n)
    x = np.cumsum(y * TAU0 + rng.normal(0.0, np.sqrt(q1 * TAU0), n))
    return t, x + y0 * t + 0.5 * d * t * t + rng.normal(0.0, np.sqrt(r), n)


def _gls(t, z, q1, q2, r):
    """Dense generalised least squares of z on (1, t, t^2/2) with the clock model's covariance
    Cov[x(s), x(t)] = q1 min + q2 min^2 (3 max - min) / 6 + r delta (white FM, random-walk FM,
    white PM started at the first epoch; clock model of Zucca & Tavella 2005, IEEE Trans. UFFC
    52, covariance derived here)."""
    ok = np.isfinite(z)
    tt = t[ok] - t[ok][0]
    lo, hi = np.minimum.outer(tt, tt), np.maximum.outer(tt, tt)
    cov = q1 * lo + q2 * lo ** 2 * (3 * hi - lo) / 6 + r * np.eye(tt.size)
    x = np.column_stack([np.ones_like(tt), tt, tt ** 2 / 2])
    ci = np.linalg.inv(cov)
    p = np.linalg.inv(x.T @ ci @ x)
    return p @ x.T @ ci @ z[ok], p, tt[-1]


@pytest.mark.parametrize("q2", [0.0, 1e-31])
def test_filter_equals_dense_generalised_least_squares(rng, q2):
    # Cross-check: dense GLS with the model covariance (numpy inverse): a Kalman filter with a
    # constant drift state and a diffuse start is that estimator (the drift and its variance;
    # with q2 = 0 also the end frequency y0 + d T).  rtol 1e-6: the prior is 1e3 times the
    # data range, not infinite.
    q1, r = 1e-22, 1e-22
    t, z = _series(rng, 300, q1, q2, r, 3e-13, 1e-18)
    z[40:52] = np.nan
    tr = track_offsets(t, z[:, None], [ClockNoise(q1_s=q1, q2_per_s=q2, r_s2=r)], [True])
    beta, p, t_end = _gls(t, z, q1, q2, r)
    assert tr.drift_per_s[0] == pytest.approx(beta[2], rel=1e-6)
    assert tr.drift_std_per_s[0] == pytest.approx(np.sqrt(p[2, 2]), rel=1e-6)
    if q2 == 0.0:
        assert tr.frequency[0] == pytest.approx(beta[1] + beta[2] * t_end, rel=1e-6)
        var_y = p[1, 1] + 2 * t_end * p[1, 2] + t_end ** 2 * p[2, 2]
        assert tr.frequency_std[0] == pytest.approx(np.sqrt(var_y), rel=1e-6)


def test_no_drift_state_and_several_series(rng):
    q1, r = 4e-23, 4e-24
    t, z1 = _series(rng, 200, q1, 0.0, r, -2e-13, 0.0)
    _, z2 = _series(rng, 200, 4 * q1, 0.0, r, 5e-12, 2e-17)
    z = np.column_stack([z1, z2, np.full(200, np.nan)])
    noise = [ClockNoise(q1_s=q1, r_s2=r), ClockNoise(q1_s=4 * q1, r_s2=r), None]
    tr = track_offsets(t, z, noise, [False, True, True])
    assert tr.drift_per_s[0] == 0.0 and tr.drift_std_per_s[0] == 0.0
    assert np.all(np.isnan(tr.state[2]))
    # Cross-check: with q2 = 0 and no drift the frequency is the GLS slope of a random walk
    # plus white noise; within 4 standard errors of the simulated -2e-13.
    assert abs(tr.frequency[0] + 2e-13) < 4 * tr.frequency_std[0]
    assert abs(tr.drift_per_s[1] - 2e-17) < 4 * tr.drift_std_per_s[1]
    cov = tr.covariance[1]
    np.testing.assert_allclose(cov, cov.T, rtol=0, atol=0)
    assert np.all(np.linalg.eigvalsh(cov / np.sqrt(np.outer(np.diag(cov), np.diag(cov)))) > -1e-9)


def test_offset_noise_finds_the_simulated_white_fm(rng):
    # Cross-check: white FM q1 = 1e-22 s and white PM r = 1e-22 s^2 of a seeded series, found
    # by the Hadamard fit within 15 % (the fit's EDF at 1000 points gives ~5 % on q1).
    q1, r = 1e-22, 1e-22
    t, z = _series(rng, 1000, q1, 0.0, r, 0.0, 0.0)
    (nz,) = offset_noise(z[:, None], TAU0, t[-1])
    assert nz.q1_s == pytest.approx(q1, rel=0.15)
    assert nz.q2_per_s > 0
