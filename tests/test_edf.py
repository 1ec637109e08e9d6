"""EDF and confidence intervals: chi-squared table, Greenhall-Riley checks, exact EDF oracle."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import chi2

from ensemble.errors import InputError
from ensemble.stability import (CONFIDENCE_68, chi2_factors, deviation_interval, edf_for,
                                edf_greenhall, overlapping_avar_hvar, totdev_edf)
from ensemble.stability import edf as edfmod

# --------------------------------------------------------------------------------------------
# Chi-squared intervals


@pytest.mark.parametrize("nu,lo68,hi68,lo95,hi95", [
    (1, 0.709417, 4.995662, 0.446149, 31.910159),
    (2, 0.737005, 2.405948, 0.520658, 6.284735),
    (5, 0.792733, 1.559461, 0.624208, 2.452614),
    (10, 0.835497, 1.326790, 0.698717, 1.754934),
    (100, 0.936195, 1.078922, 0.878542, 1.160737),
])
def test_chi2_interval_table(nu, lo68, hi68, lo95, hi95):
    # Cross-check: interval table computed once by us with scipy.stats.chi2 (deviation
    # s = 1), printed to 6 decimals
    lo, hi = deviation_interval(1.0, nu)
    assert (float(lo), float(hi)) == pytest.approx((lo68, hi68), abs=6e-7)
    lo, hi = deviation_interval(1.0, nu, 0.95)
    assert (float(lo), float(hi)) == pytest.approx((lo95, hi95), abs=6e-7)


def test_chi2_interval_closed_form_two_degrees_of_freedom():
    # Cross-check: for nu = 2 the chi-squared CDF is 1 - exp(-q/2), so the quantile is
    # -2 ln(1 - p): an analytic route independent of scipy
    for conf in (CONFIDENCE_68, 0.9, 0.99):
        q_hi = -2 * math.log(1 - (1 + conf) / 2)
        q_lo = -2 * math.log(1 - (1 - conf) / 2)
        lo, hi = deviation_interval(3.0, 2.0, conf)
        assert float(lo) == pytest.approx(3.0 * math.sqrt(2 / q_hi), rel=1e-12)
        assert float(hi) == pytest.approx(3.0 * math.sqrt(2 / q_lo), rel=1e-12)


def test_chi2_factors_use_the_right_tails():
    # Cross-check: chi-squared quantiles for nu = 10 (scipy.stats.chi2): 3.246973 (0.025),
    # 20.483177 (0.975), 5.680618 (0.158655), 14.325506 (0.841345)
    f_lo, f_hi = chi2_factors(10, 0.95)
    assert float(f_lo) == pytest.approx(10 / 20.483177, rel=1e-6)
    assert float(f_hi) == pytest.approx(10 / 3.246973, rel=1e-6)
    f_lo, f_hi = chi2_factors(10)
    assert float(f_lo) == pytest.approx(10 / 14.325506, rel=1e-6)
    assert float(f_hi) == pytest.approx(10 / 5.680618, rel=1e-6)
    assert CONFIDENCE_68 == pytest.approx(math.erf(1 / math.sqrt(2)), abs=1e-10)


def test_worked_oadev_interval_of_the_1000_point_set():
    # Cross-check: the white-FM OADEV EDF formula of Howe, Allan & Barnes (1981), recalled
    # from memory, for N = 1001, m = 10 gives 146.1768; with the handbook OADEV(10) =
    # 9.159953e-2 the 68.27 % interval is [8.668102e-2, 9.746297e-2] and the 95 % interval
    # [8.219488e-2, 1.034536e-1] (our own worked example)
    n, m = 1001, 10
    edf = (3 * (n - 1) / (2 * m) - 2 * (n - 2) / n) * 4 * m * m / (4 * m * m + 5)
    assert edf == pytest.approx(146.1768, abs=5e-5)
    lo, hi = deviation_interval(9.159953e-2, edf)
    assert (float(lo), float(hi)) == pytest.approx((8.668102e-2, 9.746297e-2), rel=1e-6)
    lo, hi = deviation_interval(9.159953e-2, edf, 0.95)
    assert (float(lo), float(hi)) == pytest.approx((8.219488e-2, 1.034536e-1), rel=1e-6)


def test_bad_interval_arguments():
    with pytest.raises(InputError, match="confidence"):
        deviation_interval(1.0, 10, 1.0)
    with pytest.raises(InputError, match="degrees of freedom"):
        deviation_interval(1.0, 0.0)


# --------------------------------------------------------------------------------------------
# Exact EDF oracle (derived here): a variance estimate sum_k (d_k^T x)^2 with Cov(x) = L L^T
# has EDF = (tr G)^2 / sum G_ij^2, G = (D L)(D L)^T.


def _term_matrix(n, m, order=2, modified=False, overlapping=True):
    coef = {2: [1.0, -2.0, 1.0], 3: [-1.0, 3.0, -3.0, 1.0]}[order]
    if modified:
        base = np.zeros((order + 1) * m)
        for i in range(m):
            for k, c in enumerate(coef):
                base[i + k * m] += c
        rows = n - (order + 1) * m + 1
        dmat = np.zeros((rows, n))
        for j in range(rows):
            dmat[j, j:j + base.size] = base
        return dmat
    starts = np.arange(0, n - order * m, 1 if overlapping else m)
    dmat = np.zeros((starts.size, n))
    for k, c in enumerate(coef):
        dmat[np.arange(starts.size), starts + k * m] += c
    return dmat


def exact_edf(dmat, noise):
    """White PM: L = I; white FM: random-walk phase; random-walk FM: doubly integrated."""
    b = dmat
    for _ in range({"wpm": 0, "wfm": 1, "rwfm": 2}[noise]):
        b = np.cumsum(b[:, ::-1], axis=1)[:, ::-1]        # D L with L lower-triangular ones
    g = b @ b.T
    return float(np.trace(g) ** 2 / np.sum(g * g))


@pytest.mark.parametrize("n,m,order,modified,overlapping,noise,value", [
    (1001, 10, 2, False, True, "wfm", 146.0723),
    (1001, 100, 2, False, True, "wfm", 12.8133),
    (1001, 100, 2, True, True, "wpm", 9.9340),
    (1001, 100, 2, True, True, "wfm", 7.4144),
    (1001, 10, 2, True, True, "wpm", 123.940),
    (1001, 10, 2, True, True, "wfm", 95.109),
    (1001, 10, 2, True, True, "rwfm", 75.284),
    (1001, 30, 2, True, True, "wpm", 39.863),
    (1001, 4, 3, False, True, "wpm", 429.266),
    (101, 1, 2, False, True, "wpm", 51.180),
    (101, 8, 2, False, True, "wfm", 16.395),
    (101, 16, 2, False, True, "rwfm", 4.350),
])
def test_exact_oracle_reproduces_the_derived_values(n, m, order, modified, overlapping, noise,
                                                    value):
    # Cross-check: exact quadratic-form EDF values derived by us (some quoted in
    # docs/stability.md, EDF section); validates the oracle used below
    dmat = _term_matrix(n, m, order, modified, overlapping)
    digits = len(str(value).split(".")[1])
    assert exact_edf(dmat, noise) == pytest.approx(value, abs=0.6 * 10 ** -digits)


_KIND = {"adev": (2, False, False), "oadev": (2, False, True), "mdev": (2, True, True),
         "hdev": (3, False, False), "ohdev": (3, False, True)}


@pytest.mark.parametrize("stat", sorted(_KIND))
@pytest.mark.parametrize("m", [1, 3, 10, 30])
def test_greenhall_riley_is_exact_for_white_pm(stat, m):
    # Cross-check: exact quadratic-form EDF (oracle above); GR's sum is exact for white PM
    # (sx vanishes at non-zero sample lags); J <= 100 here
    order, modified, overlapping = _KIND[stat]
    dmat = _term_matrix(301, m, order, modified, overlapping)
    gr = edf_greenhall(2, m, dmat.shape[0], order=order, modified=modified,
                       overlapping=overlapping)
    assert gr == pytest.approx(exact_edf(dmat, "wpm"), rel=1e-9)


@pytest.mark.parametrize("m,noise,alpha", [(10, "wfm", 0), (10, "rwfm", -2), (20, "wfm", 0),
                                           (20, "rwfm", -2)])
def test_greenhall_riley_modified_allan_at_m_ge_10(m, noise, alpha):
    # Cross-check: exact quadratic-form EDF (oracle above): GR is "safe" for the modified
    # variance at m >= 10 (within 1 %: -0.5 % at m = 10 white FM, N = 1001)
    dmat = _term_matrix(601, m, 2, True, True)
    gr = edf_greenhall(alpha, m, dmat.shape[0], modified=True)
    assert gr == pytest.approx(exact_edf(dmat, noise), rel=0.01)


@pytest.mark.parametrize("order,modified,noise,alpha", [
    (2, False, "wfm", 0), (2, False, "rwfm", -2), (2, True, "wpm", 2), (2, True, "wfm", 0),
    (3, False, "wfm", 0), (3, False, "rwfm", -2)])
def test_greenhall_riley_asymptotic_branch(order, modified, noise, alpha):
    # Cross-check: exact quadratic-form EDF (oracle above) at N = 1001, m = 100 (J > 100:
    # the large-J formula), within 0.1 %
    m = 100
    dmat = _term_matrix(1001, m, order, modified, True)
    gr = edf_greenhall(alpha, m, dmat.shape[0], order=order, modified=modified)
    assert gr == pytest.approx(exact_edf(dmat, noise), rel=1e-3)


# --------------------------------------------------------------------------------------------
# Greenhall-Riley published checks and the large-J coefficients


def test_greenhall_riley_check_values():
    # Cross-check: Greenhall & Riley (2003, Proc. 35th PTTI) checks, recalled from memory,
    # reproduced by our large-J branch: OADEV N = 1001, m = 100, white FM 12.8149; MVAR
    # m = 100 white PM 9.9356
    assert edf_greenhall(0, 100, 1001 - 200) == pytest.approx(12.8149, abs=5e-5)
    assert edf_greenhall(2, 100, 1001 - 300 + 1, modified=True) == pytest.approx(9.9356,
                                                                                 abs=5e-5)


def test_recalled_mvar_white_fm_check_comes_from_rounded_coefficients():
    # Cross-check: the recalled GR value MVAR m = 100 white FM 7.4165 (from memory) is what
    # r / (a0 - a1/r) gives with the coefficients rounded to three decimals (1.033, 0.607) —
    # presumably the printed table; our exact coefficients (31/30, 17/28, computed by
    # quadrature) give 7.41409, within 0.01 % of the exact quadratic-form EDF 7.41444
    r = (1001 - 300 + 1) / 100
    assert edfmod.asymptotic_edf(r, 1.033, 0.607) == pytest.approx(7.4165, abs=5e-5)
    ours = edf_greenhall(0, 100, 702, modified=True)
    assert ours == pytest.approx(7.41409, abs=1e-5)
    assert ours == pytest.approx(exact_edf(_term_matrix(1001, 100, 2, True, True), "wfm"),
                                 rel=1e-4)
    a0, a1 = edfmod.asymptote_coefficients(0, 2, True)
    assert (a0, a1) == pytest.approx((31 / 30, 17 / 28), rel=1e-10)


def test_asymptote_coefficients_closed_forms():
    # Cross-check: closed-form integrals derived by hand (recorded in docs/stability.md).
    # Unmodified Allan, white FM, F -> infinity: sz(t) = 24 - 36 t on [0, 1], 12 t - 24 on
    # [1, 2], 0 beyond: int sz^2 = 192, int t sz^2 = 96, sz(0)^2 = 576: a0 = 2/3, a1 = 1/3
    assert edfmod.asymptote_coefficients(0, 2, False) == pytest.approx((2 / 3, 1 / 3),
                                                                        rel=1e-10)
    # Modified Allan, white PM, F = 1: sz(t) = 12 - 20 t, 10 t - 18, 2 (3 - t) on the unit
    # intervals: int sz^2 = 56, int t sz^2 = 36, sz(0) = 12: a0 = 7/9, a1 = 1/2
    assert edfmod.asymptote_coefficients(2, 2, True) == pytest.approx((7 / 9, 1 / 2),
                                                                       rel=1e-10)


@pytest.mark.parametrize("alpha,order,modified", [(-1, 2, True), (-1, 2, False), (1, 2, True),
                                                  (-3, 3, False), (-4, 3, True)])
def test_asymptote_is_the_limit_of_the_sum(alpha, order, modified):
    # Cross-check: the large-J formula is the S -> infinity limit of the published sum
    # (evaluated directly at S = 800, with F = 1 or a large F standing for infinity)
    s = 800
    m_terms = 20 * s
    f = 1.0 if modified else 1e6
    direct = edfmod._edf_sum(alpha, order, f, s, m_terms)
    a0, a1 = edfmod.asymptote_coefficients(alpha, order, modified)
    assert edfmod.asymptotic_edf(m_terms / s, a0, a1) == pytest.approx(direct, rel=1e-6)


def test_short_records_use_the_truncated_integral():
    # r = M/S < d + 1: the integral stops at r; for white FM (sz = 0 beyond t = 2) the
    # coefficients are unchanged above r = 2 and smaller below
    assert edfmod.asymptote_coefficients(0, 2, False, 2.5) == pytest.approx((2 / 3, 1 / 3))
    a0, _ = edfmod.asymptote_coefficients(0, 2, False, 1.5)
    assert a0 < 2 / 3
    # continuity with the sum near the switch (OADEV, N = 1001, m = 400: M = 201 < 3 S)
    m = 400
    gr = edf_greenhall(0, m, 1001 - 2 * m)
    direct = edfmod._edf_sum(0, 2, 1e6, m, 1001 - 2 * m)
    assert gr == pytest.approx(direct, rel=5e-3)


def test_white_pm_sparse_lags_equal_the_full_sum():
    # the white-PM shortcut (only lags 0, S, .., dS are non-zero) against every lag
    s, m_terms, d = 150, 2000, 2
    z = edfmod._sz
    z0 = z(0.0, float(s), 2, d)
    j = np.arange(1, (d + 1) * s)
    zj = z(j / s, float(s), 2, d)
    jt = (d + 1) * s
    full = m_terms * z0 ** 2 / (z0 ** 2 + (1 - jt / m_terms) * z(jt / s, float(s), 2, d) ** 2
                                + 2 * np.sum((1 - j / m_terms) * zj ** 2))
    assert edf_greenhall(2, s, m_terms) == pytest.approx(float(full), rel=1e-12)


def test_flicker_edf_against_monte_carlo():
    # Cross-check: Monte Carlo EDF = 2 E[s^2]^2 / Var[s^2] over 1500 seeded flicker-FM records
    # (Kasdin & Walter 1992 generator), modified Allan variance m = 16, N = 513; sampling error
    # of the Monte Carlo EDF ~ 4 %, tolerance 12 %
    rng = np.random.default_rng(31)
    n, reps, m = 512, 1500, 16
    h = np.ones(n)
    for k in range(1, n):                       # (1 - B)^(-1/2): S_y ~ 1/f
        h[k] = h[k - 1] * (k - 0.5) / k
    size = 2 * n
    w = rng.standard_normal((reps, n))
    y = np.fft.irfft(np.fft.rfft(h, size) * np.fft.rfft(w, size, axis=1), size, axis=1)[:, :n]
    x = np.concatenate([np.zeros((reps, 1)), np.cumsum(y, axis=1)], axis=1)
    from ensemble.stability import deviation
    s2 = np.array([deviation("mdev", x[k], 1.0, [m]).deviation[0] ** 2 for k in range(reps)])
    mc = 2 * s2.mean() ** 2 / s2.var(ddof=1)
    gr = edf_greenhall(-1, m, n + 1 - 3 * m + 1, modified=True)
    assert gr == pytest.approx(mc, rel=0.12)
    # and the same for the overlapping Allan variance through the fast 2-D function
    av = overlapping_avar_hvar(x.T, 1.0, [m]).avar[0]
    mc_a = 2 * av.mean() ** 2 / av.var(ddof=1)
    assert edf_greenhall(-1, m, n + 1 - 2 * m) == pytest.approx(mc_a, rel=0.12)


# --------------------------------------------------------------------------------------------
# Argument checks, dispatch, total variance


def test_alpha_ranges_and_arguments():
    with pytest.raises(InputError, match="Hadamard"):
        edf_greenhall(-3, 4, 100, order=2)
    assert edf_greenhall(-4, 4, 100, order=3) > 0
    with pytest.raises(InputError, match="integer"):
        edf_greenhall(0.5, 4, 100)
    with pytest.raises(InputError, match="at least one term"):
        edf_greenhall(0, 4, 0)
    with pytest.raises(InputError, match="order"):
        edf_greenhall(0, 4, 100, order=4)
    assert edf_greenhall(0, 1, 1) == pytest.approx(1.0)        # one term: one degree


def test_dispatch_by_statistic():
    n = 1001
    assert edf_for("adev", 0, 8, 124, n) == edf_greenhall(0, 8, 124, overlapping=False)
    assert edf_for("oadev", 0, 8, 985, n) == edf_greenhall(0, 8, 985)
    assert edf_for("mdev", -1, 8, 978, n) == edf_greenhall(-1, 8, 978, modified=True)
    assert edf_for("tdev", -1, 8, 978, n) == edf_for("mdev", -1, 8, 978, n)
    assert edf_for("hdev", -3, 8, 123, n) == edf_greenhall(-3, 8, 123, order=3,
                                                           overlapping=False)
    assert edf_for("ohdev", -4, 8, 977, n) == edf_greenhall(-4, 8, 977, order=3)
    with pytest.raises(InputError):
        edf_for("pdev", 0, 8, 977, n)


def test_totdev_edf_linear_approximation():
    # Cross-check: total-variance EDF b T/tau - c (Riley SP 1065, recalled from memory, not
    # read in the handbook), asserted against its own formula with T = (N - 1) tau0
    n, m = 1001, 10
    assert totdev_edf(0, m, n) == pytest.approx(1.50 * 1000 / m)
    assert totdev_edf(-1, m, n) == pytest.approx(1.17 * 1000 / m - 0.22)
    assert totdev_edf(-2, m, n) == pytest.approx(0.93 * 1000 / m - 0.36)
    # gaps: scaled by the fraction of terms used
    assert totdev_edf(0, m, n, n_terms=(n - 2) // 2) == pytest.approx(0.5 * 1.5 * 1000 / m,
                                                                      rel=2e-3)
    # PM noises: the overlapping Allan EDF of the same record
    assert totdev_edf(2, m, n) == edf_greenhall(2, m, n - 2 * m)
    assert totdev_edf(-2, 500, 1001) >= 1.0
    with pytest.raises(InputError):
        totdev_edf(-3, m, n)


def test_chi2_quantile_reference_is_scipy():
    # our interval is exactly nu s^2 / chi2.ppf(p, nu) (definition, docs/stability.md)
    lo, hi = deviation_interval(2.0, 37.5, 0.9)
    assert float(lo) == pytest.approx(2.0 * math.sqrt(37.5 / chi2.ppf(0.95, 37.5)), rel=1e-14)
    assert float(hi) == pytest.approx(2.0 * math.sqrt(37.5 / chi2.ppf(0.05, 37.5)), rel=1e-14)
