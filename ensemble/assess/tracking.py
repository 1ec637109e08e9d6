"""Internal: frequency offset, drift and end state of each clock relative to the scale, with
noise-aware uncertainties.

The offset series x_k = clock - scale is modelled as the clock model of Zucca & Tavella (2005)
(phase, frequency, a constant drift) observed with white PM, with the noise levels fitted to the
series itself (:func:`offset_noise`), and run through a Kalman filter from a diffuse start.  A
Kalman filter with a constant drift state and a diffuse prior is generalised least squares of
the phase on a quadratic with the model's covariance: the drift it ends with is the GLS
estimate, and its variance the GLS variance, however red the noise (random-walk phase from white
FM, random-walk frequency).  Ordinary least squares on such data would understate the
uncertainty many times over.  The filter also gives what holdover needs: the state (phase,
frequency, drift) at the last epoch and its covariance.

Numerics: each clock runs in its own scaled units -- time in sampling intervals tau0, phase in
u = sqrt(q1 tau0 + r), its one-step noise -- so that the states and covariances are of order
one; the update uses the Joseph form.  The diffuse prior is 10^3 times the largest frequency
and drift the data could hold, i.e. it carries no information (checked against dense GLS in the
tests).  All clocks run at once (arrays over clocks), so the cost is O(T) small matrix products.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..model.clockmodel import ClockNoise, process_noise_blocks
from ..stability.deviations import overlapping_avar_hvar
from ..stability.edf import edf_greenhall
from ..stability.fit import FLICKER_HVAR, fit_noise

#: Diffuse prior: this many times the largest frequency and drift the data could hold.
_PRIOR_FACTOR = 1e3


@dataclass(frozen=True, eq=False)
class Track:
    """Each clock's state relative to the scale at the last epoch (rows: clocks).

    Attributes
    ----------
    state : ndarray, shape (N, 3)
        Phase [s], fractional frequency [1] and drift [1/s] of clock - scale at ``t_end_s``;
        NaN for a clock without data.
    covariance : ndarray, shape (N, 3, 3)
        Their covariance (SI products of the units).
    t_end_s : float
        Elapsed time of the last epoch. [s]
    n_used : ndarray of int, shape (N,)
        Epochs with a value.
    drift_state : ndarray of bool, shape (N,)
        Whether a drift was estimated (otherwise it is held at 0).
    noise : tuple of ClockNoise
        Noise model of each offset series used by the filter.
    """

    state: np.ndarray
    covariance: np.ndarray
    t_end_s: float
    n_used: np.ndarray
    drift_state: np.ndarray
    noise: tuple

    @property
    def frequency(self) -> np.ndarray:
        """Fractional frequency relative to the scale at the end, shape (N,). [1]"""
        return self.state[:, 1]

    @property
    def frequency_std(self) -> np.ndarray:
        """Its standard uncertainty, shape (N,). [1]"""
        return np.sqrt(np.maximum(self.covariance[:, 1, 1], 0.0))

    @property
    def drift_per_s(self) -> np.ndarray:
        """Frequency drift relative to the scale, shape (N,). [1/s]"""
        return self.state[:, 2]

    @property
    def drift_std_per_s(self) -> np.ndarray:
        """Its standard uncertainty, shape (N,) (0 where no drift is estimated). [1/s]"""
        return np.sqrt(np.maximum(self.covariance[:, 2, 2], 0.0))


def offset_noise(offset_s: np.ndarray, tau0_s: float, span_s: float) -> tuple:
    """Noise model of each offset series from a fit to its own Hadamard variance.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        Clock - scale; NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    span_s : float
        Length of the record. [s]

    Returns
    -------
    tuple of ClockNoise or None, length N
        r, q1 and an effective q2 per series: a fitted flicker floor h_-1 is carried by the
        random-walk FM level with the same Hadamard variance at a quarter of the span,
        q2 += 6 x 1.124670 h_-1 / (span / 4) (ensemble.model.presets).  None where the series is too
        short.
    """
    x = np.asarray(offset_s, dtype=float)
    n_t = x.shape[0]
    m_max = max(1, (n_t - 1) // 6)
    ms = 2 ** np.arange(int(math.log2(m_max)) + 1)
    ov = overlapping_avar_hvar(x, tau0_s, ms)
    match = max(span_s / 4.0, 4.0 * tau0_s)
    out = []
    for i in range(x.shape[1]):
        hv, n = np.asarray(ov.hvar)[:, i], np.asarray(ov.n_hvar)[:, i]
        ok = np.isfinite(hv) & (hv > 0) & (n >= 2)
        if ok.sum() < 4:
            out.append(None)
            continue
        edf = np.array([edf_greenhall(0, int(mk), int(nk), order=3) for mk, nk in
                        zip(ms[ok], n[ok])])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = fit_noise(ov.tau_s[ok], hv[ok], edf, kind="hadamard",
                            terms=("r", "q1", "q2", "flicker"))
        q2 = fit.noise.q2_per_s + 6.0 * FLICKER_HVAR * fit.flicker_h_minus1 / match
        q1, r = fit.noise.q1_s, fit.noise.r_s2
        if q1 <= 0 and r <= 0:
            out.append(None)
            continue
        q2 = max(q2, (q1 + r / tau0_s) / max(span_s, tau0_s) ** 2)
        out.append(ClockNoise(q1_s=q1, q2_per_s=q2, r_s2=r))
    return tuple(out)


def track_offsets(elapsed_s: np.ndarray, offset_s: np.ndarray, noise, drift_state) -> Track:
    """Kalman filter of each offset series from a diffuse start to the last epoch.

    Parameters
    ----------
    elapsed_s : ndarray, shape (T,)
        Epochs on the continuous time axis, strictly increasing. [s]
    offset_s : ndarray, shape (T, N)
        Clock - scale; NaN where missing. [s]
    noise : sequence of ClockNoise or None, length N
        Model of each series (q1 [s], q2 [1/s], r [s^2]; q3 is not used: the drift is
        constant).  None skips the clock.
    drift_state : array_like of bool, shape (N,)
        Estimate a drift (True) or hold it at 0.

    Returns
    -------
    Track
    """
    t = np.asarray(elapsed_s, dtype=float)
    z = np.asarray(offset_s, dtype=float)
    n_t, n_c = z.shape
    drift = np.asarray(drift_state, dtype=bool) & np.array([nz is not None for nz in noise])
    has = np.isfinite(z) & np.array([nz is not None for nz in noise])[None, :]
    n_used = has.sum(axis=0)
    state = np.full((n_c, 3), np.nan)
    cov_si = np.full((n_c, 3, 3), np.nan)
    live = np.flatnonzero(n_used >= 3)
    if live.size and n_t >= 3:
        tau0 = float(np.median(np.diff(t)))
        q1 = np.array([noise[i].q1_s for i in live])
        q2 = np.array([noise[i].q2_per_s for i in live])
        r = np.array([noise[i].r_s2 for i in live])
        u = np.sqrt(q1 * tau0 + r)                                  # phase unit [s]
        zs = z[:, live] / u                                         # scaled observations
        x, p = _run(t / tau0, zs, has[:, live], q1 * tau0 / u ** 2, q2 * tau0 ** 3 / u ** 2,
                    r / u ** 2, drift[live])
        scale = np.stack([u, u / tau0, u / tau0 ** 2], axis=1)      # scaled -> SI
        state[live] = x * scale
        c = p * scale[:, :, None] * scale[:, None, :]
        cov_si[live] = 0.5 * (c + np.transpose(c, (0, 2, 1)))
    return Track(state=state, covariance=cov_si, t_end_s=float(t[-1]) if n_t else math.nan,
                 n_used=n_used, drift_state=drift, noise=tuple(noise))


def _run(t: np.ndarray, z: np.ndarray, has: np.ndarray, q1: np.ndarray, q2: np.ndarray,
         r: np.ndarray, drift: np.ndarray):
    """The filter in scaled units (time in tau0, phase in u); arrays over clocks."""
    n_t, n_c = z.shape
    first = np.argmax(has, axis=0)
    last = n_t - 1 - np.argmax(has[::-1], axis=0)
    span = np.maximum(t[last] - t[first], 1.0)
    rise = np.abs(z[last, np.arange(n_c)] - z[first, np.arange(n_c)])
    y_prior = _PRIOR_FACTOR * (1.0 + rise / span)
    d_prior = np.where(drift, _PRIOR_FACTOR * (1.0 + rise) / span ** 2 * 2.0, 0.0)
    x = np.zeros((n_c, 3))
    p = np.zeros((n_c, 3, 3))
    started = np.zeros(n_c, dtype=bool)
    zf = np.where(has, z, 0.0)
    q_cache: dict = {}
    for k in range(n_t):
        if k:
            # Prediction of every series (those not yet started are overwritten at their start).
            dt = t[k] - t[k - 1]
            key = round(dt, 9)
            if key not in q_cache:
                qb = process_noise_blocks(q1, q2, np.zeros(n_c), dt, 3)
                qb[:, :, 2] = 0.0
                qb[:, 2, :] = 0.0
                phi = np.array([[1.0, dt, 0.5 * dt * dt], [0.0, 1.0, dt], [0.0, 0.0, 1.0]])
                q_cache[key] = (phi, phi.T.copy(), qb)
            phi, phi_t, qb = q_cache[key]
            x = x @ phi_t
            p = phi @ p @ phi_t + qb
        obs = has[k]
        new = obs & ~started
        if new.any():
            x[new] = 0.0
            x[new, 0] = z[k, new]
            p[new] = 0.0
            p[new, 0, 0] = r[new]
            p[new, 1, 1] = y_prior[new] ** 2
            p[new, 2, 2] = d_prior[new] ** 2
        upd = obs & started
        started |= new
        if upd.any():
            # Joseph-form update with H = [1, 0, 0]; the gain is 0 where there is no value.
            s = p[:, 0, 0] + r
            gain = p[:, :, 0] / s[:, None] * upd[:, None]
            x = x + gain * (zf[k] - x[:, 0])[:, None]
            a = p - gain[:, :, None] * p[:, None, 0, :]             # (I - K H) P
            pp = a - a[:, :, 0][:, :, None] * gain[:, None, :]     # ... (I - K H)^T
            pp += r[:, None, None] * gain[:, :, None] * gain[:, None, :]
            p = 0.5 * (pp + np.transpose(pp, (0, 2, 1)))
    return x, p
