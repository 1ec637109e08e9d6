"""Internal: anomaly tests (pure functions and small state holders).

Two complementary tests run on each clock's prediction residual relative to the ensemble
(the innovation of the clock minus the weighted mean innovation of the clean clocks, so that a
fault localises to the clock that has it, the reference included; derived here, see docs/engine.md):

* **Hold and classify.**  A standardised residual beyond ``hold_sigma`` withholds the clock's
  measurements from the filter (its state is only predicted) and zeroes its weight.  The
  residuals against that frozen prediction are then tested with the generalised likelihood
  ratio (Willsky & Jones 1976, IEEE Trans. Autom. Control AC-21, 108-112) for an outlier, a
  phase step and a frequency step, each a known signature s with unknown size a:
  l = (s^T C^-1 r)^2 / (s^T C^-1 s), a = s^T C^-1 r / s^T C^-1 s, where C is the covariance
  of the frozen multi-step prediction errors from the clock model.
* **Slow changes.**  A windowed GLR with the filter's own response (Willsky & Jones 1976) runs
  on every clock for a frequency step and a drift change at each onset of the last W epochs:
  the signature of a unit jump f at onset theta in the residuals follows the recursion
  G(k) = [Phi(t_k - t_theta) f]_0 - [Phi(dt) F(k-1)]_0, F(k) = Phi(dt) F(k-1) + g_k G(k),
  where g_k is the filter's correction of the clock's state per unit residual; then
  d = sum G r / var, C = sum G^2 / var, l = d^2 / C, size d / C.  The threshold follows from the
  false-alarm rate through the tail of the maximum over onsets, which our Monte Carlo
  calibration (benchmarks/calibrate_detection.py) puts at
  P(alarm per epoch) = 0.11 h ln(W) P(chi2_1 > h) for 14 <= h <= 24 and W = 48.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.optimize
import scipy.stats

#: Hypotheses tested on a hold episode, in order of preference on ties.
HYPOTHESES = ("outlier", "phase_step", "frequency_step")


def glr_threshold(false_alarm_rate: float, n_hypotheses: int = 3) -> float:
    """Event threshold on the GLR statistic (chi-squared with 1 dof under no anomaly).

    Bonferroni over the hypotheses: P(chi2_1 > h) = rate / n_hypotheses.
    """
    return float(scipy.stats.chi2.isf(false_alarm_rate / n_hypotheses, 1))


def window_threshold(false_alarm_rate: float, window: int) -> float:
    """Threshold of the windowed GLR (maximum over ``window`` onsets) for a false-alarm rate.

    Solves 0.11 h ln(W) P(chi2_1 > h) = rate (calibration of the maximum over onsets of a
    mean-shift GLR in white noise; see the module docstring).
    """
    ln_w = math.log(max(window, 2))

    def excess(h):
        return math.log(0.11 * h * ln_w * scipy.stats.chi2.sf(h, 1)) - math.log(false_alarm_rate)

    return float(scipy.optimize.brentq(excess, 1.0, 400.0))


#: Hypotheses of the slow test and their jump directions in (phase, frequency, drift).
SLOW_HYPOTHESES = ("frequency_step", "drift_change")


class SignatureGLR:
    """Windowed Willsky-Jones GLR for frequency steps and drift changes of many clocks.

    Parameters
    ----------
    n_clocks : int
    window : int
        Number of onsets kept.
    threshold : float
        Alarm threshold on l.
    stride : int
        A new onset every ``stride`` epochs (so the onsets span ``window * stride`` epochs).
    tests : sequence of bool, length 2
        Which of :data:`SLOW_HYPOTHESES` (frequency step, drift change) are tested.
    """

    def __init__(self, n_clocks: int, window: int, threshold: float):
        self.n = n_clocks
        self.window = window
        self.threshold = threshold
        shape = (n_clocks, 2, window)
        # filter response per unit jump (SI), component first: F[k] is the response of state k
        # (phase, frequency, drift), contiguous for the per-epoch arithmetic
        self.F = np.zeros((3,) + shape)
        self.d = np.zeros(shape)
        self.C = np.zeros(shape)
        self.onset_t = np.zeros(window)          # onset time of each slot [s] (unused: 0)
        self.onset_mjd = np.full(window, np.nan)
        self.live = np.zeros((n_clocks, window), dtype=bool)
        self.head = 0
        self._allowed = None                     # (has_drift, allowed hypotheses) cache

    def step(self, t_prev: float, mjd_prev: float, dt: float, t_now: float,
             gain: np.ndarray, residual: np.ndarray, var: np.ndarray, valid: np.ndarray,
             has_drift: np.ndarray):
        """Advance one epoch and return alarms.

        Parameters
        ----------
        t_prev, mjd_prev : float
            Time [s] and tag of the previous epoch (the onset of the new slot).
        dt : float
            Interval since the previous epoch [s].
        t_now : float
            This epoch's time [s].
        gain : ndarray, shape (n, 3)
            Correction of each clock's (phase, frequency, drift) per unit residual this epoch
            (zero where the clock was not updated).
        residual, var : ndarray, shape (n,)
            Conditional residuals [s] and their variances [s^2].
        valid : ndarray of bool, shape (n,)
            Clocks whose residual counts this epoch.
        has_drift : ndarray of bool, shape (n,)
            Clocks with a drift state (others are not tested for drift changes).

        Returns
        -------
        list of (clock, hypothesis, onset_mjd, size, uncertainty, statistic, correction)
            ``correction`` is the state step (3,) that brings the clock's estimate to the
            detected jump: Phi(t - t_theta) f a - F a.
        """
        j = self.head
        self.onset_t[j] = t_prev
        self.onset_mjd[j] = mjd_prev
        self.F[..., j] = 0.0
        self.d[:, :, j] = 0.0
        self.C[:, :, j] = 0.0
        self.live[:, j] = True
        self.head = (j + 1) % self.window
        F = self.F
        # propagate the responses: F <- Phi(dt) F
        F[0] += dt * F[1] + 0.5 * dt * dt * F[2]
        F[1] += dt * F[2]
        age = t_now - self.onset_t                            # (window,); unused slots: no weight
        signature = np.empty((2, self.window))                # the jumps' own phase signatures
        signature[0] = age
        np.multiply(0.5 * age, age, out=signature[1])
        if self._allowed is None or self._allowed[0] is not has_drift:
            self._allowed = (has_drift, np.stack([np.ones(self.n), has_drift], axis=1)[:, :, None])
        # 1 where the clock's residual counts for that onset and hypothesis, else 0
        if np.count_nonzero(valid) == self.n and np.count_nonzero(self.live) == self.live.size:
            use = self._allowed[1]
        else:
            use = (valid[:, None] & self.live)[:, None, :] * self._allowed[1]
        g_sig = signature - F[0]
        g_sig *= use
        inv_var = np.divide(1.0, var, out=np.zeros(self.n), where=valid)
        gw = g_sig * inv_var[:, None, None]
        self.d += gw * np.where(valid, residual, 0.0)[:, None, None]
        self.C += gw * g_sig
        F += g_sig[None] * gain.T[:, :, None, None]
        d, c = self.d, self.C
        # l = d^2 / C > threshold, written without a division: C >= 0, and C = 0 only where
        # nothing was accumulated, where d = 0 too (so the comparison is False there)
        hot = d * d > self.threshold * c
        if not np.count_nonzero(hot):
            return []
        stat = np.divide(d * d, c, out=np.zeros(c.shape), where=c > 0)
        alarms = []
        for i in np.flatnonzero(hot.any(axis=(1, 2))):
            h, slot = np.unravel_index(int(np.argmax(stat[i])), stat[i].shape)
            size = self.d[i, h, slot] / self.C[i, h, slot]
            unc = 1.0 / math.sqrt(self.C[i, h, slot])
            a = age[slot]
            truth = np.array([a, 1.0, 0.0]) if h == 0 else np.array([0.5 * a * a, a, 1.0])
            correction = (truth - self.F[:, i, h, slot]) * size
            alarms.append((int(i), SLOW_HYPOTHESES[h], float(self.onset_mjd[slot]), float(size),
                           float(unc), float(stat[i, h, slot]), correction))
        return alarms

    def reset(self, i: int) -> None:
        """Forget clock i's onsets (after a detection or a re-initialisation)."""
        self.live[i] = False
        self.F[:, i] = 0.0
        self.d[i] = 0.0
        self.C[i] = 0.0

    def state_dict(self) -> dict:
        # F is stored clock first, (n, 2, window, 3)
        return {"F": np.moveaxis(self.F, 0, -1).copy(), "d": self.d.copy(), "C": self.C.copy(),
                "onset_t": self.onset_t.copy(), "onset_mjd": self.onset_mjd.copy(),
                "live": self.live.copy(), "head": np.array(self.head)}

    def load_state(self, state: dict) -> None:
        for key in ("d", "C", "onset_t", "onset_mjd"):
            setattr(self, key, np.array(state[key], dtype=float))
        self.F = np.ascontiguousarray(np.moveaxis(np.array(state["F"], dtype=float), -1, 0))
        self.onset_t = np.nan_to_num(self.onset_t)            # unused slots: 0
        self.live = np.array(state["live"], dtype=bool)
        self.head = int(state["head"])
        self.n = self.d.shape[0]
        self._allowed = None


