"""Internal: anomaly tests (pure functions and small state holders).

Two complementary tests run on each clock's prediction residual relative to the ensemble
(the innovation of the clock minus the weighted mean innovation of the clean clocks, so that a
fault localises to the clock that has it, the reference included; domain primer e.2):

* **Hold and classify.**  A standardised residual beyond ``hold_sigma`` withholds the clock's
  measurements from the filter (its state is only predicted) and zeroes its weight.  The
  residuals against that frozen prediction are then tested with the generalised likelihood
  ratio (Willsky & Jones 1976, IEEE Trans. Autom. Control AC-21, 108-112) for an outlier, a
  phase step and a frequency step, each a known signature s with unknown size a:
  l = (s^T C^-1 r)^2 / (s^T C^-1 s), a = s^T C^-1 r / s^T C^-1 s, where C is the covariance
  of the frozen multi-step prediction errors from the clock model.
* **Slow changes.**  A bank of two-sided CUSUM tests (Page 1954, Biometrika 41) on the
  standardised residuals catches frequency changes too small for the hold threshold; their
  thresholds follow from the false-alarm rate through Siegmund's approximation of the average
  run length, ARL0 = (exp(2 k b) - 1 - 2 k b) / (2 k^2), b = h + 1.166 (Siegmund 1985,
  Sequential Analysis, ch. X; the 1.166 = 2 x 0.583 overshoot correction).
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


def cusum_arl0(k: float, h: float) -> float:
    """Siegmund's approximation of the in-control average run length of a one-sided CUSUM.

    Parameters
    ----------
    k : float
        Reference value (allowance) in units of the standard deviation.
    h : float
        Decision threshold in the same units.
    """
    b = h + 1.166
    return (math.exp(2.0 * k * b) - 1.0 - 2.0 * k * b) / (2.0 * k * k)


def cusum_threshold(k: float, arl0: float) -> float:
    """Threshold h giving the in-control average run length ``arl0`` (Siegmund approximation)."""
    return float(scipy.optimize.brentq(lambda h: cusum_arl0(k, h) - arl0, 1e-6, 200.0))


def cusum_delay(k: float, h: float, shift: float) -> float:
    """Approximate detection delay [epochs] of a one-sided CUSUM for a mean shift (Siegmund)."""
    d = shift - k
    b = h + 1.166
    if abs(d) < 1e-9:
        return b * b
    return (math.exp(-2.0 * d * b) + 2.0 * d * b - 1.0) / (2.0 * d * d)


@dataclass
class CusumBank:
    """Two-sided CUSUM tests with several reference values, for many clocks at once.

    Parameters
    ----------
    n_clocks : int
    allowances : sequence of float
        Reference values k (in standard deviations), one CUSUM pair each.
    false_alarm_rate : float
        Allowed false alarms per clock-epoch for the whole bank (split evenly over the
        2 * len(allowances) one-sided tests).
    """

    n_clocks: int
    allowances: tuple
    false_alarm_rate: float
    thresholds: np.ndarray = field(init=False)
    s_pos: np.ndarray = field(init=False)
    s_neg: np.ndarray = field(init=False)
    zero_pos: np.ndarray = field(init=False)
    zero_neg: np.ndarray = field(init=False)

    def __post_init__(self):
        k = np.asarray(self.allowances, dtype=float)
        arl0 = 2.0 * k.size / self.false_alarm_rate
        self.thresholds = np.array([cusum_threshold(float(ki), arl0) for ki in k])
        shape = (self.n_clocks, k.size)
        self.s_pos = np.zeros(shape)
        self.s_neg = np.zeros(shape)
        # epoch index of the last time each statistic was zero (the change-time estimate)
        self.zero_pos = np.zeros(shape, dtype=np.int64)
        self.zero_neg = np.zeros(shape, dtype=np.int64)

    def step(self, epoch: int, z: np.ndarray, valid: np.ndarray):
        """Feed standardised residuals; return a list of (clock, sign, change_epoch, statistic).

        Clocks with ``valid`` False keep their statistics unchanged.
        """
        k = np.asarray(self.allowances, dtype=float)[None, :]
        zz = np.where(valid, z, 0.0)[:, None]
        sp = np.maximum(0.0, self.s_pos + zz - k)
        sn = np.maximum(0.0, self.s_neg - zz - k)
        v = valid[:, None]
        self.s_pos = np.where(v, sp, self.s_pos)
        self.s_neg = np.where(v, sn, self.s_neg)
        self.zero_pos = np.where(v & (self.s_pos == 0.0), epoch, self.zero_pos)
        self.zero_neg = np.where(v & (self.s_neg == 0.0), epoch, self.zero_neg)
        alarms = []
        over_p = self.s_pos > self.thresholds[None, :]
        over_n = self.s_neg > self.thresholds[None, :]
        for i in np.flatnonzero((over_p | over_n).any(axis=1)):
            # the earliest change time among the tests that fired, and the largest statistic
            if over_p[i].any() and (not over_n[i].any()
                                    or (self.s_pos[i] / self.thresholds).max()
                                    >= (self.s_neg[i] / self.thresholds).max()):
                j = np.flatnonzero(over_p[i])
                alarms.append((int(i), 1, int(self.zero_pos[i, j].min()),
                               float((self.s_pos[i, j] / self.thresholds[j]).max())))
            else:
                j = np.flatnonzero(over_n[i])
                alarms.append((int(i), -1, int(self.zero_neg[i, j].min()),
                               float((self.s_neg[i, j] / self.thresholds[j]).max())))
        return alarms

    def reset(self, i: int, epoch: int) -> None:
        """Restart clock i's tests (after a detected change)."""
        self.s_pos[i] = 0.0
        self.s_neg[i] = 0.0
        self.zero_pos[i] = epoch
        self.zero_neg[i] = epoch

    def state_dict(self) -> dict:
        return {"s_pos": self.s_pos.copy(), "s_neg": self.s_neg.copy(),
                "zero_pos": self.zero_pos.copy(), "zero_neg": self.zero_neg.copy()}

    def load_state(self, state: dict) -> None:
        self.s_pos = np.array(state["s_pos"], dtype=float)
        self.s_neg = np.array(state["s_neg"], dtype=float)
        self.zero_pos = np.array(state["zero_pos"], dtype=np.int64)
        self.zero_neg = np.array(state["zero_neg"], dtype=np.int64)


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
