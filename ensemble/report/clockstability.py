"""Internal: stability of each clock and of the scale for the report, by the N-cornered hat.

Each clock's offset from the scale is x_i = clock_i - scale, so the difference of two offsets,
x_i - x_j = clock_i - clock_j, holds no scale at all.  The report computes the overlapping
Hadamard variance (drift-insensitive; SP 1065, 2008) of every pair difference and separates
the clocks with the N-cornered hat (:func:`ensemble.stability.hat.n_cornered_hat`,
sigma_ij^2 = sigma_i^2 + sigma_j^2 for independent clocks).

**All pairs at once.**  The overlapping Hadamard variance is a quadratic form.  With the
third differences d_i(t) = x_i(t+3m) - 3 x_i(t+2m) + 3 x_i(t+m) - x_i(t), v_i(t) = 1 when all
four points are present (else 0, and d_i(t) set to 0), the variance of a pair over the terms
valid for both clocks is::

    s_ij = sum_t v_i v_j (d_i - d_j)^2 / (6 tau^2 n_ij)
         = (E_ij + E_ji - 2 G_ij) / (6 tau^2 n_ij),
    G = D^T D,   E_ij = sum_t d_i(t)^2 v_j(t),   n = V^T V,

three matrix products per averaging factor instead of N(N-1)/2 passes over the data.  The gap
rule is the one of :func:`ensemble.stability.overlapping_avar_hvar` on the differences (a term
is used when all its points are present).

**Cleaning.**  The assessment's cleaning (:func:`ensemble.assess.history.clean_offsets`):
epochs of detected outliers are left out (NaN) for their clock, and detected phase steps,
frequency steps and drift changes are taken out with their estimated sizes, so the curves show
the clocks' noise (the events are marked on the offset plots).

**Uncertainty.**  The EDF of each pair's variance is the Greenhall-Riley EDF
(:func:`ensemble.stability.edf_for`) for the noise type of the noisier clock of the pair
(identified on that clock's own offset series, :func:`ensemble.stability.identify_noise`;
carried from a shorter tau when too few samples remain).  The hat propagates them to a standard
uncertainty u_i of each clock's variance; the interval of the deviation is the chi-squared
interval with the effective degrees of freedom nu_i = 2 (sigma_i^2 / u_i)^2 (Satterthwaite's
approximation).

**Resolution and bounds** (as in the assessment, :mod:`ensemble.assess.ownstability`).  For
independent clocks sigma_i^2 <= sigma_ij^2 for every pair, so each clock is at most as noisy as
its quietest pair.  A clock is *resolved* at an averaging time when its estimate is positive
and its uncertainty is at most half of it (EDF >= 8), and then shown with its interval.
Otherwise the figure shows an upper bound, the smaller of sqrt(var + sd) and the quietest
pair's deviation.  Two quiet clocks beside much noisier ones (two masers among cesium beams)
are typically not resolved: their sum is known from their own pair, the split is not.

**Many clocks.**  The hat's uncertainty needs the covariance of all pair estimates, which
grows as N^4.  With more than :data:`ALL_PAIRS_MAX` clocks each clock is separated, at each
tau, with the :data:`PANEL_SIZE` most stable other clocks (ranked by the median of their pair
variances at that tau): a hat of PANEL_SIZE + 1 clocks per clock.

**The scale.**  For independent clocks combined with weights w_j, the scale's variance is
sum_j w_j^2 sigma_j^2 (any quadratic-form variance).  The report uses the mean of w_j(t)^2
over the epochs of the report, the clocks' hat estimates, and the uncertainty
u^2 = sum_j (mean w_j^2)^2 u_j^2 (clock estimates taken as independent).  A clock that is not
resolved enters with the assessment's working value, half of its quietest pair's variance b,
with the standard uncertainty b / sqrt(12) of a value known only to lie between 0 and b
(uniform distribution); a resolved one enters capped at its bound.  It is an estimate of what
the weighting achieves, not a measurement of the scale: the scale cannot be compared with
anything better inside the laboratory.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..assess.history import clean_offsets
from ..assess.ownstability import RESOLVED_RELATIVE_STD
from ..stability.confidence import CONFIDENCE_68, deviation_interval
from ..stability.deviations import averaging_factors, max_factor
from ..stability.edf import edf_for
from ..stability.grid import on_grid
from ..stability.hat import NegativeVarianceWarning, n_cornered_hat
from ..stability.noiseid import NOISE_CODES, identify_noise

#: Statistic of the report's stability figures.
STATISTIC = "ohdev"
#: Up to this many clocks the hat uses every pair at once.
ALL_PAIRS_MAX = 30
#: Clocks each clock is separated with when there are more than ALL_PAIRS_MAX.
PANEL_SIZE = 8
#: Floor of a pair variance in its least-squares weight (a pair of identical series).
_TINY = 1e-60
#: Averaging times added to the octave ones when they are multiples of tau0 [d].
EXTRA_TAUS_D = (1.0, 10.0, 100.0)


@dataclass
class ClockStability:
    """Hat estimates of every clock and the scale estimate, at each averaging time.

    Attributes
    ----------
    tau_s : ndarray, shape (n_tau,)
        Averaging times. [s]
    clocks : tuple of str
        Clock names (rows of the arrays).
    deviation, lo, hi : ndarray, shape (n_clocks, n_tau)
        Overlapping Hadamard deviation of each clock and its 68.3 % interval; NaN where the
        hat gave none or a variance <= 0. [1]
    variance, variance_sd : ndarray, shape (n_clocks, n_tau)
        The hat's variance estimates (may be negative) and their standard uncertainty. [1]
    pair_bound : ndarray, shape (n_clocks, n_tau)
        Variance of each clock's quietest pair, the most its own variance can be. [1]
    noise : ndarray of object, shape (n_clocks, n_tau)
        Noise code found on the clock's offset series at each tau ("WFM" ...), "" if none.
    scale_deviation, scale_lo, scale_hi : ndarray, shape (n_tau,)
        The scale estimate sqrt(sum_j mean(w_j^2) sigma_j^2) and its interval. [1]
    method : str
        "all pairs" or "panel of the N most stable clocks".
    notes : list of str
        Negative estimates and other remarks, one line each.
    """

    tau_s: np.ndarray
    clocks: tuple
    deviation: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    variance: np.ndarray
    variance_sd: np.ndarray
    pair_bound: np.ndarray
    noise: np.ndarray
    scale_deviation: np.ndarray
    scale_lo: np.ndarray
    scale_hi: np.ndarray
    method: str
    notes: list = field(default_factory=list)


def factors_for(n_epochs: int, tau0_s: float) -> np.ndarray:
    """Octave averaging factors plus those of 1 d, 10 d and 100 d when they are multiples.

    Octave factors within 20 % of one of those are dropped; the largest octave factor is the
    last with at least one term of the overlapping Hadamard variance.
    """
    base = averaging_factors(n_epochs, STATISTIC, "octave")
    if not base.size:
        return base
    extra = []
    for days in EXTRA_TAUS_D:
        ratio = days * 86400.0 / tau0_s
        k = round(ratio)
        if k >= 1 and abs(ratio - k) < 1e-9 * ratio and k <= max_factor(STATISTIC, n_epochs):
            extra.append(k)
    extra_a = np.asarray(extra, dtype=np.int64)
    if extra_a.size:
        # An octave factor within 20 % of a whole-day one adds nothing to read: leave it out.
        ratio = base[:, None] / extra_a[None, :]
        base = base[~np.any((ratio > 1 / 1.2) & (ratio < 1.2) & (ratio != 1), axis=1)]
    return np.unique(np.concatenate([base, extra_a]))


def pair_hadamard(x_s: np.ndarray, tau0_s: float, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Overlapping Hadamard variance of every pair difference x_i - x_j at factor m.

    Parameters
    ----------
    x_s : ndarray, shape (T, N)
        Phase series (clock - scale); NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    m : int
        Averaging factor.

    Returns
    -------
    variance : ndarray, shape (N, N)
        s_ij (NaN on the diagonal and where no term is valid). [1]
    count : ndarray of int, shape (N, N)
        Number of third differences used for each pair.
    """
    t = x_s.shape[0]
    nt = t - 3 * m
    n = x_s.shape[1]
    if nt < 1:
        return np.full((n, n), np.nan), np.zeros((n, n), dtype=np.int64)
    d = x_s[3 * m:3 * m + nt] - 3.0 * x_s[2 * m:2 * m + nt] + 3.0 * x_s[m:m + nt] - x_s[:nt]
    valid = np.isfinite(d)
    d = np.where(valid, d, 0.0)
    v = valid.astype(float)
    gram = d.T @ d
    energy = (d * d).T @ v
    count = np.rint(v.T @ v).astype(np.int64)
    tau2 = (m * tau0_s) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        s = (energy + energy.T - 2.0 * gram) / (6.0 * tau2 * count)
    s[count == 0] = np.nan
    np.fill_diagonal(s, np.nan)
    return np.maximum(s, 0.0), count     # rounding only can make a sum of squares < 0


