"""Reference time scale for the engine benchmark: Kalman plus weights with known noise levels.

Greenhall C.A. (2001), "Kalman plus weights: a time scale algorithm", Proc. 33rd PTTI Meeting,
445-454 (GR01); the recipe below is our own write-out, consistent with GR01's description:

1. one Jones-Tryon Kalman filter over all clocks (Jones & Tryon 1983, J. Res. NBS 88(1),
   17-24) supplies each clock's frequency y_i and drift d_i at epoch t;
2. each clock's offset from the scale is predicted to t + tau,
   x_i^(t + tau) = x_i(t) + y_i tau + d_i tau^2 / 2, with x_i(t) relative to the KPW scale;
3. the basic time scale equation (its usual form, written from memory) with the weights
   w_i = (1 / q1_i) / sum_j (1 / q1_j) (no cap) fixes the scale at t + tau:
   sum_i w_i [x_i(t + tau) - x^_i(t + tau)] = 0, with x_i(t + tau) = X_iR(t + tau) - c from the
   measured differences X_iR = clock i - reference.

The filter runs with the *true* noise levels of the simulation (q1, q2 of each clock and the
white-PM variance r of each channel): the recipe with its levels known, the reference KPW(c)
of ``bench_engine.py``.  Filter: :class:`ensemble.engine.kalman.EnsembleFilter` without its frame
projection (the raw Jones-Tryon filter, whose frequencies are relative to the filter's implicit
ensemble), with optionally a *transparent* covariance reduction P -> P - E A E^T after each update
(derived here, see :func:`transparent_reduction`): it leaves every gain and estimate unchanged
and only keeps the unobservable common-mode variance from growing.

Units: SI at the interface (phase [s], frequency [1], drift [1/s]); the filter works in its own
scaled units (ns, days).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import scipy.linalg

from ensemble.engine.kalman import EnsembleFilter
from ensemble.model.clockmodel import ClockNoise

#: Fraction of the largest admissible common-mode covariance removed by the reduction.
REDUCTION_FRACTION = 0.5


@dataclass
class KPWResult:
    """A KPW run (arrays (T, N) with time on axis 0, clocks in the input's order).

    Attributes
    ----------
    offset_s : ndarray (T, N)
        Clock - KPW scale from the measured differences [s]; NaN where not measured.
    weights : ndarray (N,)
        BTSE weights w_i = (1/q1_i) / sum_j (1/q1_j) over all clocks [1].
    max_diag_p : ndarray (T,)
        Largest diagonal element of the filter covariance after each update (scaled units).
    """

    offset_s: np.ndarray
    weights: np.ndarray
    max_diag_p: np.ndarray


def kpw_weights(q1_s: np.ndarray, present: np.ndarray) -> np.ndarray:
    """GR01 weights w_i = (1/q1_i) / sum_j (1/q1_j) over the present clocks (no cap).

    Parameters
    ----------
    q1_s : ndarray (N,)
        White-FM level of each clock [s].
    present : ndarray of bool (N,)
        Clocks that take part in this epoch's BTSE.

    Returns
    -------
    ndarray (N,)
        Weights [1], zero for absent clocks, summing to 1 (all zero if none is present).
    """
    w = np.where(present, 1.0 / np.asarray(q1_s, dtype=float), 0.0)
    total = w.sum()
    return w / total if total > 0 else w


def transparent_reduction(flt: EnsembleFilter, drift_mode: bool,
                          fraction: float = REDUCTION_FRACTION) -> None:
    """Remove part of the unobservable common-mode covariance: P -> P - E A E^T.

    A = fraction * (E^T P^-1 E)^-1 is admissible (P - E A E^T stays positive definite for
    fraction < 1, since (E^T P^-1 E)^-1 is the largest A with P - E A E^T >= 0).  H E = 0 for
    every difference measurement, so the gains and estimates do not change (derived here).
    Restricted to the active states with positive variance; the common drift mode only when
    every active clock has a drift state (``drift_mode``).
    """
    idx = np.flatnonzero(np.repeat(flt.active, 3) & (np.diag(flt.P) > 0))
    if idx.size == 0:
        return
    comp = idx % 3
    modes = [0, 1, 2] if drift_mode else [0, 1]
    e = np.zeros((idx.size, len(modes)))
    for col, mode in enumerate(modes):
        e[comp == mode, col] = 1.0
    sub = flt.P[np.ix_(idx, idx)]
    try:
        chol = scipy.linalg.cho_factor(sub, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        return
    info = e.T @ scipy.linalg.cho_solve(chol, e, check_finite=False)
    a = fraction * np.linalg.inv(info)
    ea = e @ a
    flt.P[np.ix_(idx, idx)] = sub - ea @ e.T
    flt.P = 0.5 * (flt.P + flt.P.T)


def kpw_time_scale(phase_s: np.ndarray, reference: np.ndarray, elapsed_s: np.ndarray,
                   noise: Sequence[ClockNoise], drift_state: Sequence[bool],
                   frequency_prior: Sequence[float], drift_prior_per_s: Sequence[float],
                   reduce: bool = True) -> KPWResult:
    """Form the Kalman-plus-weights time scale (GR01) from measured differences.

    Parameters
    ----------
    phase_s : ndarray (T, N)
        Measured clock - reference [s]; 0 in the reference's column; NaN where missing.
    reference : ndarray of int (T,)
        Column of each epoch's reference clock (it must be measured at that epoch).
    elapsed_s : ndarray (T,)
        Time since the first epoch [s].
    noise : sequence of ClockNoise, length N
        The clocks' noise levels (q1 [s], q2 [1/s], q3 [1/s^3]) and channel white PM r [s^2].
    drift_state : sequence of bool, length N
        Which clocks carry a drift state.
    frequency_prior : sequence of float, length N
        Standard uncertainty of each clock's unknown initial frequency [1].
    drift_prior_per_s : sequence of float, length N
        Standard uncertainty of each clock's unknown drift [1/s] (ignored without drift state).
    reduce : bool
        Apply :func:`transparent_reduction` after each update (estimates unchanged).

    Returns
    -------
    KPWResult
    """
    z_all = np.asarray(phase_s, dtype=float)
    n_t, n = z_all.shape
    flt = EnsembleFilter(n)
    q1 = np.array([nz.q1_s for nz in noise])
    r_s2 = np.array([nz.r_s2 for nz in noise])
    drift = np.asarray(drift_state, dtype=bool)
    for i, nz in enumerate(noise):
        flt.set_noise(i, nz.q1_s, nz.q2_per_s, nz.q3_per_s3 if drift[i] else 0.0, nz.r_s2)
    drift_mode = bool(drift.all())
    offset = np.full((n_t, n), np.nan)
    max_diag = np.full(n_t, np.nan)
    prev = {"z": None, "freq": None, "drift": None}
    for k in range(n_t):
        z = z_all[k]
        ref = int(reference[k])
        measured = np.isfinite(z)
        if not measured[ref]:
            raise ValueError(f"epoch {k}: the reference column {ref} is not measured")
        if k > 0:
            dt = float(elapsed_s[k] - elapsed_s[k - 1])
            flt.predict(dt)
        else:
            dt = 0.0
        # clocks seen for the first time: state from the measured difference to the reference
        for i in np.flatnonzero(measured & ~flt.active):
            p_ref = flt.state_si(ref)[0] if flt.active[ref] else 0.0
            cov = np.diag([r_s2[i] + 1e-30, frequency_prior[i] ** 2,
                           drift_prior_per_s[i] ** 2 if drift[i] else 0.0])
            link = ref if flt.active[ref] and i != ref else None
            flt.activate(i, np.array([z[i] - z[ref] + p_ref, 0.0, 0.0]), cov, phase_link=link)
        upd = np.flatnonzero(measured & flt.active & (np.arange(n) != ref))
        if k > 0 and upd.size:
            flt.update(z[upd] - z[ref], upd, ref)
            if reduce:
                transparent_reduction(flt, drift_mode)
        max_diag[k] = float(np.max(np.diag(flt.P)))
        est = flt.states_si()
        if k == 0:
            w = kpw_weights(q1, measured)      # the scale starts at the weighted mean clock
            c = float(w[measured] @ z[measured])
        else:
            both = measured & np.isfinite(prev["z"])
            w = kpw_weights(q1, both)
            # x^_i(t + tau) = x_i(t) + y_i tau + d_i tau^2 / 2, then the BTSE:
            # c = sum_i w_i (X_iR - x^_i), so that x_i = X_iR - c  (the BTSE above)
            pred = prev["z"] + prev["freq"] * dt + 0.5 * prev["drift"] * dt * dt
            c = float(w[both] @ (z[both] - pred[both]))
        offset[k] = np.where(measured, z - c, np.nan)
        prev = {"z": offset[k], "freq": est[:, 1], "drift": np.where(drift, est[:, 2], 0.0)}
    return KPWResult(offset, kpw_weights(q1, np.ones(n, dtype=bool)), max_diag)


def kpw_for_simulation(sim, drift_states: str = "type", reduce: bool = True) -> KPWResult:
    """Run :func:`kpw_time_scale` on a :class:`ensemble.simulate.Simulation` with its true noise.

    Parameters
    ----------
    sim : Simulation
        Supplies the measurements and, per clock, the true q1, q2, q3 and channel r
        (``sim.noise[name].clock_noise``).
    drift_states : {"type", "none"}
        "type": a drift state for the clock types the simulator gives a drift (masers,
        rubidium, chip-scale), none for cesium tubes, as in the simulation; "none": the
        two-state model for every clock.
    reduce : bool
        Transparent covariance reduction after each update (estimates unchanged).

    Notes
    -----
    Priors: each clock's typical frequency offset and drift of its type (at least 1e-13 and
    1e-16 per day).  The true levels leave out flicker FM, which the three-state model cannot
    represent (it needs extra Gauss-Markov states; Davis, Greenhall & Stacey 2005).
    """
    from ensemble.model.presets import get_preset

    if drift_states not in ("type", "none"):
        raise ValueError(f"drift_states must be 'type' or 'none', got {drift_states!r}")
    noise, drift, fprior, dprior = [], [], [], []
    for name in sim.clocks:
        par = sim.noise[name]
        noise.append(par.clock_noise)
        preset = get_preset(par.type)
        drift.append(drift_states == "type" and preset.drift_per_day > 0)
        fprior.append(max(preset.frequency_offset, 1e-13))
        dprior.append(max(preset.drift_per_day, 1e-16) / 86400.0)
    return kpw_time_scale(sim.phase_s, sim.reference, sim.elapsed_s, noise, drift, fprior,
                          dprior, reduce=reduce)


__all__ = ["KPWResult", "kpw_for_simulation", "kpw_time_scale", "kpw_weights",
           "transparent_reduction"]
