"""Tables of a simulator scenario file, as validated settings dataclasses (internal module).

One dataclass per TOML table (built with :func:`ensemble.settings.setting`, so every key carries
its unit, default, allowed values and meaning); :mod:`ensemble.simulate.scenario` validates a
parsed file against them and resolves cross-references.  Values are in the units the keys name.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from ..errors import ConfigError
from ..model.presets import PRESETS
from ..settings import setting

#: Last leap second before 2017-01-01 (MJD 57754): the UTC tags of later spans form a uniform grid.
EARLIEST_START_MJD = 57754.0
_NAME_RE = re.compile(r"^[A-Za-z0-9_.\-]{1,32}$")


def check_name(name: str, key: str, path) -> None:
    """ConfigError unless ``name`` is a valid clock identifier (docs/input.md)."""
    if not _NAME_RE.match(name or ""):
        raise ConfigError(f"invalid clock name {name!r}", key=key, value=name,
                          allowed="1-32 characters of A-Z a-z 0-9 _ . -", path=path)


@dataclass(frozen=True)
class SimulationSettings:
    """``[simulation]``: random seed, time grid and the initial reference clock."""

    seed: int = setting(0, minimum=0, doc="root of every random stream (same seed, same files)")
    start_mjd: float = setting(61041.0, unit="d", minimum=EARLIEST_START_MJD, maximum=99999.0,
                               doc="first epoch, MJD (UTC); no leap second since MJD 57754")
    tau0_s: float = setting(3600.0, unit="s", minimum=0.0, exclusive_minimum=True,
                            doc="sampling interval of the measurements")
    duration_days: float = setting(30.0, unit="d", minimum=0.0, exclusive_minimum=True,
                                   doc="span; the run has duration_days * 86400 / tau0_s epochs")
    reference: str = setting("", doc="reference clock at the first epoch (empty: the first clock)")


@dataclass(frozen=True)
class MeasurementSettings:
    """``[measurement]``: noise of the phase comparator (per channel, not of the clocks)."""

    white_pm_s: float = setting(2e-12, unit="s", minimum=0.0,
                                doc="white PM standard deviation of every channel's reading")
    flicker_pm_tdev_s: float = setting(0.0, unit="s", minimum=0.0,
                                       doc="flicker PM as its long-term TDEV plateau (0: none)")


@dataclass(frozen=True)
class LevelSettings:
    """``levels`` of a clock or group: overrides of the preset's noise levels."""

    white_fm_adev_1s: float = setting(0.0, unit="1", minimum=0.0, doc="white FM ADEV at 1 s")
    flicker_fm_adev: float = setting(0.0, unit="1", minimum=0.0, doc="flicker FM ADEV floor")
    rw_fm_adev: float = setting(0.0, unit="1", minimum=0.0,
                                doc="random-walk FM ADEV at rw_fm_tau_s")
    rw_fm_tau_s: float = setting(86400.0, unit="s", minimum=0.0, exclusive_minimum=True,
                                 doc="averaging time of rw_fm_adev")
    rr_fm_hdev: float = setting(0.0, unit="1", minimum=0.0,
                                doc="random-run FM HDEV at rr_fm_tau_s")
    rr_fm_tau_s: float = setting(86400.0, unit="s", minimum=0.0, exclusive_minimum=True,
                                 doc="averaging time of rr_fm_hdev")


@dataclass(frozen=True)
class ClockSettings:
    """``[[clocks]]``: one clock (its type gives the noise; deterministic terms given here)."""

    name: str = setting("", doc="identifier, 1-32 characters of A-Z a-z 0-9 _ . -")
    type: str = setting("", choices=tuple(PRESETS), doc="clock type (preset)")
    frequency_offset: float = setting(0.0, unit="1", doc="fractional frequency at the start")
    drift_per_day: float = setting(0.0, unit="1/d", doc="linear frequency drift")
    phase_offset_s: float = setting(0.0, unit="s", doc="clock - ideal time at the start")

    def validate(self, prefix: str, path: str | None) -> None:
        check_name(self.name, f"{prefix}.name", path)
        if not self.type:
            raise ConfigError("missing key 'type'", key=f"{prefix}.type",
                              allowed=", ".join(PRESETS), path=path)