@functools.lru_cache(maxsize=4096)
def _edf(alpha: int, m: int, n_terms: int, n_points: int) -> float:
    return float(edf_for(STATISTIC, alpha, m, n_terms, n_points))


def _noise_types(x_s: np.ndarray, tau0_s: float, factors) -> np.ndarray:
    """Power-law exponent alpha of each clock's offset series at each factor, shape (N, n_m).

    Where too few samples remain to identify it, the value of the next shorter factor is
    carried; white FM (0) when there is none.
    """
    n = x_s.shape[1]
    alphas = np.zeros((n, len(factors)), dtype=int)
    for i in range(n):
        col = x_s[:, i]
        last = 0
        for k, m in enumerate(factors):
            est = identify_noise(col, tau0_s, int(m), data="phase", statistic=STATISTIC) \
                if np.isfinite(col).sum() > 3 * m + 1 else None
            if est is not None and est.alpha is not None:
                last = int(est.alpha)
            alphas[i, k] = last
    return alphas


def clock_stability(offset_s, mjd, clocks, tau0_s: float, weights=None, events=None,
                    confidence: float = CONFIDENCE_68,
                    elapsed_s=None) -> ClockStability | None:
    """Hat estimates of each clock's and the scale's overlapping Hadamard deviation.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        Clock - scale over the report's epochs. [s]
    mjd : ndarray, shape (T,)
        Epochs. [d]
    clocks : sequence of str
        Column names.
    tau0_s : float
        Nominal sampling interval. [s]
    weights : ndarray, shape (T, N), optional
        The clocks' weights in the scale over the same epochs [1] (for the scale estimate).
    events : DataFrame, optional
        The /events table (for :func:`clean_offsets`).
    confidence : float
        Two-sided probability of the intervals.
    elapsed_s : ndarray, shape (T,), optional
        The epochs on the continuous time axis (/measurements/elapsed) [s].  When given, the
        rows are placed on the regular sampling grid first (:func:`ensemble.stability.grid.
        on_grid`: a missing epoch becomes a row of NaN), so no difference spans a gap; without
        it the rows are taken as consecutive grid slots.

    Returns
    -------
    ClockStability, or None with fewer than three clocks that have data.
    """
    clocks = tuple(clocks)
    x_all = clean_offsets(offset_s, np.asarray(mjd, dtype=float), clocks, events)
    if elapsed_s is not None and len(elapsed_s):
        _, _, (x_all,) = on_grid(np.asarray(elapsed_s, dtype=float), tau0_s, x_all)
    has = np.isfinite(x_all).sum(axis=0) >= 8
    use = np.flatnonzero(has)
    if use.size < 3:
        return None
    x = x_all[:, use]
    factors = factors_for(x.shape[0], tau0_s)
    if not factors.size:
        return None
    n_all, n_tau = len(clocks), factors.size
    alphas = _noise_types(x, tau0_s, factors)
    var = np.full((n_all, n_tau), np.nan)
    var_sd = np.full((n_all, n_tau), np.nan)
    bound = np.full((n_all, n_tau), np.nan)
    notes: list[str] = []
    t_points = x.shape[0]
    panel = use.size > ALL_PAIRS_MAX
    for k, m in enumerate(factors):
        s, count = pair_hadamard(x, tau0_s, int(m))
        est, sd = _hat_at(s, count, alphas[:, k], int(m), t_points, panel)
        var[use, k] = est
        var_sd[use, k] = sd
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)          # a clock without pairs
            bound[use, k] = np.nanmin(s, axis=1)
    tau = factors * float(tau0_s)
    dev, lo, hi = _intervals(var, var_sd, confidence, bound)
    noise = np.full((n_all, n_tau), "", dtype=object)
    noise[use] = np.vectorize(lambda a: NOISE_CODES.get(int(a), ""), otypes=[object])(alphas)
    for i in range(n_all):
        open_ = np.flatnonzero(np.isfinite(var[i]) & ~np.isfinite(dev[i]))
        if open_.size:
            where = ", ".join(_tau_text(v) for v in tau[open_][:4])
            more = f" and {open_.size - 4} more" if open_.size > 4 else ""
            notes.append(f"{clocks[i]}: not resolved at tau = {where}{more} (the hat's "
                         f"estimate is not clearly above its uncertainty: the clock is much "
                         f"better than the others there, or the record is short); shown as "
                         f"upper bounds")
    s_dev, s_lo, s_hi = _scale_estimate(var, var_sd, bound, weights, confidence)
    method = ("all pairs" if not panel else
              f"each clock with the {PANEL_SIZE} most stable other clocks")
    return ClockStability(tau_s=tau, clocks=clocks, deviation=dev, lo=lo, hi=hi,
                          variance=var, variance_sd=var_sd, pair_bound=bound, noise=noise,
                          scale_deviation=s_dev, scale_lo=s_lo, scale_hi=s_hi, method=method,
                          notes=notes)


