"""Trend test with a stated significance for a statistic estimated in sliding windows.

Given window centres t_k [s] and estimates v_k (a noise level such as the white-FM q1, or a
drift), the test fits a straight line by weighted least squares to ln v_k (levels: the slope is
a relative rate) or to v_k (drift), and tests the slope against zero with the t distribution.

Windows that overlap share data, so neighbouring estimates are correlated and an ordinary
regression would claim too much.  Estimates from windows of length W whose centres are dt apart
are modelled with the correlation rho(dt) = max(0, 1 - |dt| / W) -- exact for means of
independent samples, the usual approximation for variance estimates -- and W = step / (1 - f)
from the median step between centres and the overlap fraction f.  With V the resulting error
covariance (up to a scale) and c the least-squares slope operator::

    Var[slope] = sigma^2 c^T V c,       sigma^2 = RSS_w / tr(M),
    M = W^1/2 (I - H) V (I - H)^T W^1/2  (H the hat matrix, W the weights)

so the residual variance is unbiased under the model, and the t distribution gets the
Satterthwaite degrees of freedom nu = tr(M)^2 / tr(M^2) (Satterthwaite 1946, Biometrics
Bulletin 2(6), 110-114; recalled); n_eff = nu + 2 is reported as the effective number of
independent windows.  Without overlap this is the textbook regression t-test with n - 2
degrees of freedom.  In seeded simulations (sample variances of white noise, 2000 series per
case) the false-alarm rate at alpha = 0.05 was 0.046-0.059 for 30-100 windows at overlaps up
to 0.75; the test is conservative (0.02-0.03) when the series spans fewer than about five
window lengths.

Cross-check: Mann-Kendall (Kendall's tau of v against t, :func:`scipy.stats.kendalltau`), with
its variance inflated for the same correlation model by the factor of Hamed & Rao (1998, J.
Hydrology 204, 182-196; recalled): 1 + 2/(n(n-1)(n-2)) sum_k (n-k)(n-k-1)(n-k-2) rho_k.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.stats

__all__ = ["TrendTest", "trend_test", "SECONDS_PER_YEAR"]

#: Julian year of 365.25 days of 86 400 s (IAU definition). [s]
SECONDS_PER_YEAR = 365.25 * 86400.0
_ALTERNATIVES = ("two-sided", "increasing", "decreasing")


@dataclass(frozen=True, eq=False)
class TrendTest:
    """Result of :func:`trend_test`.

    Attributes
    ----------
    kind : str
        "level" (slope of ln value) or "drift" (slope of value).
    slope : float
        Fitted slope: d ln(value)/dt [1/s] for a level, d value/dt [value unit / s] for drift.
    slope_std : float
        Standard error of the slope, corrected for window overlap (same unit).
    relative_change_per_year : float
        exp(slope * year) - 1 for a level (0.1 = +10 % per year); NaN for drift. [1]
    change_per_year : float
        slope * year: ln-change per year for a level, value change per year for drift.
    t_statistic : float
        slope / slope_std.
    dof : float
        Degrees of freedom of the t distribution (Satterthwaite).
    n_windows : int
        Number of estimates used.
    n_effective : float
        dof + 2: the number of independent windows that would give the residual variance the
        same precision (n without overlap).  The slope's own loss from overlap is in
        ``slope_std``.
    p_value : float
        p-value of the t test for the chosen alternative.
    alternative : str
        "two-sided", "increasing" or "decreasing".
    alpha : float
        Significance level of the decision.
    significant : bool
        p_value < alpha.
    kendall_tau : float
        Kendall's tau between time and value (Mann-Kendall cross-check).
    kendall_p_value : float
        Its p-value for the same alternative, corrected for overlap.
    description : str
        One sentence with the numbers.
    """

    kind: str
    slope: float
    slope_std: float
    relative_change_per_year: float
    change_per_year: float
    t_statistic: float
    dof: float
    n_windows: int
    n_effective: float
    p_value: float
    alternative: str
    alpha: float
    significant: bool
    kendall_tau: float
    kendall_p_value: float
    description: str


def trend_test(t_s, values, std=None, *, overlap: float = 0.0, kind: str = "level",
               alternative: str = "two-sided", alpha: float = 0.01, name: str = "value",
               unit: str = "") -> TrendTest:
    """Test a series of windowed estimates for a monotone trend.

    Parameters
    ----------
    t_s : ndarray, shape (n,)
        Window centres, strictly increasing. [s]
    values : ndarray, shape (n,)
        The statistic in each window; > 0 for ``kind="level"``.  Any unit (``unit``).
    std : ndarray, shape (n,), optional
        Standard uncertainties of ``values`` (same unit), used as relative weights 1/std^2
        (the scale comes from the residuals).  Default: equal weights.
    overlap : float
        Fraction of each window shared with the next one, 0 <= overlap < 1.
    kind : {"level", "drift"}
        "level": regress ln(value) (a noise level, a deviation); "drift": regress value.
    alternative : {"two-sided", "increasing", "decreasing"}
    alpha : float
        Significance level, 0 < alpha < 1 (default 0.01).
    name : str
        What the statistic is, for the description (e.g. "white-FM level q1").
    unit : str
        Unit of ``values`` for the description (drift only).

    Returns
    -------
    TrendTest

    Raises
    ------
    ValueError
        Bad input, fewer than 4 windows, or fewer than 3 effective independent windows.
    """
    t, v, u = _inputs(t_s, values, std, kind)
    if not 0.0 <= overlap < 1.0 or not np.isfinite(overlap):
        raise ValueError(f"overlap must be a fraction in [0, 1), got {overlap!r}")
    if kind not in ("level", "drift"):
        raise ValueError(f"kind must be 'level' or 'drift', got {kind!r}")
    if alternative not in _ALTERNATIVES:
        raise ValueError(f"alternative must be one of {_ALTERNATIVES}, got {alternative!r}")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be in (0, 1), got {alpha!r}")

    n = t.size
    if kind == "level":
        y = np.log(v)
        u_y = None if u is None else u / v      # d ln v = dv / v
    else:
        y = v
        u_y = u
    w = np.ones(n) if u_y is None else 1.0 / u_y ** 2
    rho = _window_correlation(t, overlap)
    scale = np.ones(n) if u_y is None else u_y
    cov_model = rho * np.outer(scale, scale)

    # Weighted least squares for y = a + b (t - t_mean).
    x = np.column_stack([np.ones(n), t - np.average(t, weights=w)])
    xw = x * w[:, None]
    operator = np.linalg.solve(x.T @ xw, xw.T)               # (2, n)
    c = operator[1]
    slope = float(c @ y)
    resid_op = np.eye(n) - x @ operator                      # I - H
    r = resid_op @ y
    rss = float(np.sum(w * r * r))
    root_w = np.sqrt(w)
    m = (root_w[:, None] * resid_op) @ cov_model @ (resid_op.T * root_w[None, :])
    trace = float(np.trace(m))
    dof = trace ** 2 / float(np.sum(m * m))
    if dof < 1.0:
        raise ValueError(f"the {n} windows hold only {dof + 2:.1f} effective independent windows "
                         f"(overlap {overlap}); a trend test needs at least 3")
    sigma2 = rss / trace
    slope_std = math.sqrt(sigma2 * float(c @ cov_model @ c))
    if slope_std > 0:
        t_stat = slope / slope_std
    else:                           # exact straight line: any non-zero slope is certain
        t_stat = math.copysign(math.inf, slope) if slope else 0.0
    p = _t_p_value(t_stat, dof, alternative)
    tau_k, p_k = _mann_kendall(t, y, rho, alternative)

    change = slope * SECONDS_PER_YEAR
    if kind == "level":
        rel = math.expm1(change) if change < 700.0 else math.inf     # exp overflows past ~709
    else:
        rel = math.nan
    significant = bool(p < alpha)
    text = _describe(kind, name, unit, slope, slope_std, rel, change, t_stat, dof, n, p,
                     alternative, alpha, significant, tau_k, p_k)
    return TrendTest(kind=kind, slope=slope, slope_std=slope_std,
                     relative_change_per_year=rel, change_per_year=change, t_statistic=t_stat,
                     dof=dof, n_windows=n, n_effective=dof + 2.0, p_value=p,
                     alternative=alternative, alpha=float(alpha), significant=significant,
                     kendall_tau=tau_k, kendall_p_value=p_k, description=text)


def _window_correlation(t: np.ndarray, overlap: float) -> np.ndarray:
    """rho(dt) = max(0, 1 - |dt| / W), W = median step / (1 - overlap)."""
    n = t.size
    if overlap == 0.0:
        return np.eye(n)
    width = float(np.median(np.diff(t))) / (1.0 - overlap)
    return np.maximum(0.0, 1.0 - np.abs(t[:, None] - t[None, :]) / width)


def _t_p_value(t_stat: float, dof: float, alternative: str) -> float:
    t_dist = scipy.stats.t
    if alternative == "two-sided":
        return float(min(1.0, 2.0 * t_dist.sf(abs(t_stat), dof)))
    if alternative == "increasing":
        return float(t_dist.sf(t_stat, dof))
    return float(t_dist.cdf(t_stat, dof))


def _mann_kendall(t: np.ndarray, y: np.ndarray, rho: np.ndarray, alternative: str):
    n = t.size
    tau, p_two = scipy.stats.kendalltau(t, y, method="asymptotic")
    if not np.isfinite(tau):        # all values equal
        return math.nan, math.nan
    z = scipy.stats.norm.isf(p_two / 2.0) * np.sign(tau)
    # Hamed & Rao (1998) variance factor with the lag correlations of the window model
    # (equal spacing assumed: rho_k read on the first row at lag k).
    k = np.arange(1, n)
    rho_k = rho[0, 1:]
    factor = 1.0 + 2.0 / (n * (n - 1) * (n - 2)) * float(
        np.sum((n - k) * (n - k - 1) * (n - k - 2) * rho_k))
    z = z / math.sqrt(factor)
    if alternative == "two-sided":
        p = 2.0 * scipy.stats.norm.sf(abs(z))
    elif alternative == "increasing":
        p = scipy.stats.norm.sf(z)
    else:
        p = scipy.stats.norm.cdf(z)
    return float(tau), float(min(1.0, p))


def _describe(kind, name, unit, slope, slope_std, rel, change, t_stat, dof, n, p, alternative,
              alpha, significant, tau_k, p_k) -> str:
    if kind == "level":
        direction = "rises" if slope > 0 else "falls" if slope < 0 else "does not change"
        size = f" by {abs(rel) * 100:.3g} % per year" if slope else ""
        head = f"{name} {direction}{size} (ln-slope {slope:.3e} +/- {slope_std:.2e} per s"
    else:
        u = f" {unit}" if unit else ""
        head = (f"{name} changes by {change:+.3e}{u} per year (slope {slope:.3e} +/- "
                f"{slope_std:.2e}{u} per s")
    verdict = "significant" if significant else "not significant"
    return (f"{head}; t = {t_stat:.3g}, {dof:.1f} degrees of freedom, {dof + 2:.1f} effective "
            f"of {n} windows; {alternative} p = {p:.2g}): {verdict} at alpha = {alpha:g}; "
            f"Mann-Kendall tau = {tau_k:.2f}, p = {p_k:.2g}.")


def _inputs(t_s, values, std, kind):
    t = np.asarray(t_s, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    if t.shape != v.shape:
        raise ValueError(f"t_s and values must have the same length, got {t.size} and {v.size}")
    if t.size < 4:
        raise ValueError(f"a trend test needs at least 4 windows, got {t.size}")
    for label, arr in (("t_s", t), ("values", v)):
        bad = ~np.isfinite(arr)
        if bad.any():
            raise ValueError(f"{label}[{int(np.flatnonzero(bad)[0])}] is not finite")
    if np.any(np.diff(t) <= 0):
        k = int(np.flatnonzero(np.diff(t) <= 0)[0]) + 1
        raise ValueError(f"t_s must be strictly increasing; t_s[{k}] = {float(t[k])!r} "
                         f"follows {float(t[k - 1])!r}")
    if kind == "level" and np.any(v <= 0):
        k = int(np.flatnonzero(v <= 0)[0])
        raise ValueError(f"values[{k}] = {float(v[k])!r}; a level must be > 0 "
                         f"(use kind='drift' for a quantity that can change sign)")
    u = None
    if std is not None:
        u = np.asarray(std, dtype=float).ravel()
        if u.shape != v.shape:
            raise ValueError(f"std must have the length of values ({v.size}), got {u.size}")
        bad = ~(np.isfinite(u) & (u > 0))
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise ValueError(f"std[{k}] = {float(u[k])!r}; expected a finite value > 0")
    return t, v, u
