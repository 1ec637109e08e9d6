"""Internal: the ageing analysis -- white-FM level and drift of each clock in sliding windows,
and the trend test of each series (:func:`ensemble.assess.trend.trend_test`).

Windows.  By default 30 days long, one starting every 7 days, placed so that the last window
ends at the last epoch.  A span too short for ``min_windows`` such windows gets shorter windows
with the same step-to-length ratio (so the same overlap): length L = S / (1 + (n - 1) s / w)
for a span S, n windows, step s and length w; below ``min_window_days`` there is no trend
analysis.  Consecutive windows overlap by 1 - s / w (77 % by default); the trend test models
the correlation that overlap causes.

In each window every clock's own Hadamard variance is separated from its pair differences
(:mod:`ensemble.assess.ownstability`) at octave averaging times up to a quarter of the window,
and q1 and a flicker floor (and q2 when at least six points are resolved) are fitted to its
resolved points (:func:`ensemble.stability.fit.fit_noise`), with the channel's white PM held at
its value over the whole span; q1 [s] is the white-FM level, sigma_y(tau) = sqrt(q1 / tau).  Points the hat cannot resolve are left out, so a trend
is never driven by an assumed value.  The drift relative to the scale in each window is the end
state of the Kalman filter of :mod:`ensemble.assess.tracking` run over the window.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..stability.fit import fit_noise
from ..units import SECONDS_PER_DAY
from .ownstability import own_stability
from .tracking import track_offsets
from .trend import trend_test

#: Fewest resolved points for a window's fit (q1, flicker).
_MIN_FIT_POINTS = 3
#: Resolved points from which q2 is fitted too.
_Q2_POINTS = 6


@dataclass(frozen=True, eq=False)
class WindowLayout:
    """Where the windows lie.

    Attributes
    ----------
    length_days, step_days : float
        Window length and step used. [d]
    starts, stops : ndarray of int, shape (n_w,)
        First and one-past-last row of each window.
    centre_mjd : ndarray, shape (n_w,)
        Centre of each window, MJD UTC. [d]
    centre_s : ndarray, shape (n_w,)
        Centre on the continuous time axis. [s]
    shortened : bool
        True when the span forced windows shorter than configured.
    note : str
        One sentence on the layout (or why there are no windows).
    """

    length_days: float
    step_days: float
    starts: np.ndarray
    stops: np.ndarray
    centre_mjd: np.ndarray
    centre_s: np.ndarray
    shortened: bool
    note: str

    @property
    def n_windows(self) -> int:
        """Number of windows."""
        return int(self.starts.size)

    @property
    def overlap(self) -> float:
        """Share of each window shared with the next. [1]"""
        return max(0.0, 1.0 - self.step_days / self.length_days) if self.length_days else 0.0


@dataclass(frozen=True, eq=False)
class Ageing:
    """Windowed statistics and trend tests (rows: windows; columns: clocks).

    Attributes
    ----------
    layout : WindowLayout
    q1_s, q1_std_s : ndarray, shape (n_w, N)
        Fitted white-FM level in each window and its uncertainty; NaN where not resolved. [s]
    drift_per_s, drift_std_per_s : ndarray, shape (n_w, N)
        Drift relative to the scale in each window and its uncertainty. [1/s]
    white_fm_trend, drift_trend : tuple of (TrendTest or None), length N
        Trend tests (None where too few windows have a value).
    growth_factor : ndarray, shape (N,)
        Factor by which the fitted white-FM Allan deviation grows over the span,
        exp(slope x span / 2) of the ln-q1 trend; NaN without a test. [1]
    messages : tuple of str
    """

    layout: WindowLayout
    q1_s: np.ndarray
    q1_std_s: np.ndarray
    drift_per_s: np.ndarray
    drift_std_per_s: np.ndarray
    white_fm_trend: tuple
    drift_trend: tuple
    growth_factor: np.ndarray
    messages: tuple = field(default_factory=tuple)


def window_layout(mjd: np.ndarray, elapsed_s: np.ndarray, length_days: float,
                  step_days: float, min_windows: int, min_length_days: float) -> WindowLayout:
    """Place the sliding windows over the span (see the module notes)."""
    span_d = float(elapsed_s[-1] - elapsed_s[0]) / SECONDS_PER_DAY if elapsed_s.size else 0.0
    ratio = step_days / length_days
    need = length_days + (min_windows - 1) * step_days
    shortened = span_d < need
    length, step = length_days, step_days
    if shortened:
        length = span_d / (1.0 + (min_windows - 1) * ratio)
        step = ratio * length
    empty = np.zeros(0, dtype=int)
    if length < min_length_days or elapsed_s.size < 8:
        note = (f"the span of {span_d:.1f} d is too short for {min_windows} windows of at "
                f"least {min_length_days:g} d: no trend analysis")
        return WindowLayout(length, step, empty, empty, np.zeros(0), np.zeros(0), shortened, note)
    t = (elapsed_s - elapsed_s[0]) / SECONDS_PER_DAY
    n_w = int(math.floor((span_d - length) / step + 1e-9)) + 1
    ends = span_d - step * np.arange(n_w)[::-1]
    begins = ends - length
    starts = np.searchsorted(t, begins - 1e-9, side="left")
    stops = np.searchsorted(t, ends + 1e-9, side="right")
    centre_s = elapsed_s[0] + 0.5 * (begins + ends) * SECONDS_PER_DAY
    centre_mjd = mjd[0] + 0.5 * (begins + ends)
    note = (f"{n_w} windows of {length:.3g} d, one every {step:.3g} d"
            + (f" (shortened from {length_days:g} d and {step_days:g} d to fit "
               f"{min_windows} windows into the {span_d:.1f} d span)" if shortened else ""))
    return WindowLayout(length, step, starts, stops, centre_mjd, centre_s, shortened, note)


def ageing(offset_s: np.ndarray, elapsed_s: np.ndarray, tau0_s: float, layout: WindowLayout,
           *, clocks, offset_noise, drift_state, alpha_by_m: dict, trend_alpha: float,
           confidence: float, white_pm_s2=None) -> Ageing:
    """Windowed white-FM level and drift of every clock, and their trend tests.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        Cleaned clock - scale offsets. [s]
    elapsed_s : ndarray, shape (T,)
        Continuous time axis. [s]
    tau0_s : float
        Sampling interval. [s]
    layout : WindowLayout
    clocks : sequence of str
    offset_noise : sequence of ClockNoise or None
        Noise model of each offset series (for the drift filter).
    drift_state : ndarray of bool, shape (N,)
    alpha_by_m : dict of int to ndarray
        Noise exponent of each pair difference by averaging factor (from the whole span).
    trend_alpha : float
        Significance level of the tests.
    confidence : float
        Interval probability for the hat (not used by the tests).
    white_pm_s2 : ndarray, shape (N,), optional
        White PM of each channel from the whole span [s^2]: held fixed in the windows (the
        measurement system does not age with the clock, and a free white PM would trade with
        the white FM in a short window).

    Returns
    -------
    Ageing
    """
    n_c = offset_s.shape[1]
    n_w = layout.n_windows
    q1 = np.full((n_w, n_c), np.nan)
    q1s = np.full((n_w, n_c), np.nan)
    dr = np.full((n_w, n_c), np.nan)
    drs = np.full((n_w, n_c), np.nan)
    for w in range(n_w):
        rows = slice(int(layout.starts[w]), int(layout.stops[w]))
        x = offset_s[rows]
        n_pts = x.shape[0]
        m_max = max(1, n_pts // 4)
        ms = [int(mk) for mk in sorted(alpha_by_m) if mk <= m_max]
        if ms:
            alpha = np.column_stack([alpha_by_m[mk] for mk in ms])
            own = own_stability(x, tau0_s, ms, "hadamard", clocks=clocks,
                                confidence=confidence, alpha=alpha)
            for i in range(n_c):
                r = 0.0 if white_pm_s2 is None else float(white_pm_s2[i])
                q1[w, i], q1s[w, i] = _white_fm(own, i, r if np.isfinite(r) else 0.0)
    if n_w:
        dr, drs = _window_drifts(offset_s, tau0_s, layout, offset_noise, drift_state)
    wf, dt, growth, messages = [], [], np.full(n_c, np.nan), []
    span_s = float(elapsed_s[-1] - elapsed_s[0]) if elapsed_s.size else 0.0
    for i, name in enumerate(clocks):
        test = _test(layout, q1[:, i], q1s[:, i], "level", trend_alpha,
                     "white-FM level", "s", alternative="increasing")
        wf.append(test)
        if test is not None:
            growth[i] = math.exp(min(700.0, 0.5 * test.slope * span_s))
        dtest = None
        if drift_state[i]:
            dtest = _test(layout, dr[:, i], drs[:, i], "drift", trend_alpha,
                          "drift relative to the scale", "1/s", alternative="two-sided")
        dt.append(dtest)
        if n_w and test is None:
            messages.append(f"{name}: the white-FM level is resolved in "
                            f"{int(np.isfinite(q1[:, i]).sum())} of {n_w} windows; no trend test")
    return Ageing(layout, q1, q1s, dr, drs, tuple(wf), tuple(dt), growth, tuple(messages))


def _window_drifts(offset_s, tau0_s, layout, offset_noise, drift_state):
    """Drift of every clock in every window: one filter run over all windows side by side."""
    n_c = offset_s.shape[1]
    n_w = layout.n_windows
    length = int(np.max(layout.stops - layout.starts))
    stack = np.full((length, n_w * n_c), np.nan)
    for w in range(n_w):
        a, b = int(layout.starts[w]), int(layout.stops[w])
        stack[:b - a, w * n_c:(w + 1) * n_c] = offset_s[a:b]
    tr = track_offsets(tau0_s * np.arange(length), stack, tuple(offset_noise) * n_w,
                       np.tile(drift_state, n_w))
    return (tr.drift_per_s.reshape(n_w, n_c), tr.drift_std_per_s.reshape(n_w, n_c))


def _white_fm(own, i: int, r_s2: float) -> tuple[float, float]:
    ok = own.resolved[i] & np.isfinite(own.variance[i])
    # the channel's white PM, 10 r / (3 tau^2) (derived here, as in
    # ensemble.model.clockmodel.hadamard_variance), taken off before the fit
    rest = own.variance[i] - 10.0 * r_s2 / (3.0 * own.tau_s ** 2)
    ok &= rest > 0
    if ok.sum() < _MIN_FIT_POINTS:
        return math.nan, math.nan
    terms = ("q1", "q2", "flicker") if ok.sum() >= _Q2_POINTS else ("q1", "flicker")
    edf = np.maximum(own.edf[i, ok], 1.0)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = fit_noise(own.tau_s[ok], rest[ok], edf, kind="hadamard", terms=terms)
    except ValueError:
        return math.nan, math.nan
    value, std = fit.noise.q1_s, fit.q1_std_s
    if not (value > 0 and np.isfinite(std) and std > 0):
        return math.nan, math.nan
    return float(value), float(std)


def _test(layout: WindowLayout, values, std, kind, alpha, name, unit, alternative):
    ok = np.isfinite(values) & np.isfinite(std) & (std > 0)
    if kind == "level":
        ok &= values > 0
    if ok.sum() < 4:
        return None
    centres = layout.centre_s[ok]
    # overlap of the windows actually used (a window without a value widens the step)
    step_s = float(np.median(np.diff(centres)))
    overlap = max(0.0, 1.0 - step_s / (layout.length_days * SECONDS_PER_DAY))
    try:
        return trend_test(centres, values[ok], std[ok], overlap=overlap,
                          kind=kind, alternative=alternative, alpha=alpha, name=name, unit=unit)
    except ValueError:
        return None
