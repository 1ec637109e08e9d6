"""Internal: configuration sections of the ensemble engine ([ensemble], [detection], [clocks.*])."""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import ConfigError
from ..settings import setting

#: Roles a clock can have in the ensemble.
ROLES = ("member", "monitor")
#: Clock types with presets (see ensemble.model.presets); "auto" estimates everything.
CLOCK_TYPES = ("auto", "hydrogen_maser", "cesium_standard", "cesium_high_performance",
               "rubidium", "chip_scale")


@dataclass(frozen=True)
class EnsembleSettings:
    """The [ensemble] section: how the time scale is formed."""

    drift_states: bool = setting(
        True, doc="estimate a frequency-drift state for every clock (per-clock override in "
                  "[clocks.NAME])")
    startup_days: float = setting(
        10.0, unit="d", minimum=0.5, doc="initial stretch used to estimate noise levels, "
                                        "frequencies and drifts when the configuration gives "
                                        "none")
    weighting_interval_s: float = setting(
        0.0, unit="s", minimum=0.0, doc="averaging time whose prediction-error variance sets "
                                        "the phase weights; 0 means the sampling interval")
    frame_interval_s: float = setting(
        864000.0, unit="s", exclusive_minimum=True, minimum=0.0,
        doc="averaging time whose Hadamard variances set the long-term frequency weights of "
            "the filter's frame")
    weight_cap: float = setting(
        0.0, unit="1", minimum=0.0, maximum=1000.0,
        doc="relative weight cap A: no clock weighs more than A/N of the scale; 0 for no "
            "cap (a cap suits ensembles of many similar clocks; in a small mixed ensemble it "
            "moves weight from the masers to far noisier clocks)")

    def cap(self) -> float:
        """The cap factor A, or infinity when capping is off."""
        return self.weight_cap if self.weight_cap > 0 else math.inf
    probation_days: float = setting(
        10.0, unit="d", minimum=0.0, doc="a clock that joins has zero weight this long")
    relearn_days: float = setting(
        3.0, unit="d", minimum=0.0,
        doc="minimum exclusion after a frequency step or drift change")
    settle_days: float = setting(
        0.0, unit="d", minimum=0.0,
        doc="minimum exclusion after a phase step (the clock returns once its residuals are "
            "in family again)")
    max_gap_days: float = setting(
        10.0, unit="d", exclusive_minimum=True, minimum=0.0,
        doc="a clock silent longer than this leaves the ensemble and re-enters as new")
    tracking: bool = setting(
        True, doc="re-estimate each clock's noise levels during the run")
    tracking_interval_days: float = setting(
        1.0, unit="d", exclusive_minimum=True, minimum=0.0,
        doc="how often the noise levels are re-estimated")
    tracking_memory_days: float = setting(
        30.0, unit="d", exclusive_minimum=True, minimum=0.0,
        doc="time constant of the statistics behind the re-estimated noise levels")
    tracking_max_change: float = setting(
        0.1, unit="1", exclusive_minimum=True, minimum=0.0, maximum=10.0,
        doc="largest relative change of a noise level per re-estimation")

    def validate(self, prefix: str, path: str | None) -> None:
        if 0 < self.weight_cap < 1:
            raise ConfigError("must be 0 (no cap) or at least 1", key=f"{prefix}.weight_cap",
                              value=self.weight_cap, allowed="0, or a number >= 1", path=path)
        if self.relearn_days > self.max_gap_days:
            raise ConfigError("must not exceed max_gap_days", key=f"{prefix}.relearn_days",
                              value=self.relearn_days, path=path)


@dataclass(frozen=True)
class DetectionSettings:
    """The [detection] section: anomaly tests."""

    false_alarm_rate: float = setting(
        1e-5, unit="1/(clock epoch)", exclusive_minimum=True, minimum=0.0, maximum=0.01,
        doc="allowed false alarms per clock and epoch; sets every test threshold")
    hold_sigma: float = setting(
        3.5, unit="1", minimum=2.0, maximum=20.0,
        doc="standardised residual beyond which a clock's data are held back and tested")
    max_hold_epochs: int = setting(
        6, minimum=2, maximum=50, doc="longest test of a held clock before a decision")
    decision_margin: float = setting(
        10.0, unit="1", minimum=0.0,
        doc="the best hypothesis must beat the second by this much (log-likelihood ratio x2)")
    window_epochs: int = setting(
        32, minimum=4, maximum=1000,
        doc="onsets (one per epoch) kept by the slow-change test (frequency steps, drift "
            "changes)")


@dataclass(frozen=True)
class ClockSettings:
    """A [clocks.NAME] table: what is known about one clock.  NaN means "estimate"."""

    type: str = setting("auto", choices=CLOCK_TYPES,
                        doc="clock type; its typical levels serve as priors")
    role: str = setting("member", choices=ROLES,
                        doc="member (weighted in the scale) or monitor (measured only)")
    drift_state: str = setting("default", choices=("default", "yes", "no"),
                               doc="override [ensemble].drift_states for this clock")
    q1_s: float = setting(math.nan, unit="s", doc="white FM level (sigma_y^2 tau)")
    q2_per_s: float = setting(math.nan, unit="1/s", doc="random-walk FM level")
    q3_per_s3: float = setting(math.nan, unit="1/s^3", doc="random-run FM level")
    r_s2: float = setting(math.nan, unit="s^2", doc="white PM variance of its channel")

    def validate(self, prefix: str, path: str | None) -> None:
        for name in ("q1_s", "q2_per_s", "q3_per_s3", "r_s2"):
            value = getattr(self, name)
            if not math.isnan(value) and value < 0:
                raise ConfigError("must be >= 0", key=f"{prefix}.{name}", value=value,
                                  allowed=">= 0", path=path)
