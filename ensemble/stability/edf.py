"""Equivalent degrees of freedom (EDF) of the stability variances (internal module).

Greenhall & Riley (2003), "Uncertainty of stability variances based on finite differences",
Proc. 35th PTTI (recalled from memory, not read in the paper; numerically consistent with the
exact quadratic-form EDF, tests/test_edf.py).  A variance estimator built from d-th differences
(d = 2 Allan, d = 3 Hadamard) of phase, with averaging factor m, has

* filter factor F: F = 1 for a modified variance, F = m for an unmodified one (the phase
  samples are treated as averages over tau0);
* stride factor S: S = m for an overlapping estimator, S = 1 for a non-overlapping one;
* M terms (for N phase points M = 1 + floor(S (N - L) / m), L = m/F + m d; we take M as the
  number of terms actually used, which also covers series with gaps).

With power-law phase noise of exponent alpha (S_y(f) ~ f^alpha) and, in units of tau,

    sw(t) = -|t|, t^2 ln|t|, |t|^3, -t^4 ln|t|, -|t|^5, t^6 ln|t|, |t|^7   (alpha = 2 .. -4)
    sx(t) = F^2 [2 sw(t) - sw(t - 1/F) - sw(t + 1/F)]
    sz(t) = sum_{k=-d}^{d} (-1)^k C(2d, d+k) sx(t + k)            (2d-th central difference)

the EDF is, with J = min(M, (d + 1) S),

    EDF = M sz(0)^2 / [sz(0)^2 + (1 - J/M) sz(J/S)^2 + 2 sum_{j=1}^{J-1} (1 - j/M) sz(j/S)^2].

For J <= 100 the sum is evaluated as written.  For J > 100 the sum is a Riemann sum with step
1/S, and Greenhall & Riley replace it by its limit: with r = M/S,

    EDF = r / (a0 - a1 / r),   a0 = 2 I0 / sz(0)^2,  a1 = 2 I1 / sz(0)^2,
    I0 = int_0^T sz(t)^2 dt,   I1 = int_0^T t sz(t)^2 dt,   T = min(r, d + 1),

(the end term and sz(0)^2 are O(1) against O(S) and drop out).  For a modified variance the
integrand uses F = 1; for an unmodified one the F -> infinity limit sx(t) = -sw''(t).  We
compute a0 and a1 by adaptive quadrature (cached) instead of reading a printed table; for
T = d + 1 they are constants, e.g. 2/3 and 1/3 for overlapping Allan with white FM (exact), which
reproduces the published 12.8149 (N = 1001, m = 100).  Two cases have no F = infinity limit
(the unmodified variances with white or flicker PM, where sx is singular at integers); for them
the sum is always evaluated as written, which is cheap (at most (d + 1) S terms, vectorised;
for white PM only d + 1 of them are non-zero).

The total deviation's EDF uses the published linear approximation b (T/tau) - c
(Howe; Riley SP 1065, 2008) with T the record length: (b, c) = (1.50, 0) white FM, (1.17, 0.22)
flicker FM, (0.93, 0.36) random-walk FM.  For white and flicker PM no coefficients are
published; we use the overlapping Allan EDF, which the total variance's extra (reflected)
terms can only raise.

Doubt (our own finding): with F = m, the sum overstates the EDF of unmodified variances for
alpha <= 0 at small m against the exact quadratic-form value (OADEV white FM, N = 1001: m = 1,
782.0 vs 666.2) and understates it at moderate m (m = 10: 135.1 vs 146.1).  We keep the
published algorithm; docs/stability.md tabulates the differences.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from ..errors import InputError

#: Power-law exponents alpha (S_y(f) ~ f^alpha) the EDF algorithm supports.
ALPHAS = (2, 1, 0, -1, -2, -3, -4)

#: J above which the asymptotic formula replaces the sum (Greenhall & Riley 2003).
J_MAX = 100

#: Total-variance EDF coefficients (b, c) of EDF = b T/tau - c, by alpha (SP 1065, 2008).
TOTVAR_EDF_COEFFICIENTS = {0: (1.50, 0.0), -1: (1.17, 0.22), -2: (0.93, 0.36)}

_LD = np.longdouble


def _log_abs(t):
    """ln|t| with the value at t = 0 irrelevant (it is multiplied by a power of t)."""
    a = np.abs(t)
    return np.log(np.where(a > 0, a, _LD(1)))


def _sw(t, alpha: int):
    """Greenhall-Riley sw(t) for noise exponent alpha (long double)."""
    t = np.asarray(t, dtype=_LD)
    a = np.abs(t)
    if alpha == 2:
        return -a
    if alpha == 1:
        return t * t * _log_abs(t)
    if alpha == 0:
        return a ** 3
    if alpha == -1:
        return -(t ** 4) * _log_abs(t)
    if alpha == -2:
        return -(a ** 5)
    if alpha == -3:
        return t ** 6 * _log_abs(t)
    if alpha == -4:
        return a ** 7
    raise InputError(f"noise exponent alpha must be an integer from -4 to 2, got {alpha!r}")


def _sx_limit(t, alpha: int):
    """F -> infinity limit of sx: -sw''(t) (exists for alpha <= 0)."""
    t = np.asarray(t, dtype=_LD)
    a = np.abs(t)
    if alpha == 0:
        return -6 * a
    if alpha == -1:
        return 12 * t * t * _log_abs(t) + 7 * t * t
    if alpha == -2:
        return 20 * a ** 3
    if alpha == -3:
        return -(30 * t ** 4 * _log_abs(t) + 11 * t ** 4)
    if alpha == -4:
        return -42 * a ** 5
    raise ValueError(f"sx has no F -> infinity limit for alpha = {alpha}")


def _sx(t, f: float, alpha: int):
    """sx(t) = F^2 [2 sw(t) - sw(t - 1/F) - sw(t + 1/F)]; F = inf gives -sw''(t)."""
    if math.isinf(f):
        return _sx_limit(t, alpha)
    t = np.asarray(t, dtype=_LD)
    h = _LD(1) / _LD(f)
    return _LD(f) ** 2 * (2 * _sw(t, alpha) - _sw(t - h, alpha) - _sw(t + h, alpha))


def _sz(t, f: float, alpha: int, d: int):
    """sz(t): the 2d-th central difference (unit step) of sx."""
    t = np.asarray(t, dtype=_LD)
    out = np.zeros(t.shape, dtype=_LD)
    for k in range(-d, d + 1):
        out = out + (-1) ** k * math.comb(2 * d, d + k) * _sx(t + k, f, alpha)
    return out


def _edf_sum(alpha: int, d: int, f: float, s: int, m_terms: int) -> float:
    """The published sum for J = min(M, (d+1) S) terms."""
    j_top = min(m_terms, (d + 1) * s)
    z0 = _sz(_LD(0), f, alpha, d)
    if alpha == 2 and not math.isinf(f) and f == s:
        # unmodified overlapping, white PM: sx(j/F) = 0 for integer j != 0, so sz(j/S) vanishes
        # except at j = 0, S, ..., dS; evaluate only those lags (exactly the same sum).
        j = np.arange(s, j_top, s, dtype=np.int64)
    else:
        j = np.arange(1, j_top, dtype=np.int64)
    total = z0 * z0
    if j.size:
        zj = _sz(j.astype(_LD) / s, f, alpha, d)
        total = total + 2 * np.sum((1 - j.astype(_LD) / m_terms) * zj * zj)
    zj_end = _sz(_LD(j_top) / s, f, alpha, d)
    total = total + (1 - _LD(j_top) / m_terms) * zj_end * zj_end
    return float(m_terms * z0 * z0 / total)


@functools.lru_cache(maxsize=512)
def asymptote_coefficients(alpha: int, d: int, modified: bool, upper: float | None = None):
    """Coefficients (a0, a1) of the large-J EDF formula EDF = r / (a0 - a1 / r).

    Parameters
    ----------
    alpha : int
        Noise exponent (-4 .. 2; 2 and 1 only for modified variances).
    d : int
        Difference order (2 Allan, 3 Hadamard).
    modified : bool
        F = 1 (modified) or the F -> infinity limit (unmodified).
    upper : float, optional
        Upper integration limit T (default d + 1, the value for r >= d + 1).

    Returns
    -------
    (float, float)
        a0 = 2 int_0^T sz^2 dt / sz(0)^2 and a1 = 2 int_0^T t sz^2 dt / sz(0)^2.
    """
    from scipy.integrate import quad

    alpha = _check_alpha(alpha, d)
    if not modified and alpha in (1, 2):
        raise InputError(f"no large-J limit for an unmodified variance with alpha = {alpha}")
    f = 1.0 if modified else math.inf
    top = float(d + 1) if upper is None else float(upper)
    z0 = float(_sz(_LD(0), f, alpha, d))
    # sz is smooth between integers (its kinks and log terms sit at integers for F = 1 and
    # F = infinity); integrate piece by piece
    edges = [0.0] + [float(k) for k in range(1, d + 2) if k < top] + [top]

    def f0(t):
        return float(_sz(_LD(t), f, alpha, d)) ** 2

    def f1(t):
        return t * float(_sz(_LD(t), f, alpha, d)) ** 2

    tol = 1e-14 * z0 * z0          # absolute: some pieces vanish identically
    i0 = i1 = 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        if b > a:
            i0 += quad(f0, a, b, epsabs=tol, epsrel=1e-12, limit=200)[0]
            i1 += quad(f1, a, b, epsabs=tol * (d + 1), epsrel=1e-12, limit=200)[0]
    return 2.0 * i0 / (z0 * z0), 2.0 * i1 / (z0 * z0)


def asymptotic_edf(r: float, a0: float, a1: float) -> float:
    """Large-J EDF r / (a0 - a1 / r), r = M / S (Greenhall & Riley 2003)."""
    return r / (a0 - a1 / r)


def _check_alpha(alpha, d: int) -> int:
    try:
        a = int(alpha)
    except (TypeError, ValueError):
        raise InputError(f"noise exponent alpha must be an integer, got {alpha!r}") from None
    if a != alpha or a not in ALPHAS:
        raise InputError(f"noise exponent alpha must be an integer from -4 to 2, got {alpha!r}")
    if a + 2 * d <= 1:
        raise InputError(f"alpha = {a} is outside the range of a difference of order {d} "
                         f"(needs alpha > {1 - 2 * d}); use a Hadamard statistic")
    return a


def edf_greenhall(alpha: int, m: int, n_terms: int, *, order: int = 2, modified: bool = False,
                  overlapping: bool = True) -> float:
    """Greenhall-Riley EDF of an Allan- or Hadamard-type variance estimate.

    Parameters
    ----------
    alpha : int
        Power-law noise exponent of S_y(f) ~ f^alpha: 2 white PM, 1 flicker PM, 0 white FM,
        -1 flicker FM, -2 random-walk FM, -3 flicker-walk FM, -4 random-run FM (the last two
        only with order 3).
    m : int
        Averaging factor (tau = m tau0).
    n_terms : int
        Number of terms M of the estimate (for N gap-free phase points: N - 2m overlapping
        Allan, N - 3m + 1 modified Allan, N - 3m overlapping Hadamard, floor((N-1)/m) - 1 and
        - 2 for the non-overlapping ones).
    order : {2, 3}
        Difference order d: 2 Allan family, 3 Hadamard.
    modified : bool
        Modified variance (filter factor F = 1) rather than unmodified (F = m).
    overlapping : bool
        Fully overlapping estimate (stride factor S = m) rather than non-overlapping (S = 1).

    Returns
    -------
    float
        Equivalent degrees of freedom (> 0).
    """
    if order not in (2, 3):
        raise InputError(f"difference order must be 2 (Allan) or 3 (Hadamard), got {order!r}")
    a = _check_alpha(alpha, order)
    m = int(m)
    n_terms = int(n_terms)
    if m < 1 or n_terms < 1:
        raise InputError(f"EDF needs m >= 1 and at least one term, got m = {m}, "
                         f"n_terms = {n_terms}")
    f = 1.0 if modified else float(m)
    s = m if overlapping else 1
    j_top = min(n_terms, (order + 1) * s)
    if j_top <= J_MAX or (not modified and a in (1, 2)):
        return _edf_sum(a, order, f, s, n_terms)
    r = n_terms / s
    upper = None if r >= order + 1 else r
    a0, a1 = asymptote_coefficients(a, order, modified, upper)
    return asymptotic_edf(r, a0, a1)


#: (difference order, modified, overlapping) of the statistics handled by Greenhall-Riley.
_GR_KIND = {
    "adev": (2, False, False),
    "oadev": (2, False, True),
    "mdev": (2, True, True),
    "tdev": (2, True, True),
    "hdev": (3, False, False),
    "ohdev": (3, False, True),
}


def totdev_edf(alpha: int, m: int, n_points: int, n_terms: int | None = None) -> float:
    """EDF of the total variance: b T/tau - c (SP 1065, 2008), T = (N - 1) tau0.

    Parameters
    ----------
    alpha : int
        Noise exponent, -2 .. 2.  For 2 and 1 (no published coefficients) the overlapping Allan
        EDF of the same record is returned.
    m : int
        Averaging factor.
    n_points : int
        Number of phase points N of the record (frequency input: values + 1).
    n_terms : int, optional
        Terms actually used (N - 2 without gaps); with gaps the EDF is scaled by
        n_terms / (N - 2).

    Returns
    -------
    float
        EDF (at least 1).
    """
    a = _check_alpha(alpha, 2)
    m, n_points = int(m), int(n_points)
    if m < 1 or n_points < 3:
        raise InputError(f"EDF needs m >= 1 and at least 3 phase points, got m = {m}, "
                         f"N = {n_points}")
    full = n_points - 2
    used = full if n_terms is None else int(n_terms)
    frac = used / full
    if a in (2, 1):
        m_terms = max(int(round((n_points - 2 * m) * frac)), 1)
        return edf_greenhall(a, m, m_terms, order=2, modified=False, overlapping=True)
    b, c = TOTVAR_EDF_COEFFICIENTS[a]
    return max(b * (n_points - 1) / m * frac - c, 1.0)


def edf_for(statistic: str, alpha: int, m: int, n_terms: int, n_points: int) -> float:
    """EDF of one statistic's estimate (dispatch to Greenhall-Riley or the total variance).

    Parameters
    ----------
    statistic : {'adev', 'oadev', 'mdev', 'tdev', 'hdev', 'ohdev', 'totdev'}
        The statistic.
    alpha : int
        Noise exponent at this averaging time.
    m : int
        Averaging factor.
    n_terms : int
        Number of terms used.
    n_points : int
        Number of phase points of the record.
    """
    if statistic == "totdev":
        return totdev_edf(alpha, m, n_points, n_terms)
    try:
        order, modified, overlapping = _GR_KIND[statistic]
    except KeyError:
        raise InputError(f"unknown statistic {statistic!r}") from None
    return edf_greenhall(alpha, m, n_terms, order=order, modified=modified,
                         overlapping=overlapping)
