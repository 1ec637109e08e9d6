"""Total deviation: reflection, OADEV at m = 1, gaps at the ends, bias for white FM."""

from __future__ import annotations

import math

import numpy as np
import pytest

from ensemble.stability import frequency_to_phase, oadev, totdev


def _totdev_reference(x, tau0, m):
    """Direct definition (Howe's total variance as in Riley, NIST SP 1065, 2008; the reflection
    rule of docs/stability.md): numpy odd reflection, explicit loop over centres."""
    x = np.asarray(x, dtype=float)
    n = x.size
    j = np.arange(1, n - 1)
    left = (2 * x[0] - x[j])[::-1]           # x*_{1-j} for j = N-2 .. 1
    right = 2 * x[-1] - x[n - 1 - j]          # x*_{N+j} for j = 1 .. N-2
    ext = np.concatenate([left, x, right])
    off = n - 2                                # index of x_1 in ext
    total, count = 0.0, 0
    for i in range(1, n - 1):                  # centres i = 2 .. N-1 (1-based)
        c = off + i
        a, b, d = ext[c - m], ext[c], ext[c + m]
        if not (np.isnan(a) or np.isnan(b) or np.isnan(d)):
            total += (a - 2 * b + d) ** 2
            count += 1
    tau = m * tau0
    return math.sqrt(total / (2 * tau * tau * count)), count


def test_equals_oadev_at_m1():
    # Cross-check: TOTDEV = OADEV at m = 1 (follows from Howe's definition; derived here)
    rng = np.random.default_rng(21)
    y = rng.standard_normal(257)
    for data, v in (("frequency", y), ("phase", np.cumsum(y))):
        np.testing.assert_allclose(totdev(v, 1.0, [1], data=data).deviation,
                                   oadev(v, 1.0, [1], data=data).deviation, rtol=1e-13)


@pytest.mark.parametrize("m", [1, 2, 37, 100, 149])
def test_frequency_mirror_equals_phase_odd_reflection(m):
    # Cross-check: the even reflection of frequency used for frequency input is the odd
    # reflection of the integrated phase (direct definition, independent code path)
    rng = np.random.default_rng(22)
    y = 1e-11 + 1e-13 * rng.standard_normal(300)
    x = frequency_to_phase(y, 60.0)
    ref, count = _totdev_reference(x, 60.0, m)
    r = totdev(y, 60.0, [m], data="frequency")
    assert r.n[0] == count == 301 - 2
    np.testing.assert_allclose(r.deviation[0], ref, rtol=1e-9)
    np.testing.assert_allclose(totdev(x, 60.0, [m]).deviation[0], ref, rtol=1e-9)


@pytest.mark.parametrize("m", [1, 3, 10])
def test_missing_first_value_removes_the_reflected_terms(m):
    rng = np.random.default_rng(23)
    x = np.cumsum(rng.standard_normal(41))
    x[0] = np.nan
    # Cross-check: with x_1 missing every left-reflected point is missing, so the m centres
    # i = 2 .. m+1 whose term reaches x*_{i-m} (i - m <= 1) are skipped: n = N - 2 - m
    r = totdev(x, 1.0, [m])
    assert r.n[0] == 41 - 2 - m
    ref, count = _totdev_reference(x, 1.0, m)
    assert count == r.n[0]
    np.testing.assert_allclose(r.deviation[0], ref, rtol=1e-12)
    y = rng.standard_normal(40)
    y[0] = np.nan
    # Cross-check: a missing y_0 is mirrored to y*_{-1}; the spans [c - m, c + m - 1] of the
    # centres c = 1 .. m contain it: n = N - 2 - m again
    assert totdev(y, 1.0, [m], data="frequency").n[0] == 41 - 2 - m


def test_nearly_unbiased_for_white_fm():
    # Cross-check: the total variance has no bias for white FM (Howe, recalled from memory),
    # here up to O(1/N): exact expectation for unit white frequency, E[AVAR] = 1/m, computed by
    # applying the estimator to each column of the random-walk covariance factor
    n = 61
    lmat = np.tril(np.ones((n, n)))
    for m in (2, 5, 20, 30):
        expected = sum(totdev(lmat[:, j], 1.0, [m]).deviation[0] ** 2 for j in range(n))
        assert abs(expected * m - 1.0) < 2.0 / (n - 2)


def test_short_records():
    assert totdev([1.0, 2.0], 1.0, [1]).n[0] == 0            # N = 2 phase points: no centre
    r = totdev([0.0, 1.0, 0.0], 1.0, [1])
    # Cross-check: N = 3: one centre, term x1 - 2 x2 + x3 = -2, TOTVAR = 4 / 2
    assert r.n[0] == 1 and r.deviation[0] == pytest.approx(math.sqrt(2.0))
