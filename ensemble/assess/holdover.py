"""Holdover: predicted time error of a free-running clock and the time until a budget is used.

From a state estimate (x0 [s], y0 [1], d0 [1/s]) with covariance P0 at the start of holdover,
the clock model predicts (derived here; Zucca & Tavella 2005 for the clock model and Q)::

    TE(t)      = x0 + y0 t + d0 t^2 / 2
    Var[TE(t)] = [Phi(t) P0 Phi(t)^T + Q(t)]_11
               = Pxx + 2t Pxy + t^2 (Pyy + Pxd) + t^3 Pyd + t^4 Pdd / 4
                 + q1 t + q2 t^3 / 3 + q3 t^5 / 20   (+ (sigma_floor t)^2) (+ r)

The optional flicker-FM term uses the rule x_rms(t) ~ t sigma_y(t) with the flicker floor
sigma_floor (a rule of practice recalled from memory, no source; an approximation: flicker FM
has no finite-state model); the optional r is the white PM of the output measurement.

The bound reported is |TE(t)| + k sigma(t); systematic allowances (temperature, magnetic
field, cavity pulling) are not modelled and must be added separately.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from ..model.clockmodel import ClockNoise

__all__ = ["TimeErrorPrediction", "predict_time_error", "holdover_time", "DEFAULT_HORIZON_S",
           "K_95"]

#: Coverage factor of a two-sided 95 % normal interval, scipy.stats.norm.ppf(0.975) (common
#: practice).
K_95 = 1.959963984540054
#: Default search horizon of :func:`holdover_time`: ten years of 365.25 days. [s]
DEFAULT_HORIZON_S = 10 * 365.25 * 86400.0
_GRID_POINTS = 2001


@dataclass(frozen=True, eq=False)
class TimeErrorPrediction:
    """Predicted time error during holdover.

    Attributes
    ----------
    t_s : ndarray, shape (n_t,)
        Time since the start of holdover. [s]
    time_error_s : ndarray, shape (n_t,)
        Deterministic prediction x0 + y0 t + d0 t^2 / 2. [s]
    std_s : ndarray, shape (n_t,)
        Standard deviation of the prediction error. [s]
    k : float
        Coverage factor of the bound.
    bound_s : ndarray, shape (n_t,)
        |time_error_s| + k std_s. [s]
    """

    t_s: np.ndarray
    time_error_s: np.ndarray
    std_s: np.ndarray
    k: float
    bound_s: np.ndarray


def predict_time_error(state, covariance, noise: ClockNoise, t_s, *, k: float = K_95,
                       flicker_adev: float = 0.0,
                       include_output_noise: bool = False) -> TimeErrorPrediction:
    """Predicted time error and its uncertainty at times t after the start of holdover.

    Parameters
    ----------
    state : array_like, shape (2,) or (3,)
        Phase x0 [s], fractional frequency y0 [1] and (optionally) drift d0 [1/s] of the clock
        against the reference at the start of holdover.
    covariance : array_like, shape (2, 2) or (3, 3)
        Covariance of ``state`` in the same units (s^2, s, 1, s/s ... i.e. SI products).
    noise : ClockNoise
        q1 [s], q2 [1/s], q3 [1/s^3] drive the prediction error; r [s^2] is added if
        ``include_output_noise``.  q3 contributes q3 t^5 / 20 whatever the state size (the
        phase of a clock with random-run FM grows so even if the drift is not estimated).
    t_s : float or array_like, shape (n_t,)
        Times since the start of holdover, >= 0. [s]
    k : float
        Coverage factor of the bound (default 1.96, two-sided 95 % for a normal error).
    flicker_adev : float
        Flicker-FM floor as an Allan deviation; adds (flicker_adev t)^2 (approximation). [1]
    include_output_noise : bool
        Add the white-PM variance r of the output measurement.

    Returns
    -------
    TimeErrorPrediction
    """
    x0, p0 = _state(state, covariance)
    t = np.atleast_1d(np.asarray(t_s, dtype=float))
    if t.ndim != 1 or not np.all(np.isfinite(t)) or np.any(t < 0):
        raise ValueError("t_s must be a finite time or 1-D array of times >= 0 [s]")
    if not np.isfinite(k) or k < 0:
        raise ValueError(f"k must be finite and >= 0, got {k!r}")
    if not np.isfinite(flicker_adev) or flicker_adev < 0:
        raise ValueError(f"flicker_adev must be finite and >= 0, got {flicker_adev!r}")
    te, var = _te_and_variance(x0, p0, noise, t, flicker_adev, include_output_noise)
    std = np.sqrt(var)
    return TimeErrorPrediction(t_s=t, time_error_s=te, std_s=std, k=float(k),
                               bound_s=np.abs(te) + k * std)


def holdover_time(state, covariance, noise: ClockNoise, budgets_s, *, k: float = K_95,
                  horizon_s: float = DEFAULT_HORIZON_S, flicker_adev: float = 0.0,
                  include_output_noise: bool = False) -> np.ndarray:
    """Time until the bound |TE(t)| + k sigma(t) first exceeds each time-error budget.

    Parameters
    ----------
    state, covariance, noise, k, flicker_adev, include_output_noise
        As for :func:`predict_time_error`.
    budgets_s : float or array_like, shape (n_budgets,)
        Time-error budgets, > 0 (e.g. 100e-9 and 1e-6). [s]
    horizon_s : float
        Longest holdover searched (default ten years). [s]

    Returns
    -------
    ndarray, shape (n_budgets,)
        First time at which the bound exceeds each budget [s]; 0 if it already does at t = 0;
        ``inf`` if it stays within the budget up to ``horizon_s``.

    Notes
    -----
    The bound need not grow monotonically (a negative initial frequency can bring a positive
    offset back towards zero; a negative Pxy shrinks the variance at first), so the first
    crossing is found on the running maximum of the bound -- the monotone envelope -- over a
    grid of 2001 logarithmically spaced times from horizon * 1e-12 to the horizon plus t = 0,
    and then refined by Brent's method between the last grid time within the budget and the
    first one beyond it (relative accuracy 1e-12).  A crossing that goes out and back within
    one grid step (relative step 1.4 %) can be missed; the bound is a low-order polynomial in
    t plus a square root, so that would need nearly cancelling terms.
    """
    budgets = np.atleast_1d(np.asarray(budgets_s, dtype=float))
    if budgets.ndim != 1 or not np.all(np.isfinite(budgets)) or np.any(budgets <= 0):
        raise ValueError("budgets_s must be finite and > 0 [s]")
    horizon = float(horizon_s)
    if not np.isfinite(horizon) or horizon <= 0:
        raise ValueError(f"horizon_s must be finite and > 0, got {horizon_s!r}")
    x0, p0 = _state(state, covariance)

    def bound(t):
        te, var = _te_and_variance(x0, p0, noise, np.atleast_1d(t), flicker_adev,
                                   include_output_noise)
        return np.abs(te) + k * np.sqrt(var)

    grid = np.concatenate(([0.0], np.geomspace(horizon * 1e-12, horizon, _GRID_POINTS)))
    values = bound(grid)
    envelope = np.maximum.accumulate(values)
    out = np.full(budgets.size, np.inf)
    for b, budget in enumerate(budgets):
        beyond = np.flatnonzero(envelope > budget)
        if beyond.size == 0:
            continue
        j = int(beyond[0])
        if j == 0:
            out[b] = 0.0
            continue
        lo, hi = grid[j - 1], grid[j]
        out[b] = brentq(lambda t: bound(t)[0] - budget, lo, hi, xtol=1e-300, rtol=1e-12)
    return out


def _te_and_variance(x0, p0, noise: ClockNoise, t, flicker_adev, include_output_noise):
    n = x0.size
    # First row of Phi(t): [1, t, t^2/2] (ensemble.model.clockmodel).
    row = np.stack([np.ones_like(t), t, 0.5 * t * t][:n], axis=-1)
    te = row @ x0
    var = np.einsum("ti,ij,tj->t", row, p0, row)
    # Q11(t) = q1 t + q2 t^3 / 3 + q3 t^5 / 20 (exact discretisation; ensemble.model.clockmodel).
    var = var + noise.q1_s * t + noise.q2_per_s * t ** 3 / 3.0 + noise.q3_per_s3 * t ** 5 / 20.0
    var = var + (flicker_adev * t) ** 2
    if include_output_noise:
        var = var + noise.r_s2
    return te, np.maximum(var, 0.0)


def _state(state, covariance):
    x0 = np.asarray(state, dtype=float).ravel()
    p0 = np.asarray(covariance, dtype=float)
    if x0.size not in (2, 3):
        raise ValueError(f"state must hold (x, y) or (x, y, d), got {x0.size} values")
    if p0.shape != (x0.size, x0.size):
        raise ValueError(f"covariance must have shape {(x0.size, x0.size)} to match the state, "
                         f"got {p0.shape}")
    if not (np.all(np.isfinite(x0)) and np.all(np.isfinite(p0))):
        raise ValueError("state and covariance must be finite")
    if not np.allclose(p0, p0.T, rtol=1e-9, atol=0.0):
        raise ValueError("covariance must be symmetric")
    if np.any(np.diag(p0) < 0):
        raise ValueError("covariance has a negative variance on its diagonal")
    return x0, 0.5 * (p0 + p0.T)