@dataclass(frozen=True)
class ClockGroupSettings:
    """``[[clock_groups]]``: several clocks of one type with numbered names."""

    type: str = setting("", choices=tuple(PRESETS), doc="clock type (preset)")
    count: int = setting(1, minimum=1, maximum=10000, doc="number of clocks")
    name_prefix: str = setting("", doc="names are prefix + number (empty: from the type)")
    first_number: int = setting(1, minimum=0, doc="number of the first clock")
    digits: int = setting(2, minimum=1, maximum=6, doc="numbers are zero-padded to this width")
    random_offsets: bool = setting(True, doc="draw frequency offset and drift from the type's "
                                             "typical scales (seeded); false: zero")

    def validate(self, prefix: str, path: str | None) -> None:
        if not self.type:
            raise ConfigError("missing key 'type'", key=f"{prefix}.type",
                              allowed=", ".join(PRESETS), path=path)


@dataclass(frozen=True)
class ReferenceChangeSettings:
    """``[[reference_changes]]``: from ``day`` on the measurements are against ``clock``."""

    day: float = setting(-1.0, unit="d", doc="days since the start (rounded to an epoch)")
    clock: str = setting("", doc="the new reference clock")


@dataclass(frozen=True)
class PhaseStep:
    """Phase step of ``size_s`` in the clock from ``day`` on (x += b for t >= t0)."""

    kind: str = setting("phase_step", choices=("phase_step",))
    clock: str = setting("", doc="affected clock")
    day: float = setting(-1.0, unit="d", doc="days since the start")
    size_s: float = setting(0.0, unit="s", doc="step of clock - ideal time")


@dataclass(frozen=True)
class FrequencyStep:
    """Frequency step of ``size`` from ``day`` on (x += c (t - t0) for t >= t0)."""

    kind: str = setting("frequency_step", choices=("frequency_step",))
    clock: str = setting("", doc="affected clock")
    day: float = setting(-1.0, unit="d", doc="days since the start")
    size: float = setting(0.0, unit="1", doc="step of fractional frequency")


@dataclass(frozen=True)
class DriftChange:
    """Drift change of ``size_per_day`` from ``day`` on (x += D (t - t0)^2 / 2 for t >= t0)."""

    kind: str = setting("drift_change", choices=("drift_change",))
    clock: str = setting("", doc="affected clock")
    day: float = setting(-1.0, unit="d", doc="days since the start")
    size_per_day: float = setting(0.0, unit="1/d", doc="change of the linear frequency drift")


@dataclass(frozen=True)
class Outlier:
    """One bad reading of the clock's channel at ``day`` (the clock itself is unaffected)."""

    kind: str = setting("outlier", choices=("outlier",))
    clock: str = setting("", doc="channel (clock) with the bad reading")
    day: float = setting(-1.0, unit="d", doc="days since the start")
    size_s: float = setting(0.0, unit="s", doc="error added to the reading")


@dataclass(frozen=True)
class Gap:
    """No data for ``duration_days`` from ``day``: one clock, or every clock with ``"*"``."""

    kind: str = setting("gap", choices=("gap",))
    clock: str = setting("*", doc="clock without data, or '*' for all (whole epochs missing)")
    day: float = setting(-1.0, unit="d", doc="days since the start of the first missing epoch")
    duration_days: float = setting(0.0, unit="d", minimum=0.0, exclusive_minimum=True,
                                   doc="length of the gap (at least one epoch)")


@dataclass(frozen=True)
class Join:
    """The clock has no data before ``day`` (it joins the ensemble late)."""

    kind: str = setting("join", choices=("join",))
    clock: str = setting("", doc="joining clock")
    day: float = setting(-1.0, unit="d", doc="days since the start of its first measurement")


@dataclass(frozen=True)
class Leave:
    """The clock has no data from ``day`` on (it leaves the ensemble)."""

    kind: str = setting("leave", choices=("leave",))
    clock: str = setting("", doc="leaving clock")
    day: float = setting(-1.0, unit="d", doc="days since the start of its first missing epoch")


@dataclass(frozen=True)
class NoiseGrowth:
    """The clock's white-FM level is multiplied by a factor growing from 1 to ``factor``."""

    kind: str = setting("noise_growth", choices=("noise_growth",))
    clock: str = setting("", doc="ageing clock")
    day: float = setting(0.0, unit="d", doc="days since the start when the growth begins")
    end_day: float = setting(math.inf, unit="d",
                             doc="when the factor is reached (default: the end of the run)")
    factor: float = setting(2.0, unit="1", minimum=0.0, exclusive_minimum=True,
                            doc="multiplier of the white-FM Allan deviation at end_day")
    shape: str = setting("linear", choices=("linear", "exponential"),
                         doc="linear: 1 + (factor - 1) u; exponential: factor ** u, u in [0, 1]")


#: Anomaly kinds and their tables.
ANOMALY_KINDS = {cls().kind: cls for cls in (PhaseStep, FrequencyStep, DriftChange, Outlier, Gap,
                                             Join, Leave, NoiseGrowth)}