def _tau_text(tau_s: float) -> str:
    return f"{tau_s / 86400.0:.3g} d" if tau_s >= 86400.0 else f"{tau_s / 3600.0:.3g} h" \
        if tau_s >= 3600.0 else f"{tau_s:.3g} s"


def _hat_at(s, count, alpha, m, t_points, panel):
    """Hat estimates (variance, its sd) of every clock at one factor; NaN where none."""
    n = s.shape[0]
    est = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        level = np.nanmedian(s, axis=1)      # sigma_i^2 + typical sigma_j^2: ranks the clocks
    if panel:
        order = [i for i in np.argsort(np.where(np.isfinite(level), level, np.inf))
                 if np.isfinite(level[i])]
        for i in range(n):
            if not np.isfinite(level[i]):
                continue
            others = [j for j in order if j != i and np.isfinite(s[i, j])][:PANEL_SIZE]
            group = [i] + others
            e, u = _solve(s, count, level, alpha, m, t_points, group)
            if e is not None:
                est[i], sd[i] = e[0], u[0]
        return est, sd
    group = [i for i in range(n) if np.isfinite(s[i]).any()]
    e, u = _solve(s, count, level, alpha, m, t_points, group)
    if e is not None:
        est[group], sd[group] = e, u
    return est, sd


