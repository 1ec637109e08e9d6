"""Internal: the ensemble time scale, epoch by epoch.

One Kalman filter over all member clocks (:mod:`.kalman`) supplies each clock's frequency and
drift; the basic time scale equation (BTSE) forms the scale's phase from the measured
differences with stability weights (domain primer d.1, d.6: "Kalman plus weights").

Frequency split.  A single set of weights is optimal at one averaging time only.  Here two
sets act in two bands:

* the **phase weights** w (inverse prediction-error variance at the weighting interval, capped
  at A/N, self-inclusion corrected) combine the clocks' prediction residuals in the BTSE, so
  they rule the short term;
* the **frame weights** v (inverse Hadamard variance of each clock's model at a long averaging
  time) define the filter's frame: its estimates are relative to the v-weighted mean clock
  (a transparent projection, see :mod:`.kalman`).  The BTSE predictions use those
  frequencies, so the scale's long-term frequency follows the v-weighted mean of the clocks'
  true frequencies.  The hand-over between the bands happens where the filter's frequency
  estimates take over from the phase data, i.e. where each clock's white noise meets its
  random walk: the optimal crossover of a Wiener combination.

When v changes (a clock enters, leaves, or its noise estimate moves) the frame's frequency and
drift change; the offsets ``frame_frequency`` and ``frame_drift`` absorb the change so that the
scale's frequency and drift are continuous.  Changing w never steps the scale (BTSE property).

Anomalies (:mod:`.detect`) are dealt with before the BTSE of the epoch, so the scale does not
see them: a held clock has zero weight; a detected step is absorbed into the clock's state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.stats

from ..model.clockmodel import ClockNoise, hadamard_variance
from ..units import SECONDS_PER_DAY
from .detect import (CusumBank, frozen_prediction_covariance, glr_classify, glr_threshold)
from .kalman import EnsembleFilter
from .settings import DetectionSettings, EnsembleSettings
from .weights import relative_cap_weights

# Standing of a clock in the ensemble (archive /scale/state codes).
ABSENT, PROBATION, ACTIVE, EXCLUDED, REMOVED, MONITOR = 0, 1, 2, 3, 4, 5
STATE_NAMES = {ABSENT: "absent", PROBATION: "probation", ACTIVE: "active",
               EXCLUDED: "excluded", REMOVED: "removed", MONITOR: "monitor"}

#: Epochs kept per clock for change classification and noise tracking.
HISTORY = 512
#: Prediction spans (multiples of the sampling interval) of the noise tracking.
TRACK_SPANS = np.array([1, 2, 4, 8, 16, 32, 64, 128])
#: Epochs over which a clock must be "in family" before it is (re-)admitted.
FAMILY_EPOCHS = 24


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
    initial_state: np.ndarray | None = None
    initial_cov: np.ndarray | None = None


@dataclass
class Event:
    """A detected anomaly (one /events row)."""

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

    start_epoch: int
    start_mjd: float
    start_t: float
    onset_offset_s: float
    prior_cov: np.ndarray
    times: list = field(default_factory=list)
    residuals: list = field(default_factory=list)
    variances: list = field(default_factory=list)


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
        self.filter = EnsembleFilter(n)
        self.noise = [s.noise for s in self.setups]
        for i, s in enumerate(self.setups):
            self._set_filter_noise(i, s.noise)
        self.monitor = np.array([s.monitor for s in self.setups], dtype=bool)
        self.status = np.where(self.monitor, MONITOR, ABSENT).astype(np.int8)
        self.status_since = np.zeros(n)
        self.last_seen = np.full(n, -np.inf)
        self.epoch = -1
        self.t = math.nan
        self.mjd = math.nan
        # BTSE memory
        self.prev_offset = np.full(n, np.nan)
        self.prev_clean = np.zeros(n, dtype=bool)
        self.prev_freq = np.zeros(n)        # clock - scale frequency estimate [1]
        self.prev_drift = np.zeros(n)       # clock - scale drift estimate [1/s]
        self.frame_frequency = 0.0          # phi = y_frame - y_scale [1]
        self.frame_drift = 0.0              # psi = d_frame - d_scale [1/s]
        self.scale_minus_frame = 0.0        # g = TA - frame phase [s] (fallback read-out)
        self.weights = np.zeros(n)
        self.frame_weights = np.zeros(n)
        self.var_pred = np.full(n, np.nan)  # model prediction-error variance at tau_w [s^2]
        self.exclusion_days = np.zeros(n)   # minimum exclusion of each excluded clock [d]
        self.last_update_t = np.full(n, np.nan)
        self.episodes: dict[int, _Episode] = {}
        self.cusum = CusumBank(n, tuple(detection.cusum_allowances), detection.false_alarm_rate)
        self.h_event = glr_threshold(detection.false_alarm_rate)
        self.events: list[Event] = []
        # histories (ring buffers, most recent at index epoch % HISTORY)
        self.hist_t = np.full(HISTORY, np.nan)
        self.hist_offset = np.full((HISTORY, n), np.nan)
        self.hist_freq = np.full((HISTORY, n), np.nan)
        self.hist_drift = np.full((HISTORY, n), np.nan)
        self.hist_clean = np.zeros((HISTORY, n), dtype=bool)
        self.family = np.full((FAMILY_EPOCHS, n), np.nan)   # standardised BTSE residuals^2
        # noise tracking: running mean square of span residuals, shape (n, spans)
        self.track_ms = np.full((n, TRACK_SPANS.size), np.nan)
        self.next_tracking_t = math.nan

    # ------------------------------------------------------------------------- helpers
    def _set_filter_noise(self, i: int, noise: ClockNoise) -> None:
        q3 = noise.q3_per_s3 if self.setups[i].drift_state else 0.0
        self.filter.set_noise(i, noise.q1_s, noise.q2_per_s, q3, noise.r_s2)

    def _weight_interval(self) -> float:
        return self.cfg.weighting_interval_s or self.tau0_s

    def _model_pred_var(self, idx: np.ndarray, span_s: float) -> np.ndarray:
        """Model variance of a clock's BTSE prediction residual over ``span_s`` [s^2]."""
        out = np.empty(idx.size)
        for k, i in enumerate(idx):
            nz = self.noise[i]
            q3 = nz.q3_per_s3 if self.setups[i].drift_state else 0.0
            out[k] = (nz.q1_s * span_s + nz.q2_per_s * span_s ** 3 / 3.0
                      + q3 * span_s ** 5 / 20.0 + 2.0 * nz.r_s2)
        return out

    def _frame_weight_update(self) -> None:
        """Recompute the frame weights v and re-reference the filter (continuity kept)."""
        eligible = (self.status == ACTIVE) & self.filter.active
        if not eligible.any():
            eligible = self.filter.active & (self.status != MONITOR)
        if not eligible.any():
            self.frame_weights = np.zeros(self.n)
            return
        tau = self.cfg.frame_interval_s
        var = np.array([float(hadamard_variance(self.noise[i], tau)) if eligible[i] else np.inf
                        for i in range(self.n)])
        v = relative_cap_weights(var, eligible, self.cfg.cap(), 0)
        self.frame_weights = v
        shift = self.filter.project(v)
        # the new frame moved by `shift` relative to the old one: keep the scale continuous
        self.frame_frequency += shift[1]
        self.frame_drift += shift[2]
        self.scale_minus_frame -= shift[0]

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

        For clock i the residual is r_i = nu_i - E[nu_i | nu_clean] with variance
        Var[nu_i | nu_clean], from the joint innovation covariance S of all channels against
        the pivot.  It is the optimally weighted prediction error of clock i relative to the
        other clean clocks, so a fault shows in the clock that has it (for the pivot, whose
        fault appears in every channel, the signature is -1 in all channels and
        r_p = -1^T S^-1 nu / 1^T S^-1 1 over the clean channels).

        Returns (r [s], var [s^2]) arrays of shape (n,), NaN outside ``members``.
        """
        r = np.full(self.n, np.nan)
        var = np.full(self.n, np.nan)
        others = np.flatnonzero(members & (np.arange(self.n) != pivot))
        if others.size == 0:
            return r, var
        nu, s, _ = self.filter.innovations(z[others] - z[pivot], others, pivot)
        nu = nu * 1e-9                       # ns -> s
        s = s * 1e-18                        # ns^2 -> s^2
        c = clean[others]
        ic, ih = np.flatnonzero(c), np.flatnonzero(~c)
        if ic.size == 0:
            r[others], var[others] = nu, np.diag(s)
            return r, var
        scc = s[np.ix_(ic, ic)]
        chol = scipy.linalg.cho_factor(scc, lower=True, check_finite=False)
        inv = scipy.linalg.cho_solve(chol, np.eye(ic.size), check_finite=False)
        a = inv @ nu[ic]
        d = np.diag(inv)
        r[others[ic]] = a / d
        var[others[ic]] = 1.0 / d
        ones = inv.sum(axis=0)
        info = float(ones.sum())
        if clean[pivot]:
            r[pivot] = -float(ones @ nu[ic]) / info
            var[pivot] = 1.0 / info
        if ih.size:
            sch = s[np.ix_(ih, ic)]
            gain = sch @ inv                  # E[nu_h | nu_c] = gain @ nu_c
            r[others[ih]] = nu[ih] - gain @ nu[ic]
            var[others[ih]] = np.diag(s)[ih] - np.einsum("ij,ij->i", gain, sch)
        return r, var

    # --------------------------------------------------------------------------- set-up
    def _activate(self, i: int, z: np.ndarray, pivot: int, t: float) -> None:
        """Give a newly measured clock a state, linked to the pivot's phase estimate."""
        setup = self.setups[i]
        p_x = self.filter.state_si(pivot)[0] if pivot >= 0 else 0.0
        dprior = setup.drift_prior_per_s if setup.drift_state else 0.0
        cov = np.diag([setup.noise.r_s2 + self.setups[pivot].noise.r_s2 if pivot >= 0 else 0.0,
                       setup.frequency_prior ** 2, dprior ** 2])
        self.filter.activate(i, np.array([z[i] - z[pivot] + p_x, 0.0, 0.0]), cov,
                             phase_link=pivot if pivot >= 0 else None)
        self.status[i] = PROBATION
        self.status_since[i] = t
        self.track_ms[i] = np.nan
        self.cusum.reset(i, self.epoch)
        self.prev_clean[i] = False
        self.last_update_t[i] = t

    def _start(self, t: float, z: np.ndarray, ref: int) -> None:
        """First epoch: states from the start-up estimation (relative to the reference)."""
        measured = np.isfinite(z) & ~self.monitor
        for i in np.flatnonzero(measured):
            s = self.setups[i]
            if s.initial_state is not None:
                state = np.array(s.initial_state, dtype=float)
                cov = np.array(s.initial_cov, dtype=float)
            else:
                dprior = s.drift_prior_per_s if s.drift_state else 0.0
                state = np.array([z[i], 0.0, 0.0])
                cov = np.diag([s.noise.r_s2 + 1e-24, s.frequency_prior ** 2, dprior ** 2])
            if not s.drift_state:
                state[2] = 0.0
                cov[2, :] = cov[:, 2] = 0.0
            self.filter.activate(i, state, cov)
            self.status[i] = ACTIVE
            self.last_update_t[i] = t
        self._refresh_weights()
        self._frame_weight_update()

    def _refresh_weights(self) -> None:
        """Phase weights from each clock's model prediction-error variance at the weighting
        interval: Q11(tau_w) + tau_w^2 P_yy + 2 r (the frequency estimate's uncertainty and the
        white PM of the two phase readings included).

        The variance comes from the clock's noise levels, which the tracking re-estimates during
        the run; residuals against the scale alone cannot tell two dominant clocks apart (for
        two equal clocks at weight 1/2 both residuals are half their difference).
        """
        eligible = (self.status == ACTIVE) & self.filter.active
        idx = np.flatnonzero(eligible)
        var = np.full(self.n, np.nan)
        if idx.size:
            span = self._weight_interval()
            p_yy = np.array([self.filter.cov_si(i)[1, 1] for i in idx])
            var[idx] = self._model_pred_var(idx, span) + span * span * p_yy
        self.var_pred = var
        self.weights = relative_cap_weights(var, eligible, self.cfg.cap(), 0)

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
            offset [s], frequency [1], drift [1/s], weight, state, zscore (all (n,)), and
            scale_sigma [s], the estimated standard deviation of the scale's step.
        """
        z = np.asarray(z, dtype=float)
        first = self.epoch < 0
        self.epoch += 1
        k = self.epoch
        dt = 0.0 if first else t_s - self.t
        if not first and not dt > 0:
            raise ValueError(f"epochs must increase: {t_s} after {self.t}")
        self.t, self.mjd = t_s, mjd
        if first:
            self._start(t_s, z, ref)
            self.next_tracking_t = t_s + self.cfg.tracking_interval_days * SECONDS_PER_DAY
        else:
            self.filter.predict(dt)
        measured = np.isfinite(z)
        self.last_seen[measured] = t_s

        # leaving: silent too long
        gone = (self.filter.active & ~measured
                & (t_s - self.last_seen > self.cfg.max_gap_days * SECONDS_PER_DAY))
        for i in np.flatnonzero(gone):
            self._remove(i, t_s)
        members = measured & self.filter.active & ~self.monitor
        held = np.zeros(self.n, dtype=bool)
        held[list(self.episodes)] = True
        held &= members

        # joining
        new = measured & ~self.filter.active & ~self.monitor
        if new.any() and not first:
            pivot = self._pivot(members & ~held, ref)
            if pivot >= 0:
                for i in np.flatnonzero(new):
                    self._activate(i, z, pivot, t_s)
                    members[i] = True
                self._frame_weight_update()

        clean = members & ~held
        pivot = self._pivot(clean, ref)
        zscore = np.full(self.n, np.nan)
        resolved_events = np.zeros(self.n, dtype=bool)
        updated = np.zeros(self.n, dtype=bool)
        if pivot >= 0 and members.sum() >= 2 and not first:
            e, var = self._residuals(z, members, pivot, clean)
            # screening: hold the worst clock while any exceeds the threshold
            max_hold = max(1, (int(members.sum()) - 1) // 2)
            n_new = 0
            while True:
                zs = np.abs(e) / np.sqrt(var)
                zs[~clean] = np.nan
                if not np.isfinite(zs).any():
                    break
                i = int(np.nanargmax(zs))
                if zs[i] <= self.det.hold_sigma or n_new >= max_hold:
                    break
                self._open_episode(i, k, t_s)
                clean[i] = False
                n_new += 1
                if i == pivot:
                    pivot = self._pivot(clean, ref)
                    if pivot < 0:
                        break
                e, var = self._residuals(z, members, pivot, clean)
            if pivot >= 0:
                zscore = e / np.sqrt(var)
                # continue the hold episodes and decide
                for i in list(self.episodes):
                    if not members[i] or not np.isfinite(e[i]):
                        self._age_episode(i, t_s)
                        continue
                    outcome = self._advance_episode(i, t_s, e[i], var[i])
                    if outcome is not None:
                        clean[i] = True
                        resolved_events[i] = outcome != "nothing"
                if clean[ref]:
                    pivot = ref
                upd = np.flatnonzero(clean & (np.arange(self.n) != pivot))
                if upd.size:
                    self.filter.update(z[upd] - z[pivot], upd, pivot)
                    updated[upd] = True
                    updated[pivot] = True
                    self.last_update_t[updated] = t_s
                self.filter.project(self.frame_weights)
                # slow changes on the clocks that were screened normally
                valid = updated & ~resolved_events & np.isfinite(zscore)
                for i, sign, change_epoch, stat in self.cusum.step(k, zscore, valid):
                    self._slow_change(i, sign, change_epoch, stat, t_s, mjd)
                    clean[i] = False
                    resolved_events[i] = True

        # ---------------------------------------------------------------- the time scale
        est = self.filter.states_si()
        contrib = (members & clean & ~resolved_events & self.prev_clean
                   & (self.status == ACTIVE) & (self.weights > 0))
        pred = np.full(self.n, np.nan)
        ok_prev = self.prev_clean & measured
        pred[ok_prev] = (self.prev_offset[ok_prev] + self.prev_freq[ok_prev] * dt
                         + 0.5 * self.prev_drift[ok_prev] * dt * dt)
        used = np.zeros(self.n)
        if contrib.any() and not first:
            used[contrib] = self.weights[contrib] / self.weights[contrib].sum()
            c = float(used[contrib] @ (z[contrib] - pred[contrib]))
        elif first:
            w0 = self.weights * measured
            if w0.sum() <= 0:
                w0 = (measured & self.filter.active).astype(float)
            used = w0 / w0.sum()
            c = float(used[measured] @ z[measured])
        else:
            # no clock can carry the scale this epoch: read it from the filter's frame
            self.scale_minus_frame -= self.frame_frequency * dt + 0.5 * self.frame_drift * dt * dt
            p = pivot if pivot >= 0 else int(np.flatnonzero(members)[0]) if members.any() else -1
            if p >= 0:
                c = z[p] - est[p, 0] + self.scale_minus_frame
            else:
                c = math.nan
            used = self.frame_weights.copy() if self.frame_weights.sum() > 0 else used
            if used.sum() <= 0 and p >= 0:
                used[p] = 1.0
        offset = np.where(measured, z - c, np.nan)
        if np.isfinite(c) and pivot >= 0:
            self.scale_minus_frame = est[pivot, 0] - offset[pivot]
        freq = np.where(self.filter.active, est[:, 1] + self.frame_frequency, np.nan)
        drift = np.where(self.filter.active, est[:, 2] + self.frame_drift, np.nan)

        # -------------------------------------------------------- weights and standings
        residual = offset - pred
        clean_now = members & clean & ~resolved_events
        self._update_statistics(offset, residual, clean_now, used, dt, first)
        self._record_history(k, t_s, offset, freq, drift, clean_now)
        self._advance_standings(t_s)
        if self.cfg.tracking and t_s >= self.next_tracking_t:
            self._track_noise()
            self.next_tracking_t = t_s + self.cfg.tracking_interval_days * SECONDS_PER_DAY
        self._refresh_weights()
        sigma = math.sqrt(float(np.nansum(used ** 2 * np.where(np.isfinite(self.var_pred),
                                                                 self.var_pred, 0.0))))
        self.prev_offset = offset
        self.prev_clean = clean_now.copy()
        self.prev_freq = np.where(np.isfinite(freq), freq, 0.0)
        self.prev_drift = np.where(np.isfinite(drift), drift, 0.0)
        return {"offset": offset, "frequency": freq, "drift": drift, "weight": used,
                "state": self.status.copy(), "zscore": zscore, "scale_sigma": sigma}

    # ---------------------------------------------------------------- hold episodes
    def _open_episode(self, i: int, epoch: int, t_s: float) -> None:
        last = self.last_update_t[i]
        onset = 0.0 if not np.isfinite(last) else t_s - last
        prior = self.filter.cov_si(i)
        self.episodes[i] = _Episode(epoch, self.mjd, t_s, onset, prior)

    def _age_episode(self, i: int, t_s: float) -> None:
        ep = self.episodes[i]
        if t_s - ep.start_t > self.det.max_hold_epochs * 4 * self.tau0_s:
            del self.episodes[i]

    def _advance_episode(self, i: int, t_s: float, e: float, var: float):
        """Add a residual to clock i's hold episode; decide when the evidence suffices.

        Returns None (continue), "nothing", or the event kind (after correcting the state).
        """
        ep = self.episodes[i]
        ep.times.append(t_s - ep.start_t)
        ep.residuals.append(e)
        ep.variances.append(var)
        n = len(ep.residuals)
        if n < 2:
            return None
        nz = self.noise[i]
        q = np.array([nz.q1_s, nz.q2_per_s, nz.q3_per_s3 if self.setups[i].drift_state else 0.0])
        dts = np.array(ep.times)
        own = np.array([float(frozen_prediction_covariance(np.array([d]), ep.prior_cov, q,
                                                           np.zeros(1))[0, 0]) for d in dts])
        diag = np.maximum(np.array(ep.variances) - own, 0.25 * np.array(ep.variances))
        cov = frozen_prediction_covariance(dts, ep.prior_cov, q, diag)
        stats = glr_classify(np.array(ep.residuals), dts, cov, ep.onset_offset_s)
        ranked = sorted(stats.items(), key=lambda kv: -kv[1][0])
        (best, (l1, a1, s1)), (_, (l2, _, _)) = ranked[0], ranked[1]
        back = abs(e) / math.sqrt(var) < self.det.hold_sigma
        decided = None
        if l1 >= self.h_event and (l1 - l2 >= self.det.decision_margin
                                   or n >= self.det.max_hold_epochs):
            decided = best
        elif n >= self.det.max_hold_epochs or (back and l1 < self.h_event and n >= 2
                                                and stats["phase_step"][0] < self.h_event):
            decided = "nothing"
        if decided is None:
            return None
        del self.episodes[i]
        if decided == "nothing":
            return decided
        name = self.clocks[i]
        if decided == "outlier":
            self.events.append(Event(ep.start_mjd, name, "outlier", a1, l1, self.mjd, s1))
        elif decided == "phase_step":
            self.filter.correct(i, np.array([a1, 0.0, 0.0]), np.array([s1 * s1, 0.0, 0.0]))
            self.events.append(Event(ep.start_mjd, name, "phase_step", a1, l1, self.mjd, s1))
            self._exclude(i, t_s)
        else:
            span = dts[-1] + ep.onset_offset_s
            self.filter.correct(i, np.array([a1 * span, a1, 0.0]),
                                np.array([(s1 * span) ** 2, s1 * s1, 0.0]))
            self.events.append(Event(ep.start_mjd, name, "frequency_step", a1, l1, self.mjd, s1))
            self._exclude(i, t_s, relearn=True)
        self.cusum.reset(i, self.epoch)
        return decided

    # ----------------------------------------------------------------- slow changes
    def _slow_change(self, i: int, sign: int, change_epoch: int, stat: float, t_s: float,
                     mjd: float) -> None:
        """A CUSUM alarm: size the frequency (or drift) change from the clock's offsets."""
        k = self.epoch
        back = min(k - change_epoch, HISTORY // 2 - 1)
        onset = k - back
        idx = np.arange(max(onset - back, k - HISTORY + 1, 0), k) % HISTORY
        t = self.hist_t[idx]
        x = self.hist_offset[idx, i]
        ok = np.isfinite(x)
        kind, size, unc = "frequency_step", math.nan, math.nan
        if ok.sum() >= 4:
            t0 = self.hist_t[onset % HISTORY]
            tt, xx = t[ok] - t0, x[ok]
            after = np.maximum(tt, 0.0)
            a_step = np.column_stack([np.ones_like(tt), tt, after])
            coef, res, *_ = np.linalg.lstsq(a_step, xx, rcond=None)
            size = float(coef[2])
            dof = max(ok.sum() - 3, 1)
            sig2 = float(res[0]) / dof if res.size else 0.0
            cov = np.linalg.pinv(a_step.T @ a_step) * sig2
            unc = float(math.sqrt(max(cov[2, 2], 0.0)))
            a_drift = np.column_stack([np.ones_like(tt), tt, 0.5 * after ** 2])
            coef_d, res_d, *_ = np.linalg.lstsq(a_drift, xx, rcond=None)
            if res.size and res_d.size and res_d[0] < 0.5 * res[0] and self.setups[i].drift_state:
                kind = "drift_change"
                size = float(coef_d[2])
                cov = np.linalg.pinv(a_drift.T @ a_drift) * float(res_d[0]) / dof
                unc = float(math.sqrt(max(cov[2, 2], 0.0)))
        if not np.isfinite(size):
            size = 0.0
        # bring the filter's estimate to the new frequency (or drift)
        j = onset % HISTORY
        if kind == "frequency_step":
            then = self.hist_freq[j, i]
            now = self.filter.state_si(i)[1] + self.frame_frequency
            delta = (then + size - now) if np.isfinite(then) else 0.0
            self.filter.correct(i, np.array([0.0, delta, 0.0]),
                                np.array([0.0, unc * unc + (0.25 * size) ** 2, 0.0]))
            magnitude = size
        else:
            then = self.hist_drift[j, i]
            now = self.filter.state_si(i)[2] + self.frame_drift
            delta = (then + size - now) if np.isfinite(then) else 0.0
            self.filter.correct(i, np.array([0.0, 0.0, delta]),
                                np.array([0.0, 0.0, unc * unc + (0.25 * size) ** 2]))
            magnitude = size * SECONDS_PER_DAY
            unc *= SECONDS_PER_DAY
        onset_mjd = self.mjd - (t_s - self.hist_t[j]) / SECONDS_PER_DAY
        self.events.append(Event(onset_mjd, self.clocks[i], kind, magnitude, stat, mjd, unc))
        self.cusum.reset(i, self.epoch)
        self._exclude(i, t_s, relearn=True)

    # -------------------------------------------------------------------- standings
    def _exclude(self, i: int, t_s: float, relearn: bool = False) -> None:
        if self.status[i] in (ACTIVE, EXCLUDED, PROBATION):
            if self.status[i] != PROBATION:
                self.status[i] = EXCLUDED
            self.status_since[i] = t_s
            self.exclusion_days[i] = self.cfg.relearn_days if relearn else self.cfg.settle_days
            if relearn:
                self.track_ms[i] = np.nan
                self.family[:, i] = np.nan
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
        exclusion = self.exclusion_days
        n_fam = np.sum(np.isfinite(self.family), axis=0)
        mean_fam = np.nanmean(np.where(np.isfinite(self.family), self.family, np.nan), axis=0) \
            if n_fam.any() else np.full(self.n, np.nan)
        limit = scipy.stats.chi2.ppf(0.99, np.maximum(n_fam, 1)) / np.maximum(n_fam, 1)
        in_family = (n_fam >= FAMILY_EPOCHS // 2) & (mean_fam <= limit)
        admit = np.zeros(self.n, dtype=bool)
        admit |= (self.status == PROBATION) & (days >= self.cfg.probation_days) & in_family
        admit |= (self.status == EXCLUDED) & (days >= exclusion) & in_family
        if admit.any():
            for i in np.flatnonzero(admit):
                self.status[i] = ACTIVE
                self.status_since[i] = t_s
            self._frame_weight_update()

    # ---------------------------------------------------------- running statistics
    def _update_statistics(self, offset: np.ndarray, residual: np.ndarray,
                           clean_now: np.ndarray, used: np.ndarray, dt: float,
                           first: bool) -> None:
        """Running prediction-error variances (weights) and the in-family record.

        The in-family record holds residual^2 / expected variance, where a clock's residual
        against the scale has the variance sigma_i^2 (1 - 2 u_i) + sum_j u_j^2 sigma_j^2 for the
        weights u of the epoch (the scale's own noise included).
        """
        row = self.epoch % FAMILY_EPOCHS
        self.family[row, :] = np.nan
        if first:
            return
        ok = clean_now & np.isfinite(residual)
        idx = np.flatnonzero(ok)
        if idx.size == 0:
            return
        allm = np.flatnonzero(self.filter.active & ~self.monitor)
        model_all = np.zeros(self.n)
        model_all[allm] = self._model_pred_var(allm, dt)
        scale_var = float(used[allm] ** 2 @ model_all[allm])
        expected = model_all[idx] * (1.0 - 2.0 * used[idx]) + scale_var
        self.family[row, idx] = residual[idx] ** 2 / np.maximum(expected, 1e-3 * model_all[idx])

    def _record_history(self, k: int, t_s: float, offset, freq, drift, clean_now) -> None:
        j = k % HISTORY
        self.hist_t[j] = t_s
        self.hist_offset[j] = offset
        self.hist_freq[j] = freq
        self.hist_drift[j] = drift
        self.hist_clean[j] = clean_now
        if k == 0:
            return
        # span residuals for noise tracking
        lam = min(1.0, self.tau0_s / (self.cfg.tracking_memory_days * SECONDS_PER_DAY))
        for s_idx, m in enumerate(TRACK_SPANS):
            if m > k or m >= HISTORY:
                break
            jp = (k - m) % HISTORY
            span = t_s - self.hist_t[jp]
            if not abs(span - m * self.tau0_s) < 0.5 * self.tau0_s:
                continue
            good = clean_now & self.hist_clean[jp]
            if not good.any():
                continue
            pred = (self.hist_offset[jp] + self.hist_freq[jp] * span
                    + 0.5 * self.hist_drift[jp] * span * span)
            r2 = (offset - pred) ** 2
            cur = self.track_ms[:, s_idx]
            upd = good & np.isfinite(r2)
            new = np.where(np.isfinite(cur), (1.0 - lam) * cur + lam * r2, r2)
            self.track_ms[:, s_idx] = np.where(upd, new, cur)

    def _track_noise(self) -> None:
        """Re-estimate q1, q2, q3 of each clock from its span residuals (rate-limited).

        The running mean square m_i(s) of a clock's prediction residuals over span s against the
        scale is modelled as sigma_i^2(s) (1 - 2 w_i) + sigma_E^2(s), with
        sigma_i^2(s) = 2 r + q1 s + q2 s^3 / 3 + q3 s^5 / 20 + s^2 P_yy and
        sigma_E^2(s) = sum_j w_j^2 sigma_j^2(s) the scale's own part; the q's follow by
        non-negative weighted least squares.  A clock that carries a quarter of the scale or
        more is not re-estimated this way (the scale would mostly be itself).
        """
        spans = TRACK_SPANS * self.tau0_s
        limit = 1.0 + self.cfg.tracking_max_change
        act = np.flatnonzero(self.filter.active & ~self.monitor)
        if act.size == 0:
            return
        p_yy = np.zeros(self.n)
        p_yy[act] = [self.filter.cov_si(i)[1, 1] for i in act]
        model = np.zeros((self.n, spans.size))
        for i in act:
            nz = self.noise[i]
            q3 = nz.q3_per_s3 if self.setups[i].drift_state else 0.0
            model[i] = (2 * nz.r_s2 + nz.q1_s * spans + nz.q2_per_s * spans ** 3 / 3.0
                        + q3 * spans ** 5 / 20.0 + spans ** 2 * p_yy[i])
        w = self.weights
        scale_part = (w[act] ** 2) @ model[act]
        changed = False
        for i in act:
            if self.status[i] not in (ACTIVE, PROBATION, EXCLUDED):
                continue
            if max(w[i], self.frame_weights[i]) >= 0.25:
                continue
            ms = self.track_ms[i]
            ok = np.isfinite(ms)
            if ok.sum() < 4:
                continue
            own = (ms[ok] - scale_part[ok] + (w[i] ** 2) * model[i, ok]) / (1.0 - 2.0 * w[i])
            target = own - spans[ok] ** 2 * p_yy[i] - 2 * self.noise[i].r_s2
            s_ok = spans[ok]
            cols = [s_ok, s_ok ** 3 / 3.0]
            if self.setups[i].drift_state:
                cols.append(s_ok ** 5 / 20.0)
            a = np.column_stack(cols)
            weight = 1.0 / np.maximum(np.abs(ms[ok]), 1e-40)
            aw = a * weight[:, None]
            col_scale = np.abs(aw).max(axis=0)
            col_scale[col_scale == 0] = 1.0
            sol, _ = scipy.optimize.nnls(aw / col_scale, target * weight)
            sol = sol / col_scale
            nz = self.noise[i]

            def limited(old, new):
                if old <= 0:
                    return float(new)
                return float(np.clip(new, old / limit, old * limit))

            q3_new = limited(nz.q3_per_s3, sol[2]) if self.setups[i].drift_state else nz.q3_per_s3
            new = ClockNoise(limited(nz.q1_s, sol[0]), limited(nz.q2_per_s, sol[1]), q3_new,
                             nz.r_s2)
            if new != nz:
                self.noise[i] = new
                self._set_filter_noise(i, new)
                changed = True
        if changed:
            self._frame_weight_update()
