"""The ``[assessment]`` section of the configuration: what `ensemble assess` computes and the
thresholds of its verdicts.

Every key has a unit, a default and a reason for the default (docs/assessment.md, "Settings").
Values are in the units of the key's suffix (``_s`` seconds, ``_days`` days, ``_ns``
nanoseconds, ``_percent`` per cent); keys without a suffix are dimensionless.  The thresholds
are this project's policy for an advisory verdict, not a standard: the evidence behind each
verdict is always printed with it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import ConfigError
from ..settings import setting

#: How a clock of type "auto" is compared with the typical levels of the clock types.
AUTO_TYPE_CHOICES = ("closest", "skip")


@dataclass(frozen=True)
class AssessmentSettings:
    """The [assessment] section: what `ensemble assess` computes and its verdict thresholds."""

    taus_s: tuple = setting(
        (3600.0, 86400.0, 864000.0), unit="s",
        doc="averaging times at which each clock's stability is reported and judged; rounded "
            "to whole sampling intervals, and those the span cannot support are left out")
    confidence: float = setting(
        0.6826894921, unit="1", minimum=0.5, maximum=0.999,
        doc="two-sided probability of the confidence intervals of the deviations")
    window_days: float = setting(
        30.0, unit="d", exclusive_minimum=True, minimum=0.0, maximum=3650.0,
        doc="length of the sliding windows of the ageing analysis")
    window_step_days: float = setting(
        7.0, unit="d", exclusive_minimum=True, minimum=0.0, maximum=3650.0,
        doc="step between the starts of consecutive windows")
    min_windows: int = setting(
        8, minimum=4, maximum=1000,
        doc="fewest windows a trend test is given; shorter data get shorter windows with the "
            "same step-to-length ratio")
    min_window_days: float = setting(
        2.0, unit="d", exclusive_minimum=True, minimum=0.0, maximum=3650.0,
        doc="shortest window: a span too short for min_windows windows of this length gets no "
            "trend test")
    trend_alpha: float = setting(
        0.01, unit="1", exclusive_minimum=True, minimum=0.0, maximum=0.2,
        doc="significance level of the ageing trend tests (one test per clock and statistic)")
    holdover_budgets_ns: tuple = setting(
        (100.0, 1000.0), unit="ns",
        doc="time-error budgets: how long each clock alone stays within them")
    holdover_coverage: float = setting(
        0.95, unit="1", minimum=0.5, maximum=0.9999,
        doc="two-sided probability of the holdover bound |TE| + k sigma")
    holdover_horizon_days: float = setting(
        3652.5, unit="d", exclusive_minimum=True, minimum=0.0, maximum=36525.0,
        doc="longest holdover searched; a budget not reached by then is reported as beyond it")
    type_watch_factor: float = setting(
        2.0, unit="1", minimum=1.0, maximum=1000.0,
        doc="watch a clock whose Hadamard deviation (lower confidence bound) exceeds its "
            "type's typical level by more than this factor at a judged averaging time")
    type_retire_factor: float = setting(
        4.0, unit="1", minimum=1.0, maximum=1000.0,
        doc="retire a clock whose Hadamard deviation (lower confidence bound) exceeds its "
            "type's typical level by more than this factor at a judged averaging time")
    auto_type: str = setting(
        "closest", choices=AUTO_TYPE_CHOICES,
        doc="clocks of type 'auto': compare with the closest type's typical levels, or skip "
            "the comparison")
    growth_retire_factor: float = setting(
        2.0, unit="1", minimum=1.0, maximum=1000.0,
        doc="retire a clock whose white-FM Allan deviation grew significantly and by more than "
            "this factor over the span (fitted trend); a significant smaller growth is watched")
    max_frequency_steps: int = setting(
        3, minimum=1, maximum=10000,
        doc="watch a clock with at least this many frequency steps and drift changes in the "
            "span")
    max_phase_steps: int = setting(
        3, minimum=1, maximum=10000,
        doc="watch a clock with at least this many phase steps in the span")
    max_outliers_per_30_days: float = setting(
        4.0, unit="1/(30 d)", exclusive_minimum=True, minimum=0.0,
        doc="watch a clock (its measurement channel) with outliers more often than this")
    max_excluded_days: float = setting(
        30.0, unit="d", exclusive_minimum=True, minimum=0.0,
        doc="watch a member clock that spent longer than this excluded or removed")
    min_availability: float = setting(
        0.9, unit="1", minimum=0.0, maximum=1.0,
        doc="watch a clock measured at fewer than this fraction of the epochs")
    what_if_better_percent: float = setting(
        1.0, unit="%", minimum=0.0, maximum=100.0,
        doc="what-if: the scale is better without a clock when its estimated Allan deviation "
            "falls by more than this at a judged averaging time (and by more than "
            "what_if_sigma standard uncertainties)")
    what_if_lean_percent: float = setting(
        10.0, unit="%", minimum=0.0, maximum=1000.0,
        doc="what-if: the scale leans on a clock whose removal worsens its estimated Allan "
            "deviation by more than this at a judged averaging time")
    what_if_negligible_percent: float = setting(
        1.0, unit="%", minimum=0.0, maximum=100.0,
        doc="what-if: the scale does not need a clock whose removal changes its estimated "
            "Allan deviation by less than this at every judged averaging time")
    what_if_sigma: float = setting(
        2.0, unit="1", minimum=0.0, maximum=10.0,
        doc="what-if: standard uncertainties a change must exceed to count")
    what_if_workers: int = setting(
        0, minimum=0, maximum=1024,
        doc="processes for the what-if runs; 0 uses every core")

    def validate(self, prefix: str, path: str | None) -> None:
        """Check the list keys and the ordering of paired thresholds."""
        for key, values, unit in (("taus_s", self.taus_s, "s"),
                                  ("holdover_budgets_ns", self.holdover_budgets_ns, "ns")):
            if not values:
                raise ConfigError("must hold at least one value", key=f"{prefix}.{key}",
                                  value=list(values), unit=unit, allowed="a non-empty list of "
                                  "numbers > 0", path=path)
            for v in values:
                if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                        or v <= 0:
                    raise ConfigError(f"element {v!r} is not a number > 0",
                                      key=f"{prefix}.{key}", value=list(values), unit=unit,
                                      allowed="a non-empty list of numbers > 0", path=path)
        if self.type_retire_factor < self.type_watch_factor:
            raise ConfigError("must not be smaller than type_watch_factor",
                              key=f"{prefix}.type_retire_factor", value=self.type_retire_factor,
                              path=path)
        if self.window_step_days > self.window_days:
            raise ConfigError("must not exceed window_days (windows would leave data out)",
                              key=f"{prefix}.window_step_days", value=self.window_step_days,
                              unit="d", path=path)
        if self.min_window_days > self.window_days:
            raise ConfigError("must not exceed window_days", key=f"{prefix}.min_window_days",
                              value=self.min_window_days, unit="d", path=path)

    @property
    def taus(self) -> tuple[float, ...]:
        """The judged averaging times as floats, sorted and without repeats. [s]"""
        return tuple(sorted({float(v) for v in self.taus_s}))

    @property
    def budgets_s(self) -> tuple[float, ...]:
        """The holdover budgets in seconds, sorted. [s]"""
        return tuple(sorted(float(v) / 1e9 for v in self.holdover_budgets_ns))