def _solve(s, count, level, alpha, m, t_points, group):
    """One hat over the clocks ``group`` (indices); (variances, sds) in group order or None.

    The EDF of a pair uses the noise type of its noisier clock (larger ``level``).
    """
    if len(group) < 3:
        return None, None
    pairs, values, edfs = [], [], []
    for a_pos, i in enumerate(group):
        for j in group[a_pos + 1:]:
            if count[i, j] < 1 or not np.isfinite(s[i, j]):
                continue
            noisier = i if level[i] >= level[j] else j
            pairs.append((i, j))
            values.append(s[i, j])
            edfs.append(_edf(int(alpha[noisier]), m, int(count[i, j]), t_points))
    if len(pairs) < 3:
        return None, None
    present = sorted({c for p in pairs for c in p})
    if len(present) < 3:
        return None, None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NegativeVarianceWarning)
            values_a, edf_a = np.asarray(values), np.asarray(edfs)
            # Inverse-variance least squares: Var[s_p] = 2 s_p^2 / edf_p (chi-square model).
            res = n_cornered_hat(values_a, pairs, pair_edf=edf_a,
                                 weights=edf_a / np.maximum(values_a, _TINY) ** 2,
                                 clocks=present, warn=False)
    except ValueError:
        return None, None
    index = {c: k for k, c in enumerate(present)}
    e = np.array([res.variance[index[c]] if c in index else np.nan for c in group])
    u = np.array([res.std[index[c]] if c in index else np.nan for c in group])
    return e, u


