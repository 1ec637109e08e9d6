"""Time-error statistics of ITU-T G.810 (Appendix II): TIE, TIE rms and MTIE.

x_i is the time error (phase) against the reference, sampled every tau0 [s]; tau = n tau0
(formulas recalled from memory, checked against closed forms in tests/test_timeerror.py)::

    TIE(t_i; tau) = x_{i+n} - x_i
    TIE_rms(tau)  = sqrt(mean_i TIE(t_i; tau)^2)
    MTIE(tau)     = max_k [ max_{k<=i<=k+n} x_i - min_{k<=i<=k+n} x_i ]    (windows of n+1 samples)

MTIE uses running maxima and minima (:func:`scipy.ndimage.maximum_filter1d`,
:func:`~scipy.ndimage.minimum_filter1d`), whose cost does not grow with the window length, so
each tau costs O(N).

Missing samples (NaN): a TIE needs both of its end points; an MTIE window is skipped if it holds
any NaN.  Every statistic reports how many differences or windows it used.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import maximum_filter1d, minimum_filter1d

__all__ = ["TimeErrorStatistic", "tie", "tie_rms", "mtie", "octave_window_lengths"]


@dataclass(frozen=True, eq=False)
class TimeErrorStatistic:
    """One time-error statistic evaluated at several observation intervals.

    Attributes
    ----------
    tau_s : ndarray, shape (n_tau,)
        Observation interval n tau0. [s]
    n : ndarray of int, shape (n_tau,)
        Window length in sampling intervals.
    value_s : ndarray, shape (n_tau,)
        The statistic (TIE rms or MTIE); NaN where no complete difference or window exists. [s]
    n_used : ndarray of int, shape (n_tau,)
        Number of TIE differences (TIE rms) or windows (MTIE) that entered each value.
    frequency_removed : float
        Fractional-frequency offset removed before the statistic (0 if none). [1]
    """

    tau_s: np.ndarray
    n: np.ndarray
    value_s: np.ndarray
    n_used: np.ndarray
    frequency_removed: float = 0.0


def octave_window_lengths(n_samples: int) -> np.ndarray:
    """Window lengths 1, 2, 4, ... up to n_samples - 1 (in sampling intervals).

    Parameters
    ----------
    n_samples : int
        Number of phase samples N.

    Returns
    -------
    ndarray of int
    """
    if n_samples < 2:
        raise ValueError(f"need at least 2 phase samples, got {n_samples}")
    return 2 ** np.arange(int(np.floor(np.log2(n_samples - 1))) + 1)


def tie(phase_s, n: int) -> np.ndarray:
    """Time interval error TIE(t_i; n tau0) = x_{i+n} - x_i.

    Parameters
    ----------
    phase_s : ndarray, shape (N,)
        Time error x_i, uniformly sampled; NaN where missing. [s]
    n : int
        Observation interval in sampling intervals, 1 <= n <= N - 1.

    Returns
    -------
    ndarray, shape (N - n,)
        TIE for each start sample; NaN where either end is missing. [s]
    """
    x = _phase(phase_s)
    n = _window(n, x.size)
    return x[n:] - x[:-n]


def tie_rms(phase_s, tau0_s: float, n=None, *,
            remove_frequency: bool = False) -> TimeErrorStatistic:
    """Root-mean-square TIE over all start times, at each observation interval.

    Parameters
    ----------
    phase_s : ndarray, shape (N,)
        Time error, uniformly sampled; NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    n : int or sequence of int, optional
        Observation intervals in sampling intervals; default 1, 2, 4, ... < N.
    remove_frequency : bool
        Remove the least-squares frequency offset first (the slope of a straight line fitted
        to the available phase samples).  Without it TIE rms contains y0 * tau.

    Returns
    -------
    TimeErrorStatistic
        ``value_s`` is sqrt(mean TIE^2) over the TIEs whose both ends are present; ``n_used`` is
        their number.
    """
    x = _phase(phase_s)
    tau0 = _tau0(tau0_s)
    ns = _windows(n, x.size)
    y0 = 0.0
    if remove_frequency:
        x, y0 = _remove_frequency(x, tau0)
    values = np.full(ns.size, np.nan)
    used = np.zeros(ns.size, dtype=int)
    for k, m in enumerate(ns):
        d = x[m:] - x[:-m]
        d = d[np.isfinite(d)]
        used[k] = d.size
        if d.size:
            values[k] = np.sqrt(np.mean(d * d))
    return TimeErrorStatistic(tau_s=ns * tau0, n=ns, value_s=values, n_used=used,
                              frequency_removed=y0)


def mtie(phase_s, tau0_s: float, n=None) -> TimeErrorStatistic:
    """Maximum time interval error (G.810), windows of n + 1 samples.

    Parameters
    ----------
    phase_s : ndarray, shape (N,)
        Time error, uniformly sampled; NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    n : int or sequence of int, optional
        Observation intervals in sampling intervals, 1 <= n <= N - 1; default 1, 2, 4, ... < N.

    Returns
    -------
    TimeErrorStatistic
        ``value_s`` = max over windows of (max - min) of x in the window; windows containing
        a NaN are skipped and ``n_used`` counts the windows kept (N - n without gaps).  NaN
        where no complete window exists.

    Notes
    -----
    MTIE(n tau0) = max_{1<=k<=N-n} [max_{k<=i<=k+n} x_i - min_{k<=i<=k+n} x_i]
    (ITU-T G.810, Appendix II; recalled from memory).
    The running maximum and minimum of width n + 1 are centred at k + (n + 1) // 2 by
    scipy.ndimage, hence the slice below.  MTIE of random noise grows with the record length
    (an extreme value): quote it with the record length.
    """
    x = _phase(phase_s)
    tau0 = _tau0(tau0_s)
    ns = _windows(n, x.size)
    missing = np.isnan(x)
    filled = np.where(missing, 0.0, x)
    # Cumulative count of missing samples: window [k, k+n] has c[k+n+1] - c[k] of them.
    count = np.concatenate(([0], np.cumsum(missing)))
    values = np.full(ns.size, np.nan)
    used = np.zeros(ns.size, dtype=int)
    n_samples = x.size
    for k, m in enumerate(ns):
        size = int(m) + 1
        start = size // 2
        stop = start + n_samples - int(m)
        hi = maximum_filter1d(filled, size=size, mode="nearest")[start:stop]
        lo = minimum_filter1d(filled, size=size, mode="nearest")[start:stop]
        complete = (count[size:] - count[:-size]) == 0
        used[k] = int(complete.sum())
        if used[k]:
            values[k] = float(np.max((hi - lo)[complete]))
    return TimeErrorStatistic(tau_s=ns * tau0, n=ns, value_s=values, n_used=used)


def _remove_frequency(x: np.ndarray, tau0: float) -> tuple[np.ndarray, float]:
    t = np.arange(x.size) * tau0
    ok = np.isfinite(x)
    if ok.sum() < 2:
        raise ValueError("removing a frequency offset needs at least 2 phase samples")
    slope, intercept = np.polyfit(t[ok], x[ok], 1)
    return x - (slope * t + intercept), float(slope)


def _phase(phase_s) -> np.ndarray:
    x = np.asarray(phase_s, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"phase_s must be one-dimensional, got shape {x.shape}")
    if x.size < 2:
        raise ValueError(f"need at least 2 phase samples, got {x.size}")
    if np.isinf(x).any():
        k = int(np.flatnonzero(np.isinf(x))[0])
        raise ValueError(f"phase_s[{k}] is infinite; use NaN for a missing sample")
    return x


def _tau0(tau0_s: float) -> float:
    tau0 = float(tau0_s)
    if not np.isfinite(tau0) or tau0 <= 0:
        raise ValueError(f"tau0_s must be finite and > 0, got {tau0_s!r}")
    return tau0


def _window(n, n_samples: int) -> int:
    m = int(n)
    if m != n or not 1 <= m <= n_samples - 1:
        raise ValueError(f"window length n must be an integer in 1..{n_samples - 1}, got {n!r}")
    return m


def _windows(n, n_samples: int) -> np.ndarray:
    if n is None:
        return octave_window_lengths(n_samples)
    values = np.atleast_1d(np.asarray(n))
    return np.array([_window(v, n_samples) for v in values], dtype=int)
