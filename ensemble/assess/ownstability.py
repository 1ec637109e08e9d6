"""Internal: each clock's own Allan or Hadamard variance from its pairwise differences.

offset_i - offset_j = (clock i - scale) - (clock j - scale) = clock i - clock j, so the pair
differences do not contain the scale at all.  For independent clocks the variance of a
difference is the sum of the clocks' variances, and the N-cornered hat
(:func:`ensemble.stability.hat.n_cornered_hat`; Gray & Allan 1974 for three clocks, the
least-squares form for N clocks derived here) separates them at each averaging time.

Pairs are weighted by the inverse variance of their estimate, EDF / (2 S^2) (a chi-square
variance estimate), in two passes: first with S the measured pair variance, then with S from
the first pass's clock variances (model weights avoid the downward bias of data weights).  In a
mixed ensemble this matters: with equal weights a maser's estimate would carry the sampling
noise of every rubidium pair.

The EDF of each pair estimate is the Greenhall-Riley EDF (:func:`ensemble.stability.edf_greenhall`)
of the noise type identified on that pair difference at that averaging factor
(:func:`ensemble.stability.identify_noise`).  The clock estimate's EDF is 2 v^2 / u^2 from its
value v and propagated standard uncertainty u, and its confidence interval is the chi-square
interval with that EDF (:mod:`ensemble.stability.confidence`).

Resolution.  A clock is *resolved* at an averaging time when its estimate is positive and its
uncertainty at most half of it (EDF >= 8).  Two quiet clocks among much noisier ones (two
masers beside cesium beams) are not: their sum is known from their own pair, the split is not.
Each clock is at most as noisy as its quietest pair (sigma_i^2 <= sigma_ij^2 for independent
clocks), which is reported as its upper bound.  Downstream estimates that need a value for every
clock (noise fits, the scale's stability) use a *working* value: the estimate, capped at that
bound, where resolved; half of the quietest pair where not -- the same convention as the
ensemble's start-up (ensemble/engine/startup.py).  Reports say which values are working values.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..stability.confidence import deviation_interval
from ..stability.deviations import overlapping_avar_hvar
from ..stability.edf import edf_greenhall
from ..stability.hat import NegativeVarianceWarning, _pair_correlation, n_cornered_hat
from ..stability.noiseid import identify_noise

#: Kinds of variance and their difference order and statistic name (for noise identification).
KINDS = {"allan": (2, "oadev"), "hadamard": (3, "ohdev")}
#: Relative uncertainty at which an estimate counts as resolved (EDF >= 8).
RESOLVED_RELATIVE_STD = 0.5
#: Smallest EDF for which a chi-square interval is given (below: 0 to infinity).
MIN_INTERVAL_EDF = 0.1
#: Smallest share of epochs with a value for a clock to enter the hat.
MIN_COVERAGE = 0.1


@dataclass(frozen=True, eq=False)
class OwnStability:
    """Each clock's own variance at a set of averaging times (rows: clocks; columns: tau).

    Attributes
    ----------
    clocks : tuple of str, length N
    kind : str
        "allan" (overlapping Allan variance) or "hadamard" (overlapping Hadamard variance).
    m : ndarray of int, shape (n_tau,)
        Averaging factors.
    tau_s : ndarray, shape (n_tau,)
        Averaging times m tau0. [s]
    variance : ndarray, shape (N, n_tau)
        Raw hat estimate (may be negative; NaN where not estimated). [1]
    std : ndarray, shape (N, n_tau)
        Its standard uncertainty. [1]
    covariance : ndarray, shape (n_tau, N, N)
        Covariance of the estimates of all clocks at each tau. [1]
    edf : ndarray, shape (N, n_tau)
        2 v^2 / std^2 where the estimate is positive, else NaN.
    deviation, lo, hi : ndarray, shape (N, n_tau)
        sqrt of the estimate and its confidence interval (NaN where the estimate is not
        positive). [1]
    upper_bound : ndarray, shape (N, n_tau)
        Deviation of the clock's quietest pair: the clock cannot be noisier. [1]
    resolved : ndarray of bool, shape (N, n_tau)
        Estimate positive with a relative uncertainty of at most one half.
    working : ndarray, shape (N, n_tau)
        Value used by downstream estimates (see the module notes). [1]
    working_edf : ndarray, shape (N, n_tau)
        EDF attached to ``working``.
    pairs : tuple of (int, int)
        Column pairs of the differences.
    pair_variance, pair_edf : ndarray, shape (n_pairs, n_tau)
        Variance of each pair difference and its EDF.
    alpha : ndarray of int, shape (n_pairs, n_tau)
        Noise exponent used for each pair's EDF.
    confidence : float
        Two-sided probability of ``lo`` .. ``hi``.
    """

    clocks: tuple
    kind: str
    m: np.ndarray
    tau_s: np.ndarray
    variance: np.ndarray
    std: np.ndarray
    covariance: np.ndarray
    edf: np.ndarray
    deviation: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    upper_bound: np.ndarray
    resolved: np.ndarray
    working: np.ndarray
    working_edf: np.ndarray
    pairs: tuple
    pair_variance: np.ndarray
    pair_edf: np.ndarray
    alpha: np.ndarray
    confidence: float


def own_stability(offset_s: np.ndarray, tau0_s: float, m, kind: str, *, clocks,
                  confidence: float, alpha: np.ndarray | None = None) -> OwnStability:
    """Separate each clock's own variance from the variances of its pair differences.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        Clock - scale (or any common reference) on a regular grid; NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    m : sequence of int
        Averaging factors.
    kind : {"allan", "hadamard"}
    clocks : sequence of str, length N
    confidence : float
        Two-sided probability of the intervals.
    alpha : ndarray of int, shape (n_pairs, len(m)), optional
        Noise exponents for the EDF (default: identified on each pair difference).  Pairs are
        all i < j of the clocks with data, in row-major order.

    Returns
    -------
    OwnStability
    """
    order, statistic = KINDS[kind]
    x = np.asarray(offset_s, dtype=float)
    n_t, n_c = x.shape
    ms = np.asarray(m, dtype=int)
    usable = np.flatnonzero(np.isfinite(x).mean(axis=0) >= MIN_COVERAGE)
    pairs = tuple((int(a), int(b)) for k, a in enumerate(usable) for b in usable[k + 1:])
    shape = (n_c, ms.size)
    out = {name: np.full(shape, np.nan) for name in ("variance", "std", "edf", "upper_bound",
                                                     "working", "working_edf")}
    cov = np.full((ms.size, n_c, n_c), np.nan)
    n_p = len(pairs)
    pv = np.full((n_p, ms.size), np.nan)
    pe = np.full((n_p, ms.size), np.nan)
    al = np.zeros((n_p, ms.size), dtype=int)
    if n_p:
        diff = np.column_stack([x[:, a] - x[:, b] for a, b in pairs])
        ov = overlapping_avar_hvar(diff, tau0_s, ms)
        var = np.asarray(ov.avar if kind == "allan" else ov.hvar).T       # (P, n_tau)
        cnt = np.asarray(ov.n_avar if kind == "allan" else ov.n_hvar).T
        if alpha is None:
            al = _identify(diff, tau0_s, ms, statistic, cnt)
        else:
            al = np.asarray(alpha, dtype=int)
        pe = _pair_edf(al, ms, cnt, order)
        pv = np.where((cnt >= 2) & (var > 0), var, np.nan)
        pe = np.where(np.isfinite(pv), pe, np.nan)
    if usable.size >= 3:
        for k in range(ms.size):
            _separate(k, pv[:, k], pe[:, k], pairs, usable, n_c, out, cov)
    v, s = out["variance"], out["std"]
    with np.errstate(invalid="ignore", divide="ignore"):
        pos = np.isfinite(v) & (v > 0) & np.isfinite(s)
        out["edf"] = np.where(pos, 2.0 * (v / np.where(pos & (s > 0), s, 1.0)) ** 2, np.nan)
        out["edf"] = np.where(pos & (s == 0), np.inf, out["edf"])
    dev = np.where(pos, np.sqrt(np.where(pos, v, 1.0)), np.nan)
    lo, hi = np.full(shape, np.nan), np.full(shape, np.nan)
    fin = pos & np.isfinite(out["edf"]) & (out["edf"] >= MIN_INTERVAL_EDF)
    if fin.any():
        lo[fin], hi[fin] = deviation_interval(dev[fin], out["edf"][fin], confidence)
    exact = pos & np.isinf(out["edf"])
    lo = np.where(exact, dev, lo)
    hi = np.where(exact, dev, hi)
    vague = pos & ~fin & ~exact          # EDF below 0.1: the data say nothing about the value
    lo = np.where(vague, 0.0, lo)
    hi = np.where(vague, np.inf, hi)
    resolved = pos & (s <= RESOLVED_RELATIVE_STD * np.where(pos, v, 0.0))
    return OwnStability(clocks=tuple(clocks), kind=kind, m=ms, tau_s=ms * float(tau0_s),
                        variance=v, std=s, covariance=cov, edf=out["edf"], deviation=dev,
                        lo=lo, hi=hi, upper_bound=np.sqrt(out["upper_bound"]),
                        resolved=resolved, working=out["working"],
                        working_edf=out["working_edf"], pairs=pairs, pair_variance=pv,
                        pair_edf=pe, alpha=al, confidence=float(confidence))


def _identify(diff: np.ndarray, tau0_s: float, ms: np.ndarray, statistic: str,
              cnt: np.ndarray) -> np.ndarray:
    """Dominant noise exponent of each pair difference at each factor (white FM if unknown)."""
    lo_alpha = -4 if statistic == "ohdev" else -2
    al = np.zeros(cnt.shape, dtype=int)
    for p in range(diff.shape[1]):
        for k, mk in enumerate(ms):
            if cnt[p, k] < 2:
                continue
            est = identify_noise(diff[:, p], tau0_s, int(mk), statistic=statistic)
            if est.alpha is not None:
                al[p, k] = int(min(2, max(lo_alpha, est.alpha)))
    return al


def _pair_edf(al: np.ndarray, ms: np.ndarray, cnt: np.ndarray, order: int) -> np.ndarray:
    edf = np.full(cnt.shape, np.nan)
    for (p, k), n in np.ndenumerate(cnt):
        if n >= 2:
            edf[p, k] = _edf(int(al[p, k]), int(ms[k]), _quantised(int(n)), order)
    return edf


def _quantised(n: int) -> int:
    """Term count rounded to three significant digits (the EDF changes by < 1 %), so that
    pairs and windows with slightly different gaps share one EDF evaluation."""
    if n < 100:
        return n
    digits = 10 ** (int(math.log10(n)) - 2)
    return int(round(n / digits) * digits)


@functools.lru_cache(maxsize=4096)
def _edf(alpha: int, m: int, n: int, order: int) -> float:
    return edf_greenhall(alpha, m, n, order=order, overlapping=True)


def _separate(k: int, s: np.ndarray, edf: np.ndarray, pairs, usable, n_c: int, out: dict,
              cov: np.ndarray) -> None:
    """Two-pass inverse-variance-weighted hat at one tau column; fills row values in place."""
    ok = np.isfinite(s)
    if ok.sum() < 3:
        return
    names = [str(c) for c in usable]
    col = {c: j for j, c in enumerate(usable)}
    sel = [p for p, good in zip(pairs, ok) if good]
    lab = [(str(a), str(b)) for a, b in sel]
    sk, ek = s[ok], edf[ok]
    a_mat = np.zeros((len(sel), usable.size))
    for r, (a, b) in enumerate(sel):
        a_mat[r, col[a]] = a_mat[r, col[b]] = 1.0
    if np.linalg.matrix_rank(a_mat) < usable.size:
        return
    weights = ek / sk ** 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NegativeVarianceWarning)
        hat = n_cornered_hat(sk, lab, pair_edf=ek, weights=weights / weights.max(),
                             clocks=names, warn=False)
        model = np.maximum(a_mat @ np.maximum(hat.variance, 0.0), 0.5 * sk)
        weights = ek / model ** 2
        weights = weights / weights.max()
        hat = n_cornered_hat(sk, lab, pair_edf=ek, weights=weights, clocks=names, warn=False)
    est = np.asarray(hat.variance, dtype=float)
    # Full covariance B C B^T of the estimate B s (the hat gives its diagonal as std^2).
    aw = a_mat * weights[:, None]
    b_op = np.linalg.solve(a_mat.T @ aw, aw.T)
    u = np.abs(sk) * np.sqrt(2.0 / ek)
    c_pairs = np.outer(u, u) * _pair_correlation(a_mat, est, "shared-clock")
    c_est = b_op @ c_pairs @ b_op.T
    rows = np.asarray(usable)
    out["variance"][rows, k] = est
    out["std"][rows, k] = hat.std
    cov[k][np.ix_(rows, rows)] = 0.5 * (c_est + c_est.T)
    # quietest pair of each clock: an upper bound of its variance, and its EDF
    bound = np.array([np.min(sk[a_mat[:, j] > 0]) if np.any(a_mat[:, j] > 0) else np.nan
                      for j in range(usable.size)])
    bound_edf = np.array([ek[a_mat[:, j] > 0][np.argmin(sk[a_mat[:, j] > 0])]
                          if np.any(a_mat[:, j] > 0) else np.nan for j in range(usable.size)])
    std = np.asarray(hat.std, dtype=float)
    good = (est > 0) & (std <= RESOLVED_RELATIVE_STD * np.maximum(est, 0.0))
    out["upper_bound"][rows, k] = bound
    out["working"][rows, k] = np.where(good, np.minimum(est, bound), 0.5 * bound)
    with np.errstate(invalid="ignore", divide="ignore"):
        edf_est = 2.0 * (est / np.where(std > 0, std, np.nan)) ** 2
    out["working_edf"][rows, k] = np.where(good, edf_est, bound_edf)
