"""Internal: the ensemble time scale, epoch by epoch.

One Kalman filter over all member clocks (:mod:`.kalman`) supplies each clock's frequency and
drift; the basic time scale equation (BTSE) forms the scale's phase from the measured
differences with stability weights (Greenhall 2001, "Kalman plus weights", Proc. 33rd PTTI).

Frequency split.  A single set of weights is optimal at one averaging time only.  Two sets
act in two bands here:

* the **phase weights** w (inverse model prediction-error variance at the weighting interval)
  combine the clocks' prediction residuals in the BTSE, so they rule the short term;
* the **frame weights** v (inverse Hadamard variance of each clock's model at a long averaging
  time) define the filter's frame: its estimates are relative to the v-weighted mean clock (a
  transparent projection, see :mod:`.kalman`).  The BTSE predictions use those frequencies, so
  the scale's long-term frequency follows the v-weighted mean of the clocks' frequencies.  The
  hand-over between the bands happens where the filter's frequency estimates take over from
  the phase data, i.e. where each clock's white noise meets its random walk, the crossover of
  an optimal (Wiener) combination.

When v changes (a clock enters, leaves, or its noise estimate moves) the frame's frequency and
drift change; ``frame_frequency`` and ``frame_drift`` absorb the change so that the scale's
frequency and drift are continuous.  Changing w never steps the scale (BTSE property).

Anomalies (:mod:`.detect`) are dealt with before the BTSE of the epoch: a held clock has zero
weight, and a detected step is absorbed into the clock's state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.stats

from ..model.clockmodel import ClockNoise
from ..units import SECONDS_PER_DAY
from .detect import (SignatureGLR, frozen_prediction_covariance, glr_classify, glr_threshold,
                     window_threshold)
from .kalman import SCALE, EnsembleFilter, cholesky, cholesky_inverse
from .settings import DetectionSettings, EnsembleSettings
from .weights import relative_cap_weights

# Standing of a clock in the ensemble (archive /scale/state codes).
ABSENT, PROBATION, ACTIVE, EXCLUDED, REMOVED, MONITOR = 0, 1, 2, 3, 4, 5
STATE_NAMES = {ABSENT: "absent", PROBATION: "probation", ACTIVE: "active",
               EXCLUDED: "excluded", REMOVED: "removed", MONITOR: "monitor"}

#: Epochs over which a clock must be "in family" before it is (re-)admitted.
FAMILY_EPOCHS = 24
#: 99 % point of chi2(n)/n for n = 0..FAMILY_EPOCHS (index n; n = 0 unused).
_FAMILY_LIMIT = np.concatenate(
    [[np.inf], scipy.stats.chi2.ppf(0.99, np.arange(1, FAMILY_EPOCHS + 1))
     / np.arange(1, FAMILY_EPOCHS + 1)])


@dataclass
class ClockSetup:
    """What the engine needs to know about one clock before it starts.

    Attributes
    ----------
    noise : ClockNoise
        Noise levels (SI).
    drift_state : bool
        Whether the clock has a drift state.
    monitor : bool
        Measured only, never in the filter or the scale.
    frequency_prior : float
        Standard uncertainty of an unknown initial frequency [1].
    drift_prior_per_s : float
        Standard uncertainty of an unknown initial drift [1/s].
    frame_hvar : float
        The clock's Hadamard variance at the frame interval from its measured stability curve
        (flicker floor included) [1]; NaN to use the model's.  The filter's q2 is an effective
        level for the sampling interval and can understate a flicker floor far beyond it.
    initial_state : ndarray (3,), optional
        (phase [s] vs the first epoch's reference, frequency [1], drift [1/s]) at the first
        epoch, from the start-up estimation; None to start from the first measurement.
    initial_cov : ndarray (3, 3), optional
        Covariance of ``initial_state``.
    """

    noise: ClockNoise
    drift_state: bool = True
    monitor: bool = False
    frequency_prior: float = 1e-11
    drift_prior_per_s: float = 1e-20
    frame_hvar: float = math.nan
    initial_state: np.ndarray | None = None
    initial_cov: np.ndarray | None = None


@dataclass
class Event:
    """A detected anomaly (one /events row).

    ``magnitude`` (SI): s for outlier and phase_step, 1 for frequency_step, 1/s for
    drift_change; ``uncertainty`` its standard uncertainty in the same unit.
    """

    mjd: float
    clock: str
    kind: str
    magnitude: float
    score: float
    detected_mjd: float = math.nan
    uncertainty: float = math.nan


@dataclass
class _Episode:
    """A held clock: residuals against its frozen prediction."""

    start_mjd: float
    start_t: float
    onset_offset_s: float
    prior_cov: np.ndarray
    times: list = field(default_factory=list)
    residuals: list = field(default_factory=list)
    variances: list = field(default_factory=list)



def _nans(n: int) -> np.ndarray:
    """A float array of n NaN (np.full's cost without its generality, on the per-epoch path)."""
    out = np.empty(n)
    out.fill(np.nan)
    return out

class TimeScaleEngine:
    """Forms the ensemble time scale epoch by epoch.

    Parameters
    ----------
    clocks : sequence of str
        Clock identifiers (column order).
    tau0_s : float
        Nominal sampling interval [s].
    setups : sequence of ClockSetup
        One per clock.
    ensemble : EnsembleSettings
    detection : DetectionSettings
    """

    def __init__(self, clocks, tau0_s: float, setups, ensemble: EnsembleSettings,
                 detection: DetectionSettings):
        self.clocks = tuple(clocks)
        n = len(self.clocks)
        self.n = n
        self.tau0_s = float(tau0_s)
        self.cfg = ensemble
        self.det = detection
        self.setups = list(setups)
        self.has_drift = np.array([s.drift_state for s in self.setups], dtype=bool)
        self.monitor = np.array([s.monitor for s in self.setups], dtype=bool)
        self.filter = EnsembleFilter(n)
        self.noise = [s.noise for s in self.setups]
        self.q_si = np.zeros((n, 3))
        self.r_si = np.zeros(n)
        #: measured long-term Hadamard variance at the frame interval (NaN: from the model)
        self.frame_hvar = np.array([s.frame_hvar for s in setups], dtype=float)
        for i, s in enumerate(self.setups):
            self._set_noise(i, s.noise)
        self.status = np.where(self.monitor, MONITOR, ABSENT).astype(np.int8)
        self.status_since = np.zeros(n)
        self.exclusion_days = np.zeros(n)
        self.last_seen = np.full(n, -np.inf)
        self.last_update_t = np.full(n, np.nan)
        self.epoch = -1
        self.t = math.nan
        self.mjd = math.nan
        # BTSE memory
        self.prev_offset = np.full(n, np.nan)
        self.prev_clean = np.zeros(n, dtype=bool)
        self.prev_freq = np.zeros(n)        # clock - scale frequency estimate [1]
        self.prev_drift = np.zeros(n)       # clock - scale drift estimate [1/s]
        self.frame_frequency = 0.0          # y_frame - y_scale [1]
        self.frame_drift = 0.0              # d_frame - d_scale [1/s]
        self.scale_minus_frame = 0.0        # TA - frame phase [s] (fallback read-out)
        self.weights = np.zeros(n)
        self.frame_weights = np.zeros(n)
        self.var_pred = np.full(n, np.nan)  # model prediction-error variance at tau_w [s^2]
        self._weights_due = 0               # epochs until the weights are recomputed
        # anomaly tests
        self.episodes: dict[int, _Episode] = {}
        rate = detection.false_alarm_rate
        self.h_event = glr_threshold(0.5 * rate)
        self.slow = SignatureGLR(n, detection.window_epochs,
                                 window_threshold(0.25 * rate, detection.window_epochs))
        self.events: list[Event] = []
        self.family = np.full((FAMILY_EPOCHS, n), np.nan)   # standardised BTSE residuals^2
        # noise tracking: running mean of each clock's squared standardised residual
        self.z2_mean = np.ones(n)
        self.z2_count = np.zeros(n)
        self.next_tracking_t = math.nan

    # ------------------------------------------------------------------------- helpers
    def _set_noise(self, i: int, noise: ClockNoise) -> None:
        q3 = noise.q3_per_s3 if self.has_drift[i] else 0.0
        self.noise[i] = noise
        self.q_si[i] = (noise.q1_s, noise.q2_per_s, q3)
        self.r_si[i] = noise.r_s2
        self.filter.set_noise(i, noise.q1_s, noise.q2_per_s, q3, noise.r_s2)

    def _weight_interval(self) -> float:
        return self.cfg.weighting_interval_s or self.tau0_s

    def _model_pred_var(self, idx, span_s: float) -> np.ndarray:
        """Model variance of a clock's BTSE prediction residual over ``span_s`` [s^2]."""
        q = self.q_si[idx]
        s = span_s
        return q[..., 0] * s + q[..., 1] * s ** 3 / 3.0 + q[..., 2] * s ** 5 / 20.0 \
            + 2.0 * self.r_si[idx]

    def _p_yy(self) -> np.ndarray:
        """Each clock's frequency variance in the filter (relative to the frame) [1]."""
        return np.diag(self.filter.P)[1::3] / SCALE[1] ** 2

    def _frame_weight_update(self, initial: bool = False) -> None:
        """Recompute the frame weights v and re-reference the filter (continuity kept).

        With ``initial`` the projection defines the frame (the scale starts with the frame's
        frequency and drift); afterwards a change of v moves the frame and the offsets
        ``frame_frequency`` and ``frame_drift`` absorb the move.
        """
        eligible = (self.status == ACTIVE) & self.filter.active
        if not eligible.any():
            eligible = self.filter.active & ~self.monitor
        if not eligible.any():
            self.frame_weights = np.zeros(self.n)
            return
        tau = self.cfg.frame_interval_s
        q = self.q_si
        # Hadamard variance of each clock's model at the frame interval (as in
        # ensemble.model.clockmodel.hadamard_variance)
        hvar = (10.0 * self.r_si / (3.0 * tau * tau) + q[:, 0] / tau + q[:, 1] * tau / 6.0
                + 11.0 * q[:, 2] * tau ** 3 / 120.0)
        hvar = np.where(np.isfinite(self.frame_hvar), np.maximum(self.frame_hvar, hvar), hvar)
        v = relative_cap_weights(np.where(eligible, hvar, np.inf), eligible, self.cfg.cap(), 0)
        self.frame_weights = v
        shift = self.filter.project(v)
        if not initial:
            self.frame_frequency += shift[1]
            self.frame_drift += shift[2]
            self.scale_minus_frame -= shift[0]

    def _refresh_weights(self) -> None:
        """Phase weights from each clock's model prediction-error variance at the weighting
        interval: Q11(tau_w) + tau_w^2 P_yy + 2 r (the frequency estimate's uncertainty and the
        white PM of the two phase readings included).

        The variance comes from the clock's noise levels, which the tracking re-estimates; the
        residuals against the scale alone cannot tell two dominant clocks apart (for two equal
        clocks at weight 1/2 both residuals are half their difference).
        """
        eligible = (self.status == ACTIVE) & self.filter.active
        span = self._weight_interval()
        var = self._model_pred_var(slice(None), span) + span * span * self._p_yy()
        self.var_pred = np.where(eligible, var, np.nan)
        self.weights = relative_cap_weights(self.var_pred, eligible, self.cfg.cap(), 0)

    def _pivot(self, candidates: np.ndarray, ref: int) -> int:
        """The clock the epoch's differences are taken against: the reference if usable."""
        if candidates[ref]:
            return ref
        idx = np.flatnonzero(candidates)
        if idx.size == 0:
            return -1
        return int(idx[np.argmax(self.weights[idx] + 1e-9 * self.frame_weights[idx])])

    def _residuals(self, z: np.ndarray, members: np.ndarray, pivot: int, clean: np.ndarray):
        """Each member's innovation conditioned on the clean clocks' innovations.

        For clock i, r_i = nu_i - E[nu_i | nu_clean] with variance Var[nu_i | nu_clean], from
        the joint innovation covariance S of all channels against the pivot: the optimally
        weighted prediction error of clock i relative to the other clean clocks, so a fault
        shows in the clock that has it.  The pivot's fault appears as -1 in every channel:
        r_p = -1^T S^-1 nu / 1^T S^-1 1 over the clean channels.

        Returns (r [s], var [s^2], chol) with r, var of shape (n,) (NaN outside ``members``)
        and the Cholesky factor of the clean channels' S (scaled units) or None.
        """
        r = _nans(self.n)
        var = _nans(self.n)
        sel = members.copy()
        sel[pivot] = False
        others = sel.nonzero()[0]
        if others.size == 0:
            return r, var, None
        nu, s = self.filter.innovations(z[others] - z[pivot], others, pivot)
        c = clean[others]
        if np.count_nonzero(c) == c.size:        # the usual case: nobody held
            chol = cholesky(s)
            inv = cholesky_inverse(chol)
            d = inv.diagonal()
            r[others] = (inv @ nu) / d * 1e-9
            var[others] = 1e-18 / d
            if clean[pivot]:
                ones = inv.sum(axis=0)
                info = float(ones.sum())
                r[pivot] = -float(ones @ nu) / info * 1e-9
                var[pivot] = 1e-18 / info
            return r, var, chol
        ic, ih = c.nonzero()[0], (~c).nonzero()[0]
        if ic.size == 0:
            r[others], var[others] = nu * 1e-9, np.diag(s) * 1e-18
            return r, var, None
        scc = s[np.ix_(ic, ic)]
        chol = cholesky(scc)
        inv = cholesky_inverse(chol)
        d = np.diag(inv)
        r[others[ic]] = (inv @ nu[ic]) / d * 1e-9
        var[others[ic]] = 1e-18 / d
        ones = inv.sum(axis=0)
        info = float(ones.sum())
        if clean[pivot]:
            r[pivot] = -float(ones @ nu[ic]) / info * 1e-9
            var[pivot] = 1e-18 / info
        sch = s[np.ix_(ih, ic)]
        gain = sch @ inv
        r[others[ih]] = (nu[ih] - gain @ nu[ic]) * 1e-9
        var[others[ih]] = (np.diag(s)[ih] - np.einsum("ij,ij->i", gain, sch)) * 1e-18
        return r, var, None

    # --------------------------------------------------------------------------- set-up
    def _activate(self, i: int, z: np.ndarray, pivot: int, t: float) -> None:
        """Give a newly measured clock a state, linked to the pivot's phase estimate."""
        setup = self.setups[i]
        p_x = self.filter.state_si(pivot)[0]
        dprior = setup.drift_prior_per_s if setup.drift_state else 0.0
        cov = np.diag([self.r_si[i] + self.r_si[pivot], setup.frequency_prior ** 2, dprior ** 2])
        self.filter.activate(i, np.array([z[i] - z[pivot] + p_x, 0.0, 0.0]), cov,
                             phase_link=pivot)
        self.status[i] = PROBATION
        self.status_since[i] = t
        self._reset_tracking(i)
        self.family[:, i] = np.nan
        self._reset_slow(i)
        self.prev_clean[i] = False
        self.last_update_t[i] = t

    def _start(self, t: float, z: np.ndarray) -> None:
        """First epoch: states from the start-up estimation (relative to the reference)."""
        measured = np.isfinite(z) & ~self.monitor
        for i in measured.nonzero()[0]:
            s = self.setups[i]
            if s.initial_state is not None:
                state = np.array(s.initial_state, dtype=float)
                cov = np.array(s.initial_cov, dtype=float)
            else:
                dprior = s.drift_prior_per_s if s.drift_state else 0.0
                state = np.array([z[i], 0.0, 0.0])
                cov = np.diag([self.r_si[i] + 1e-24, s.frequency_prior ** 2, dprior ** 2])
            if not s.drift_state:
                state[2] = 0.0
                cov[2, :] = cov[:, 2] = 0.0
            self.filter.activate(i, state, cov)
            self.status[i] = ACTIVE
            self.last_update_t[i] = t
        self._refresh_weights()
        self._frame_weight_update(initial=True)

    # ------------------------------------------------------------------------------ step
    def step(self, t_s: float, mjd: float, z: np.ndarray, ref: int) -> dict:
        """Process one epoch.

        Parameters
        ----------
        t_s : float
            Elapsed time on the continuous time axis [s].
        mjd : float
            Epoch tag (MJD, UTC) for the records.
        z : ndarray, shape (n,)
            Measured clock - reference [s]; NaN where missing; 0 for the reference.
        ref : int
            Reference clock of this epoch.

        Returns
        -------
        dict
            offset [s], frequency [1], drift [1/s], weight [1], state, zscore (all (n,)), and
            scale_sigma [s], the estimated standard deviation of the scale's step.
        """
        z = np.asarray(z, dtype=float)
        first = self.epoch < 0
        dt = 0.0 if first else t_s - self.t
        if not first and not dt > 0:
            raise ValueError(f"epochs must increase: {t_s} after {self.t}")
        self.epoch += 1
        self._t_prev, self._mjd_prev = self.t, self.mjd
        self.t, self.mjd = t_s, mjd
        measured = np.isfinite(z)
        if first:
            self._start(t_s, z)
            self.next_tracking_t = t_s + self.cfg.tracking_interval_days * SECONDS_PER_DAY
        else:
            self.filter.predict(dt)
        self.last_seen[measured] = t_s
        gone = (self.filter.active & ~measured
                & (t_s - self.last_seen > self.cfg.max_gap_days * SECONDS_PER_DAY))
        if np.count_nonzero(gone):
            for i in gone.nonzero()[0]:
                self._remove(i, t_s)
        members = measured & self.filter.active & ~self.monitor
        held = np.zeros(self.n, dtype=bool)
        if self.episodes:
            held[list(self.episodes)] = True
        held &= members
        new = measured & ~self.filter.active & ~self.monitor
        if np.count_nonzero(new) and not first:
            pivot = self._pivot(members & ~held, ref)
            if pivot >= 0:
                for i in new.nonzero()[0]:
                    self._activate(i, z, pivot, t_s)
                    members[i] = True
                self._frame_weight_update()

        clean = members & ~held
        zscore = _nans(self.n)
        decided = np.zeros(self.n, dtype=bool)
        pivot = self._pivot(clean, ref)
        if not first and pivot >= 0 and np.count_nonzero(members) >= 2:
            pivot = self._screen(z, members, clean, pivot, ref, t_s, zscore, decided)
        # ---------------------------------------------------------------- the time scale
        est = self.filter.states_si()
        contrib = (clean & ~decided & self.prev_clean & (self.status == ACTIVE)
                   & (self.weights > 0))
        pred = self.prev_offset + self.prev_freq * dt + 0.5 * self.prev_drift * dt * dt
        pred = np.where(self.prev_clean & measured, pred, np.nan)
        used = np.zeros(self.n)
        if first:
            w0 = np.where(measured & self.filter.active, self.weights, 0.0)
            if w0.sum() <= 0:
                w0 = (measured & self.filter.active).astype(float)
            used = w0 / w0.sum()
            c = float(used[measured] @ z[measured])
        elif np.count_nonzero(contrib):
            used[contrib] = self.weights[contrib] / self.weights[contrib].sum()
            c = float(used[contrib] @ (z[contrib] - pred[contrib]))
        else:
            c, used = self._fallback_readout(z, members, pivot, est, dt)
        offset = np.where(measured, z - c, np.nan)
        if np.isfinite(c) and pivot >= 0:
            self.scale_minus_frame = est[pivot, 0] - offset[pivot]
        active = self.filter.active
        freq = np.where(active, est[:, 1] + self.frame_frequency, np.nan)
        drift = np.where(active, est[:, 2] + self.frame_drift, np.nan)
        # ------------------------------------------------------- statistics and standings
        clean_now = clean & ~decided
        waiting = (self.status == PROBATION) | (self.status == EXCLUDED)
        if not first and np.count_nonzero(waiting):
            self._record_family(offset - pred, clean_now & waiting, used, dt)
        if self.cfg.tracking and not first:
            self._record_residuals(zscore, clean_now)
        standing = self.status.copy()
        if np.count_nonzero(waiting):
            self._advance_standings(t_s)
        if self.cfg.tracking and t_s >= self.next_tracking_t:
            self._track_noise()
            self.next_tracking_t = t_s + self.cfg.tracking_interval_days * SECONDS_PER_DAY
            self._weights_due = 0
        # the weights follow the standings at once, the slowly changing P_yy daily
        self._weights_due -= 1
        if self._weights_due <= 0 or not np.array_equal(standing, self.status) \
                or np.count_nonzero(decided) or first:
            self._refresh_weights()
            self._weights_due = max(1, int(SECONDS_PER_DAY / self.tau0_s))
        vp = np.where(np.isfinite(self.var_pred), self.var_pred, 0.0)
        sigma = math.sqrt(float(used ** 2 @ vp))
        self.prev_offset = offset
        self.prev_clean = clean_now
        self.prev_freq = np.where(np.isfinite(freq), freq, 0.0)
        self.prev_drift = np.where(np.isfinite(drift), drift, 0.0)
        return {"offset": offset, "frequency": freq, "drift": drift, "weight": used,
                "state": self.status.copy(), "zscore": zscore, "scale_sigma": sigma}

    def _screen(self, z, members, clean, pivot, ref, t_s, zscore, decided) -> int:
        """Hold suspicious clocks, advance hold episodes, update the filter, run the slow test.

        Modifies ``clean``, ``zscore`` and ``decided`` in place; returns the final pivot.
        """
        r, var, chol = self._residuals(z, members, pivot, clean)
        max_hold = max(1, (int(np.count_nonzero(members)) - 1) // 2)
        n_new = 0
        while True:
            # NaN (non-members) propagates without a warning; var > 0 wherever it is finite
            zs = np.abs(r) / np.sqrt(np.maximum(var, 1e-300))
            zs = np.where(clean & np.isfinite(zs), zs, -1.0)
            i = int(np.argmax(zs))
            if zs[i] <= self.det.hold_sigma or n_new >= max_hold:
                break
            self._open_episode(i, t_s)
            clean[i] = False
            n_new += 1
            if i == pivot:
                pivot = self._pivot(clean, ref)
                if pivot < 0:
                    return -1
            r, var, chol = self._residuals(z, members, pivot, clean)
        zscore[:] = r / np.sqrt(var)
        resolved = False
        for i in list(self.episodes):
            if not members[i] or not np.isfinite(r[i]):
                self._age_episode(i, t_s)
                continue
            outcome = self._advance_episode(i, t_s, r[i], var[i])
            if outcome is not None:
                clean[i] = True
                resolved = True
                decided[i] = outcome != "nothing"
        if clean[ref] and pivot != ref:
            pivot = ref
            resolved = True
        sel = clean.copy()
        sel[pivot] = False
        upd = sel.nonzero()[0]
        result = None
        if upd.size:
            result = self.filter.update(z[upd] - z[pivot], upd, pivot,
                                        chol=None if resolved else chol, symmetrize=False)
            self.last_update_t[upd] = t_s
            self.last_update_t[pivot] = t_s
        self.filter.project(self.frame_weights)
        # slow changes, on the clocks whose residual entered normally
        valid = clean & ~decided & np.isfinite(r)
        if result is not None:
            gain = self.filter.relative_gains(result, pivot, self.frame_weights)
        else:
            gain = np.zeros((self.n, 3))
        for i, kind, onset_mjd, size, unc, stat, corr in self.slow.step(
                self._t_prev, self._mjd_prev, self.t - self._t_prev, self.t, gain, r, var,
                valid, self.has_drift):
            self._slow_change(i, kind, onset_mjd, size, unc, stat, corr)
            clean[i] = False
            decided[i] = True
        return pivot

    def _fallback_readout(self, z, members, pivot, est, dt):
        """No clock can carry the scale this epoch: read it from the filter's frame.

        The weights reported are the frame weights (which define the frame); should no clock
        be active at all, the clock with the largest frame weight is made active, since the
        ensemble cannot run without a member.
        """
        self.scale_minus_frame -= self.frame_frequency * dt + 0.5 * self.frame_drift * dt * dt
        used = np.zeros(self.n)
        p = pivot
        if p < 0 and members.any():
            p = int(np.flatnonzero(members)[0])
        if p < 0:
            return math.nan, used
        if not (self.status == ACTIVE).any():
            best = int(np.argmax(np.where(self.filter.active, self.frame_weights, -1.0)))
            self.status[best] = ACTIVE
            self.status_since[best] = self.t
            self._frame_weight_update()
        used = np.where(self.status == ACTIVE, self.frame_weights, 0.0)
        if used.sum() <= 0:
            used = (self.status == ACTIVE).astype(float)
        used /= used.sum()
        return float(z[p] - est[p, 0] + self.scale_minus_frame), used

    # ---------------------------------------------------------------- hold episodes
    def _open_episode(self, i: int, t_s: float) -> None:
        last = self.last_update_t[i]
        onset = 0.0 if not np.isfinite(last) else t_s - last
        self.episodes[i] = _Episode(self.mjd, t_s, onset, self.filter.cov_si(i))

    def _age_episode(self, i: int, t_s: float) -> None:
        if t_s - self.episodes[i].start_t > 4 * self.det.max_hold_epochs * self.tau0_s:
            del self.episodes[i]

    def _advance_episode(self, i: int, t_s: float, r: float, var: float):
        """Add a residual to clock i's hold episode; decide when the evidence suffices.

        Returns None (continue), "nothing", or the event kind (after correcting the state).
        """
        ep = self.episodes[i]
        ep.times.append(t_s - ep.start_t)
        ep.residuals.append(r)
        ep.variances.append(var)
        n = len(ep.residuals)
        if n < 2:
            return None
        q = self.q_si[i]
        dts = np.array(ep.times)
        own = np.diag(frozen_prediction_covariance(dts, ep.prior_cov, q, np.zeros(n)))
        variances = np.array(ep.variances)
        diag = np.maximum(variances - own, 0.25 * variances)
        cov = frozen_prediction_covariance(dts, ep.prior_cov, q, diag)
        stats = glr_classify(np.array(ep.residuals), dts, cov, ep.onset_offset_s)
        ranked = sorted(stats.items(), key=lambda kv: -kv[1][0])
        (best, (l1, a1, s1)), (_, (l2, _, _)) = ranked[0], ranked[1]
        back = abs(r) / math.sqrt(var) < self.det.hold_sigma
        outcome = None
        if l1 >= self.h_event and (l1 - l2 >= self.det.decision_margin
                                   or n >= self.det.max_hold_epochs):
            outcome = best
        elif n >= self.det.max_hold_epochs or (back and l1 < self.h_event):
            outcome = "nothing"
        if outcome is None:
            return None
        del self.episodes[i]
        if outcome == "nothing":
            return outcome
        name = self.clocks[i]
        self.events.append(Event(ep.start_mjd, name, outcome, a1, l1, self.mjd, s1))
        if outcome == "phase_step":
            self._correct(i, np.array([a1, 0.0, 0.0]), np.array([s1 * s1, 0.0, 0.0]))
            self._exclude(i, self.t)
        elif outcome == "frequency_step":
            span = dts[-1] + ep.onset_offset_s
            self._correct(i, np.array([a1 * span, a1, 0.0]),
                          np.array([(s1 * span) ** 2, s1 * s1, 0.0]))
            self._exclude(i, self.t, relearn=True)
        self._reset_slow(i)
        return outcome

    # ----------------------------------------------------------------- slow changes
    def _slow_change(self, i, kind, onset_mjd, size, unc, stat, correction) -> None:
        """A windowed-GLR alarm: absorb the detected jump into the clock's state."""
        rel = np.abs(correction / size) if size != 0 else np.zeros(3)
        self._correct(i, correction, (rel * unc) ** 2 + (0.25 * correction) ** 2)
        self.events.append(Event(onset_mjd, self.clocks[i], kind, size, stat, self.mjd, unc))
        self._reset_slow(i)
        self._exclude(i, self.t, relearn=True)

    def _correct(self, i: int, delta: np.ndarray, inflate: np.ndarray) -> None:
        """Absorb a detected jump into clock i's state without moving the scale.

        The correction moves the v-weighted mean of the estimates by v_i times the correction;
        re-projecting at once and booking the move in ``frame_frequency``/``frame_drift``
        keeps the scale where it was.  (Booking the whole estimated jump instead would keep a
        true jump out of the scale entirely, but would turn every false alarm of a frame member
        into a lasting frequency step of the scale: measured in the benchmark.)  What the
        scale followed of the jump before its detection stays.
        """
        self.filter.correct(i, delta, inflate)
        shift = self.filter.project(self.frame_weights)
        self.frame_frequency += shift[1]
        self.frame_drift += shift[2]
        self.scale_minus_frame -= shift[0]

    # -------------------------------------------------------------------- standings
    def _exclude(self, i: int, t_s: float, relearn: bool = False) -> None:
        if self.status[i] in (ACTIVE, EXCLUDED, PROBATION):
            if self.status[i] != PROBATION:
                self.status[i] = EXCLUDED
            self.status_since[i] = t_s
            self.exclusion_days[i] = self.cfg.relearn_days if relearn else self.cfg.settle_days
            if relearn:
                self._reset_tracking(i)
                self.family[:, i] = np.nan
            if self.frame_weights[i] > 0:
                self._frame_weight_update()
        self.prev_clean[i] = False

    def _remove(self, i: int, t_s: float) -> None:
        self.filter.deactivate(i)
        self.status[i] = REMOVED
        self.status_since[i] = t_s
        self.episodes.pop(i, None)
        self.prev_clean[i] = False
        self._frame_weight_update()

    def _advance_standings(self, t_s: float) -> None:
        days = (t_s - self.status_since) / SECONDS_PER_DAY
        fam = np.isfinite(self.family)
        n_fam = fam.sum(axis=0)
        mean_fam = np.where(fam, self.family, 0.0).sum(axis=0) / np.maximum(n_fam, 1)
        in_family = (n_fam >= FAMILY_EPOCHS // 2) & (mean_fam <= _FAMILY_LIMIT[n_fam])
        admit = (((self.status == PROBATION) & (days >= self.cfg.probation_days))
                 | ((self.status == EXCLUDED) & (days >= self.exclusion_days))) & in_family
        if admit.any():
            self.status[admit] = ACTIVE
            self.status_since[admit] = t_s
            self._frame_weight_update()

    # ---------------------------------------------------------- running statistics
    def _record_family(self, residual, clean_now, used, dt) -> None:
        """Standardised BTSE residuals for the in-family test of (re-)admission.

        A clock's residual against the scale has the variance
        sigma_i^2 (1 - 2 u_i) + sum_j u_j^2 sigma_j^2 for the weights u of the epoch.
        """
        row = self.epoch % FAMILY_EPOCHS
        self.family[row] = np.nan
        ok = clean_now & np.isfinite(residual)
        if not ok.any():
            return
        model = self._model_pred_var(slice(None), dt)
        model = np.where(self.filter.active, model, 0.0)
        scale_var = float(used ** 2 @ model)
        expected = np.maximum(model * (1.0 - 2.0 * used) + scale_var, 1e-3 * model)
        self.family[row, ok] = residual[ok] ** 2 / expected[ok]

    def _reset_slow(self, i: int) -> None:
        self.slow.reset(i)

    def _reset_tracking(self, i: int) -> None:
        self.z2_mean[i] = 1.0
        self.z2_count[i] = 0.0

    def _record_residuals(self, zscore: np.ndarray, clean_now: np.ndarray) -> None:
        """Running mean of each clock's squared standardised residual (model check)."""
        ok = clean_now & np.isfinite(zscore)
        if not ok.any():
            return
        lam = min(1.0, self.tau0_s / (self.cfg.tracking_memory_days * SECONDS_PER_DAY))
        z2 = np.minimum(zscore[ok] ** 2, 25.0)   # one anomaly must not dominate the mean
        self.z2_mean[ok] += lam * (z2 - self.z2_mean[ok])
        self.z2_count[ok] += 1.0

    def _track_noise(self) -> None:
        """Re-scale each clock's noise levels so that its residuals have unit variance.

        The mean squared standardised residual of a correct model is 1 (the innovation check of
        Tryon & Jones 1983; a steady excess means the q's are too small).  When a
        clock's running mean departs from 1 by more than three standard errors, q1 and q2 are
        scaled by that ratio, limited to ``tracking_max_change`` per re-estimation, so a clock
        whose noise grows loses weight gradually.
        """
        limit = 1.0 + self.cfg.tracking_max_change
        n_eff = np.minimum(self.z2_count, self.cfg.tracking_memory_days * SECONDS_PER_DAY
                           / self.tau0_s)
        week = 7 * SECONDS_PER_DAY / self.tau0_s
        ratio = self.z2_mean
        significant = ((n_eff >= week)
                       & (np.abs(ratio - 1.0) > 3.0 * np.sqrt(2.0 / np.maximum(n_eff, 1))))
        changed = False
        for i in np.flatnonzero(significant & self.filter.active & ~self.monitor):
            f = float(np.clip(ratio[i], 1.0 / limit, limit))
            nz = self.noise[i]
            self._set_noise(i, ClockNoise(nz.q1_s * f, nz.q2_per_s * f, nz.q3_per_s3 * f,
                                          nz.r_s2))
            self.frame_hvar[i] *= f
            self.z2_mean[i] /= f
            changed = True
        if changed:
            self._frame_weight_update()

    # ------------------------------------------------------------------------- persistence
    _SCALARS = ("epoch", "t", "mjd", "_t_prev", "_mjd_prev", "frame_frequency", "frame_drift",
                "scale_minus_frame", "next_tracking_t", "_weights_due")
    _ARRAYS = ("frame_hvar", "status", "status_since", "exclusion_days", "last_seen",
               "last_update_t",
               "prev_offset", "prev_clean", "prev_freq", "prev_drift", "weights",
               "frame_weights", "var_pred", "family", "z2_mean", "z2_count")

    def state_dict(self) -> dict:
        """Everything needed to continue later: numeric arrays and plain numbers only."""
        state = {"clocks": list(self.clocks), "tau0_s": self.tau0_s,
                 "noise": np.array([[n.q1_s, n.q2_per_s, n.q3_per_s3, n.r_s2]
                                    for n in self.noise]),
                 "has_drift": self.has_drift.copy(), "monitor": self.monitor.copy(),
                 "frequency_prior": np.array([s.frequency_prior for s in self.setups]),
                 "drift_prior": np.array([s.drift_prior_per_s for s in self.setups]),
                 "filter": self.filter.state_dict(), "slow": self.slow.state_dict()}
        for name in self._SCALARS:
            state[name] = float(getattr(self, name))
        for name in self._ARRAYS:
            state[name] = np.array(getattr(self, name))
        state["episodes"] = {
            str(i): {"start_mjd": ep.start_mjd, "start_t": ep.start_t,
                     "onset_offset_s": ep.onset_offset_s, "prior_cov": np.array(ep.prior_cov),
                     "times": np.array(ep.times, dtype=float),
                     "residuals": np.array(ep.residuals, dtype=float),
                     "variances": np.array(ep.variances, dtype=float)}
            for i, ep in self.episodes.items()}
        return state

    @classmethod
    def from_state(cls, state: dict, ensemble: EnsembleSettings,
                   detection: DetectionSettings) -> "TimeScaleEngine":
        """Rebuild an engine saved with :meth:`state_dict` (bit-identical continuation)."""
        noise = np.asarray(state["noise"], dtype=float)
        setups = [ClockSetup(ClockNoise(*row), drift_state=bool(d), monitor=bool(m),
                             frequency_prior=float(fp), drift_prior_per_s=float(dp))
                  for row, d, m, fp, dp in zip(noise, state["has_drift"], state["monitor"],
                                               state["frequency_prior"], state["drift_prior"])]
        eng = cls(state["clocks"], float(state["tau0_s"]), setups, ensemble, detection)
        eng.filter = EnsembleFilter.from_state(state["filter"])
        eng.slow.load_state(state["slow"])
        for name in cls._SCALARS:
            value = float(state[name])
            setattr(eng, name, int(value) if name in ("epoch", "_weights_due") else value)
        for name in cls._ARRAYS:
            current = getattr(eng, name)
            setattr(eng, name, np.array(state[name], dtype=current.dtype))
        eng.episodes = {}
        for key, ep in state.get("episodes", {}).items():
            eng.episodes[int(key)] = _Episode(
                float(ep["start_mjd"]), float(ep["start_t"]), float(ep["onset_offset_s"]),
                np.array(ep["prior_cov"], dtype=float), list(np.asarray(ep["times"], float)),
                list(np.asarray(ep["residuals"], float)), list(np.asarray(ep["variances"], float)))
        return eng

    def add_clocks(self, setups_by_name: dict) -> None:
        """Add clocks that appear for the first time in a later run (new last columns)."""
        names = [name for name in setups_by_name if name not in self.clocks]
        if not names:
            return
        state = self.state_dict()
        k = len(names)
        n = self.n
        state["clocks"] = list(self.clocks) + names
        new = [setups_by_name[name] for name in names]
        state["noise"] = np.vstack([state["noise"], [[s.noise.q1_s, s.noise.q2_per_s,
                                                      s.noise.q3_per_s3, s.noise.r_s2]
                                                     for s in new]])
        for key, values in (("has_drift", [s.drift_state for s in new]),
                            ("monitor", [s.monitor for s in new]),
                            ("frequency_prior", [s.frequency_prior for s in new]),
                            ("drift_prior", [s.drift_prior_per_s for s in new])):
            state[key] = np.concatenate([state[key], np.array(values, dtype=state[key].dtype)])
        fills = {"status": np.array([MONITOR if s.monitor else ABSENT for s in new], np.int8),
                 "frame_hvar": np.array([s.frame_hvar for s in new], dtype=float),
                 "last_seen": -np.inf, "prev_offset": np.nan, "var_pred": np.nan,
                 "last_update_t": np.nan, "z2_mean": 1.0}
        for name in self._ARRAYS:
            arr = state[name]
            fill = fills.get(name, 0)
            if arr.ndim == 1:
                extra = np.broadcast_to(np.asarray(fill, dtype=arr.dtype), (k,))
                state[name] = np.concatenate([arr, extra])
            else:   # family (FAMILY_EPOCHS, n)
                state[name] = np.concatenate([arr, np.full((arr.shape[0], k), np.nan)], axis=1)
        f = state["filter"]
        x = np.zeros(3 * (n + k))
        x[:3 * n] = f["x"]
        p = np.zeros((3 * (n + k), 3 * (n + k)))
        p[:3 * n, :3 * n] = f["P"]
        state["filter"] = {"x": x, "P": p,
                           "active": np.concatenate([f["active"], np.zeros(k, bool)]),
                           "q": np.vstack([f["q"], np.zeros((k, 3))]),
                           "r": np.concatenate([f["r"], np.zeros(k)])}
        for bank in ("slow",):
            sl = state[bank]
            state[bank] = dict(
                sl, F=np.concatenate([sl["F"], np.zeros((k,) + sl["F"].shape[1:])]),
                d=np.concatenate([sl["d"], np.zeros((k,) + sl["d"].shape[1:])]),
                C=np.concatenate([sl["C"], np.zeros((k,) + sl["C"].shape[1:])]),
                live=np.concatenate([sl["live"], np.zeros((k,) + sl["live"].shape[1:], bool)]))
        other = TimeScaleEngine.from_state(state, self.cfg, self.det)
        for i, s in enumerate(new):
            other._set_noise(n + i, s.noise)
        self.__dict__.update(other.__dict__)