def frozen_prediction_covariance(dt_s: np.ndarray, prior_cov: np.ndarray, q: np.ndarray,
                                 diagonal: np.ndarray) -> np.ndarray:
    """Covariance of a clock's phase prediction errors from a state frozen at time 0.

    Parameters
    ----------
    dt_s : ndarray, shape (L,)
        Times of the residuals after the first one [s] (dt_s[0] = 0).
    prior_cov : ndarray, shape (3, 3)
        Covariance of the state prediction at the first residual's epoch, SI units.
    q : ndarray, shape (3,)
        Diffusion coefficients (q1 [s], q2 [1/s], q3 [1/s^3]).
    diagonal : ndarray, shape (L,)
        Variance added on the diagonal (measurement noise and the ensemble's part) [s^2].

    Returns
    -------
    ndarray, shape (L, L) [s^2]
        C_kl = [Phi(t_k) P Phi(t_l)^T]_00 + [Phi(t_k - t_l) Q(t_l)]_00 (k >= l) + diag.
    """
    t = np.asarray(dt_s, dtype=float)
    phi0 = np.stack([np.ones_like(t), t, 0.5 * t * t], axis=1)       # first rows of Phi(t)
    c = phi0 @ prior_cov @ phi0.T
    q1, q2, q3 = q
    tk, tl = np.meshgrid(t, t, indexing="ij")
    lo = np.minimum(tk, tl)
    gap = np.abs(tk - tl)
    # Q(lo) entries of the phase row and [Phi(gap) Q(lo)]_00 = Q00 + gap Q10 + gap^2/2 Q20
    q00 = q1 * lo + q2 * lo ** 3 / 3.0 + q3 * lo ** 5 / 20.0
    q10 = q2 * lo ** 2 / 2.0 + q3 * lo ** 4 / 8.0
    q20 = q3 * lo ** 3 / 6.0
    c += q00 + gap * q10 + 0.5 * gap * gap * q20
    c[np.diag_indices_from(c)] += diagonal
    return c