def _resolved(var, sd):
    """Estimate positive with a relative uncertainty of at most one half (the assessment's rule)."""
    with np.errstate(invalid="ignore"):
        return (np.isfinite(var) & np.isfinite(sd) & (var > 0)
                & (sd <= RESOLVED_RELATIVE_STD * var))


def _intervals(var, sd, confidence, bound=None):
    """Deviation and chi-squared interval where the estimate is resolved, else an upper bound.

    Resolved: see :func:`_resolved`; the interval uses nu = 2 (var / sd)^2 >= 8 degrees of
    freedom (the estimate as it is: the quietest pair is itself an estimate, and cutting at it
    would bias the interval).  Otherwise the deviation is NaN and ``hi`` holds the upper bound:
    the smaller of sqrt(var + sd) (one sigma above the estimate) and sqrt(bound), the quietest
    pair (a clock cannot be noisier).
    """
    if bound is None:
        bound = np.full(var.shape, np.nan)
    dev = np.full(var.shape, np.nan)
    lo = np.full(var.shape, np.nan)
    hi = np.full(var.shape, np.nan)
    ok = _resolved(var, sd) & (sd > 0)
    if ok.any():
        nu = 2.0 * (var[ok] / sd[ok]) ** 2
        d = np.sqrt(var[ok])
        lo[ok], hi[ok] = deviation_interval(d, nu, confidence)
        dev[ok] = d
    with np.errstate(invalid="ignore"):
        above = np.where(np.isfinite(var) & np.isfinite(sd) & (var + sd > 0), var + sd, np.nan)
        cap = np.fmin(above, np.where(bound > 0, bound, np.nan))
    rest = ~ok & np.isfinite(cap)
    hi[rest] = np.sqrt(cap[rest])
    return dev, lo, hi


def _scale_estimate(var, sd, bound, weights, confidence):
    """sqrt(sum_j mean(w_j^2) sigma_j^2) and its interval at each tau (NaN without weights).

    sigma_j^2 is the clock's working value: its estimate capped at its quietest-pair bound b where
    resolved, b / 2 with uncertainty b / sqrt(12) where not (see the module notes).
    """
    n_tau = var.shape[1]
    nan = np.full(n_tau, np.nan)
    if weights is None:
        return nan, nan.copy(), nan.copy()
    w = np.asarray(weights, dtype=float)
    w2 = np.nanmean(np.where(np.isfinite(w), w, 0.0) ** 2, axis=0)
    weighted = w2 > 0
    if not weighted.any():
        return nan, nan.copy(), nan.copy()
    resolved = _resolved(var, sd)
    with np.errstate(invalid="ignore"):
        work = np.where(resolved, np.fmin(var, bound), 0.5 * bound)
        work_sd = np.where(resolved, sd, bound / math.sqrt(12.0))
        # no bound (no pair): the raw estimate, as before
        work = np.where(np.isfinite(work), work, np.maximum(var, 0.0))
        work_sd = np.where(np.isfinite(work_sd), work_sd, sd)
    v = work[weighted]
    u = work_sd[weighted]
    c = w2[weighted][:, None]
    known = np.isfinite(v).all(axis=0)
    total = np.sum(c * np.where(np.isfinite(v), v, 0.0), axis=0)
    total_sd = np.sqrt(np.sum((c * np.where(np.isfinite(u), u, 0.0)) ** 2, axis=0))
    total = np.where(known, total, np.nan)
    dev, lo, hi = _intervals(total[None, :], total_sd[None, :], confidence)
    return dev[0], lo[0], hi[0]
