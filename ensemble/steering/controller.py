"""The steering controller: one call per epoch turns the engine's estimate into a command record.

The engine calls :meth:`SteeringController.step` once per epoch with the estimated state of the
steered clock relative to the ensemble scale (x [s], y [1], optionally d [1/s]) and its
covariance.  In ``virtual`` mode that clock is the unsteered master and the controller adds the
synthesizer's accumulated steer itself (output = master + integral of the total correction); in
``measured`` mode it is the synthesizer output measured as its own channel, whose estimate
already contains the applied steers.

At each scheduled command epoch the policy proposes u = -(g_x x + g_y y + g_d d) on the phase
error relative to the target; the dead band may withhold it and the limits may clip it.  The
controller keeps no integrator: every proposal is recomputed from the current estimate, and only
applied (clipped) changes enter the total correction and the synthesizer phase (anti-windup).
Its state is a handful of plain numbers (:meth:`~SteeringController.state_dict`), so an
incremental run continues exactly where the last one stopped.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..model.clockmodel import ClockNoise
from ..settings import build_section, section_to_dict
from .external import ExternalFlywheel, ExternalSeries, read_external
from .gains import policy_gains
from .settings import MJD_TOLERANCE_D, SteeringSettings

#: Clip codes of the ``clipped`` column.
CLIP_NAMES = {0: "none", 1: "step", 2: "total", 3: "step+total"}
#: Reasons, in the order of their codes in the archive's ``reason`` column.
REASONS = ("between-commands", "command", "dead-band", "settling", "hold-no-estimate",
           "hold-no-reference", "hold-stale-reference")
#: Version of the layout of :meth:`SteeringController.state_dict`.
STATE_FORMAT = 1
#: Allowed difference between the interval passed and the MJD label difference
#: (a leap second makes them differ by 1 s). [s]
_INTERVAL_SLACK_S = 1.5


@dataclass(frozen=True, slots=True)
class SteeringRecord:
    """What the controller decided at one epoch (SI units).

    Attributes
    ----------
    mjd : float
        Epoch, MJD UTC. [d]
    command_epoch : bool
        True at a scheduled command (decision) epoch.
    frequency_correction : float
        Change of the commanded fractional frequency applied now (0 when none); positive makes
        the output run faster. [1]
    proposed_correction : float
        The policy's change before dead band and limits; NaN when not computed. [1]
    total_correction : float
        Sum of all applied changes after this one (the synthesizer's offset). [1]
    phase_error_s : float
        Steered output - target now, before this change; NaN when unknown. [s]
    frequency_error : float
        Fractional frequency of the output relative to the target, before this change. [1]
    drift_error_per_s : float
        Drift of the output relative to the target. [1/s]
    predicted_phase_error_s : float
        Phase error expected at the next command epoch after this change. [s]
    predicted_sd_s : float
        Standard uncertainty of that prediction. [s]
    next_command_mjd : float
        The next scheduled command epoch. [d]
    clipped : int
        0 none, 1 step limit, 2 total limit, 3 both (:data:`CLIP_NAMES`).
    reason : str
        One of :data:`REASONS`.
    """

    mjd: float
    command_epoch: bool
    frequency_correction: float
    proposed_correction: float
    total_correction: float
    phase_error_s: float
    frequency_error: float
    drift_error_per_s: float
    predicted_phase_error_s: float
    predicted_sd_s: float
    next_command_mjd: float
    clipped: int
    reason: str


def apply_limits(proposed: float, total: float, max_step: float,
                 max_total: float) -> tuple[float, float, int]:
    """Clip a proposed change to the step and total limits.

    Parameters
    ----------
    proposed : float
        Change the policy asks for. [1]
    total : float
        Total correction before the change. [1]
    max_step : float
        Largest |change| of one command. [1]
    max_total : float
        Largest |total correction|. [1]

    Returns
    -------
    applied : float
        The change to apply: |applied| <= max_step, and |total + applied| <= max_total.  When
        |total| already exceeds max_total (limits lowered between runs), only changes that
        reduce |total| pass; the limits restrict, they never command a change themselves. [1]
    new_total : float
        total + applied (set exactly to +-max_total when that limit binds). [1]
    clip : int
        Bit 1: the step limit bound; bit 2: the total limit bound.
    """
    clip = 0
    u = proposed
    if u > max_step:
        u, clip = max_step, 1
    elif u < -max_step:
        u, clip = -max_step, 1
    hi = max(max_total - total, 0.0)      # largest change keeping total + u <= max_total
    lo = min(-max_total - total, 0.0)     # smallest change keeping total + u >= -max_total
    if u > hi:
        clip |= 2
        u = hi
        return u, (max_total if total <= max_total else total), clip
    if u < lo:
        clip |= 2
        u = lo
        return u, (-max_total if total >= -max_total else total), clip
    return u, total + u, clip


def in_dead_band(phase_error_s: float, proposed: float, dead_band_phase_s: float,
                 dead_band_step: float) -> bool:
    """True when the command is withheld: |phase error| < dead_band_phase_s and
    |proposed| < dead_band_step (strict; either threshold at 0 switches the dead band off).

    Parameters
    ----------
    phase_error_s : float
        [s]
    proposed : float
        [1]
    dead_band_phase_s : float
        [s]
    dead_band_step : float
        [1]
    """
    return abs(phase_error_s) < dead_band_phase_s and abs(proposed) < dead_band_step


class SteeringController:
    """Steering policy with limits, schedule and the virtual synthesizer (one call per epoch).

    Parameters
    ----------
    settings : SteeringSettings, optional
        Defaults when omitted (the contract's default steering).
    noise : ClockNoise, optional
        Noise of the steered clock (the master in virtual mode), used for the uncertainty of the
        predicted phase error; :meth:`step` may pass it per epoch instead.
    external : ExternalSeries, optional
        External reference points; read from ``settings.external_file`` when the target is
        'external' and none is given.

    Examples
    --------
    >>> from ensemble.steering import SteeringController, SteeringSettings
    >>> ctl = SteeringController(SteeringSettings(anchor="first-epoch", settle_d=0.0))
    >>> rec = ctl.step(61000.0, 0.0, (2e-9, 0.0))          # master 2 ns ahead of the scale
    >>> print(rec.reason, f"{rec.frequency_correction:.3e}")
    command -2.096e-16
    """

    def __init__(self, settings: SteeringSettings | None = None, *,
                 noise: ClockNoise | None = None, external: ExternalSeries | None = None):
        self.settings = settings = settings if settings is not None else SteeringSettings()
        self.noise = noise
        self.g_x, self.g_y, self.g_d = policy_gains(
            settings.policy, settings.interval_s, time_constant_s=settings.time_constant_d * 86400.0,
            effort_weight_d2=settings.effort_weight_d2,
            frequency_weight_d2=settings.frequency_weight_d2, drift=settings.drift_feedforward)
        self._virtual = settings.output == "virtual"
        self._flywheel = None
        if settings.target == "external":
            if external is None:
                external = read_external(settings.external_file)
            self._flywheel = ExternalFlywheel(
                external, q1_s=settings.external_q1_s, q2_per_s=settings.external_q2_per_s,
                default_uncertainty_s=settings.external_uncertainty_s,
                rate_sd=settings.external_rate_sd)
        self._weight = settings.external_weight
        # Dynamic state (all plain floats; see state_dict).
        self.total_correction = float(settings.initial_total_correction)
        self.steer_phase_s = 0.0
        self._last_mjd: float | None = None
        # Command epochs are origin + index * interval (no accumulated rounding).
        self._origin_mjd: float | None = None
        self._index = 0
        self._next_mjd: float | None = None
        self._start_mjd: float | None = None
        self._last_command_mjd: float | None = None

    # -- schedule ---------------------------------------------------------------------------
    def _anchor_schedule(self, mjd: float) -> None:
        """Set the boundaries origin + n * interval and the first one at or after ``mjd``."""
        s = self.settings
        if s.anchor == "first-epoch":
            self._origin_mjd, self._index = mjd, 0
        else:
            origin = math.floor(mjd) + s.time_of_day_h / 24.0
            if origin > mjd + MJD_TOLERANCE_D:
                origin -= 1.0
            n = math.ceil((mjd - origin - MJD_TOLERANCE_D) / s.interval_d)
            self._origin_mjd, self._index = origin, max(n, 0)
        self._next_mjd = self._origin_mjd + self._index * s.interval_d

    # -- the per-epoch call -----------------------------------------------------------------
    def step(self, mjd: float, dt_s: float, state, covariance=None,
             noise: ClockNoise | None = None) -> SteeringRecord:
        """Advance to epoch ``mjd`` and decide the command.

        Parameters
        ----------
        mjd : float
            Epoch, MJD UTC; strictly increasing from call to call. [d]
        dt_s : float
            Interval since the previous call on the continuous time grid (leap seconds
            included), from the nominal sampling grid; ignored on the first call. [s]
        state : sequence of 2 or 3 floats
            Estimate of the steered clock relative to the ensemble scale: offset x (clock -
            scale) [s], fractional frequency y [1] and, optionally, drift d [1/s].  Virtual
            mode: the unsteered master; measured mode: the measured output channel.  NaN
            entries mean "no estimate" (the command is held).
        covariance : array-like, shape (n, n), optional
            Covariance of ``state`` in (s, 1, 1/s) units; zeros when omitted.
        noise : ClockNoise, optional
            Noise of that clock (overrides the constructor's) for the prediction uncertainty.

        Returns
        -------
        SteeringRecord
        """
        s = self.settings
        mjd = float(mjd)
        if self._last_mjd is None:
            if self._start_mjd is None:
                self._start_mjd = mjd
            if self._next_mjd is None:
                self._anchor_schedule(mjd)
        else:
            if not mjd > self._last_mjd:
                raise ValueError(f"steering epochs must increase: {mjd!r} after {self._last_mjd!r}")
            gap_s = (mjd - self._last_mjd) * 86400.0
            if not abs(dt_s - gap_s) <= _INTERVAL_SLACK_S:
                raise ValueError(f"dt_s={dt_s!r} does not match the MJD difference "
                                 f"{gap_s:.3f} s between {self._last_mjd!r} and {mjd!r}")
            # The synthesizer ran at the total correction in force since the last epoch.
            self.steer_phase_s += self.total_correction * dt_s
        self._last_mjd = mjd

        x = float(state[0])
        y = float(state[1])
        d = float(state[2]) if len(state) > 2 else 0.0
        if self._virtual:
            x += self.steer_phase_s
            y += self.total_correction
        p00 = p01 = p11 = p02 = p12 = p22 = 0.0
        if covariance is not None:
            c = np.asarray(covariance, dtype=float).tolist()
            p00, p01, p11 = c[0][0], c[0][1], c[1][1]
            if len(c) > 2:
                p02, p12, p22 = c[0][2], c[1][2], c[2][2]

        hold = None
        ex = ey = 0.0
        fly = self._flywheel
        w = self._weight
        if fly is not None:
            est = fly.estimate(mjd)
            if est is None:
                hold, x, y = "hold-no-reference", math.nan, math.nan
            else:
                ex, ey, _, _, _, age_d = est
                if age_d > s.external_max_age_d:
                    hold = "hold-stale-reference"
        x_err = x - w * ex
        y_err = y - w * ey
        if not (math.isfinite(x_err) and math.isfinite(y_err) and math.isfinite(d)):
            hold = hold or "hold-no-estimate"

        is_command = mjd >= self._next_mjd - MJD_TOLERANCE_D
        if is_command:
            self._index += math.floor((mjd - self._next_mjd + MJD_TOLERANCE_D) / s.interval_d) + 1
            self._next_mjd = self._origin_mjd + self._index * s.interval_d

        proposed = math.nan
        u = 0.0
        clip = 0
        if not is_command:
            reason = "between-commands"
        else:
            if hold is None or hold == "hold-stale-reference":
                proposed = -(self.g_x * x_err + self.g_y * y_err + self.g_d * d)
            if hold is not None:
                reason = hold
            elif mjd < self._start_mjd + s.settle_d - MJD_TOLERANCE_D:
                reason = "settling"
            elif in_dead_band(x_err, proposed, s.dead_band_phase_s, s.dead_band_step):
                reason = "dead-band"
            else:
                reason = "command"
                u, self.total_correction, clip = apply_limits(
                    proposed, self.total_correction, s.max_step, s.max_total)
                self._last_command_mjd = mjd

        # Phase error expected at the next command epoch after this change (cf. assess/holdover.py).
        h = (self._next_mjd - mjd) * 86400.0
        predicted = x_err + h * (y_err + u) + 0.5 * h * h * d
        var = (p00 + 2.0 * h * p01 + h * h * (p11 + p02) + h ** 3 * p12 + 0.25 * h ** 4 * p22)
        noise = noise if noise is not None else self.noise
        if noise is not None:
            var += noise.q1_s * h + noise.q2_per_s * h ** 3 / 3.0 + noise.q3_per_s3 * h ** 5 / 20.0
        if fly is not None and fly.mjd is not None:
            e_next, e_var = fly.predict_offset(self._next_mjd)
            predicted = x + h * (y + u) + 0.5 * h * h * d - w * e_next
            var += w * w * e_var
        return SteeringRecord(
            mjd, is_command, u, proposed, self.total_correction, x_err, y_err, d, predicted,
            math.sqrt(var) if var > 0 else 0.0, self._next_mjd, clip, reason)

    def run(self, mjd, dt_s, states, covariances=None) -> list[SteeringRecord]:
        """Call :meth:`step` for each row (a convenience for tests and projections).

        Parameters
        ----------
        mjd : array-like, shape (n,)
            [d]
        dt_s : array-like, shape (n,)
            Interval before each epoch (the first is ignored). [s]
        states : array-like, shape (n, 2 or 3)
            (x [s], y [1], d [1/s]) per epoch.
        covariances : array-like, shape (n, k, k), optional
        """
        out = []
        for i in range(len(mjd)):
            cov = None if covariances is None else covariances[i]
            out.append(self.step(mjd[i], dt_s[i], states[i], cov))
        return out

    # -- state ------------------------------------------------------------------------------
    def state_dict(self) -> dict:
        """Everything an incremental run needs, as plain JSON-serialisable values.

        Keys: ``format``, ``settings`` (the [steering] table), ``total_correction`` [1],
        ``steer_phase_s`` [s] (accumulated phase of the virtual synthesizer), ``last_mjd``,
        ``next_command_mjd``, ``schedule_origin_mjd`` [d] and ``schedule_index`` (command
        epochs are origin + index * interval), ``start_mjd``, ``last_command_mjd`` [d] and
        ``external`` (the flywheel filter state or None).
        """
        return {
            "format": STATE_FORMAT,
            "settings": section_to_dict(self.settings),
            "total_correction": self.total_correction,
            "steer_phase_s": self.steer_phase_s,
            "last_mjd": self._last_mjd,
            "next_command_mjd": self._next_mjd,
            "schedule_origin_mjd": self._origin_mjd,
            "schedule_index": self._index,
            "start_mjd": self._start_mjd,
            "last_command_mjd": self._last_command_mjd,
            "external": None if self._flywheel is None else self._flywheel.state_dict(),
        }

    @classmethod
    def from_state(cls, state: dict, *, settings: SteeringSettings | None = None,
                   external: ExternalSeries | None = None,
                   noise: ClockNoise | None = None) -> "SteeringController":
        """Rebuild a controller from :meth:`state_dict` (settings too, unless given).

        Parameters
        ----------
        state : dict
            Output of :meth:`state_dict` (possibly through JSON).
        settings : SteeringSettings, optional
            New settings for the continued run (e.g. changed limits); the stored ones otherwise.
        external : ExternalSeries, optional
            The external points (may have grown since); read from the settings' file otherwise.
        noise : ClockNoise, optional
        """
        if state.get("format") != STATE_FORMAT:
            raise ValueError(f"unknown steering state format {state.get('format')!r}; "
                             f"expected {STATE_FORMAT}")
        if settings is None:
            settings = build_section(SteeringSettings, state["settings"], "steering")
        ctl = cls(settings, noise=noise, external=external)
        ctl.total_correction = float(state["total_correction"])
        ctl.steer_phase_s = float(state["steer_phase_s"])
        ctl._last_mjd = _opt_float(state["last_mjd"])
        ctl._next_mjd = _opt_float(state["next_command_mjd"])
        ctl._origin_mjd = _opt_float(state["schedule_origin_mjd"])
        ctl._index = int(state["schedule_index"])
        old_interval = state["settings"].get("interval_d", SteeringSettings().interval_d)
        if ctl._next_mjd is not None and float(old_interval) != settings.interval_d:
            # A new interval starts its boundaries at the pending command epoch.
            ctl._origin_mjd, ctl._index = ctl._next_mjd, 0
        ctl._start_mjd = _opt_float(state["start_mjd"])
        ctl._last_command_mjd = _opt_float(state["last_command_mjd"])
        if ctl._flywheel is not None and state.get("external") is not None:
            ctl._flywheel.load_state(state["external"])
        return ctl


def _opt_float(value) -> float | None:
    return None if value is None else float(value)