def glr_classify(residual_s: np.ndarray, dt_s: np.ndarray, cov: np.ndarray,
                 onset_offset_s: float) -> dict:
    """GLR statistics of the hold hypotheses on frozen-prediction residuals.

    Parameters
    ----------
    residual_s : ndarray, shape (L,)
        Residuals against the frozen prediction [s].
    dt_s : ndarray, shape (L,)
        Time of each residual after the first [s].
    cov : ndarray, shape (L, L)
        Their covariance without anomaly [s^2].
    onset_offset_s : float
        Time from the last clean epoch to the first residual [s] (a frequency step is assumed
        to start at the last clean epoch).

    Returns
    -------
    dict
        hypothesis -> (statistic l, size a, standard uncertainty of a); sizes in s (outlier,
        phase step) or dimensionless (frequency step).
    """
    r = np.asarray(residual_s, dtype=float)
    n = r.size
    sig = {"outlier": np.eye(n)[0], "phase_step": np.ones(n),
           "frequency_step": np.asarray(dt_s, dtype=float) + onset_offset_s}
    chol = np.linalg.cholesky(cov)
    wr = np.linalg.solve(chol, r)
    out = {}
    for name, s in sig.items():
        ws = np.linalg.solve(chol, s)
        info = float(ws @ ws)
        proj = float(ws @ wr)
        out[name] = (proj * proj / info, proj / info, 1.0 / math.sqrt(info))
    return out
