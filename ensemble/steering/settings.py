"""The ``[steering]`` section of the configuration: what is steered, onto what, how and within
which limits.

Every key has a unit, a default and a reason for the default (docs/steering.md, "Settings").
The defaults describe a maser-driven synthesizer steered daily onto the local ensemble scale:
a ten-day critically damped loop, changes of at most 1e-15 per command and a total correction
of at most 3e-13 (typical values of practice, recalled from memory, no source).  Values are
written in the units of the key's suffix (``_d`` days, ``_h`` hours, ``_ns`` nanoseconds, ``_s``
seconds, ``_d2`` days squared); keys without a suffix are dimensionless fractional frequencies.
"""

from __future__ import annotations

import pathlib
import tomllib
from dataclasses import dataclass, replace

from ..errors import ConfigError
from ..settings import build_section, setting

#: Tolerance when comparing epoch labels (MJD) for scheduling. [d] (about 0.09 s)
MJD_TOLERANCE_D = 1e-6


@dataclass(frozen=True)
class SteeringSettings:
    """Validated ``[steering]`` settings (see :func:`load_steering_settings`).

    Build with :func:`ensemble.settings.build_section` (``prefix="steering"``) so that every bad
    value raises a :class:`~ensemble.errors.ConfigError` naming its dotted key.
    """

    output: str = setting(
        "virtual", choices=("virtual", "measured"),
        doc="'virtual': a synthesizer driven by the master clock, its phase = master + accumulated "
            "steer; 'measured': the synthesizer output is measured as its own channel")
    master_clock: str = setting(
        "", doc="clock driving the virtual synthesizer; empty: the first epoch's reference clock "
                "(the clock itself is never steered)")
    output_channel: str = setting(
        "", doc="measured mode: the channel name of the steered output in the measurements")
    policy: str = setting(
        "critical", choices=("critical", "lqg"),
        doc="'critical': critically damped loop with time constant time_constant_d; "
            "'lqg': linear-quadratic regulator with the gain of the discrete Riccati equation")
    time_constant_d: float = setting(
        10.0, unit="d", minimum=0.0, exclusive_minimum=True, maximum=3650.0,
        doc="critical policy: time constant T of the double closed-loop pole exp(-interval/T)")
    effort_weight_d2: float = setting(
        100.0, unit="d^2", minimum=0.0, exclusive_minimum=True, maximum=1e12,
        doc="lqg policy: weight rho of a squared frequency change (ns/d)^2 against a squared "
            "phase error ns^2")
    frequency_weight_d2: float = setting(
        0.0, unit="d^2", minimum=0.0, maximum=1e12,
        doc="lqg policy: weight of a squared frequency error (ns/d)^2 against a squared phase "
            "error ns^2")
    drift_feedforward: bool = setting(
        True, doc="add the drift term g_d * drift so that a constant drift leaves no mean phase "
                  "error at the command epochs")
    interval_d: float = setting(
        1.0, unit="d", minimum=1.0 / 1440.0, maximum=366.0,
        doc="steering interval: commands only at interval boundaries")
    anchor: str = setting(
        "time-of-day", choices=("time-of-day", "first-epoch"),
        doc="where the interval boundaries sit: at time_of_day_h UTC (plus whole intervals), "
            "or at the first epoch of the run")
    time_of_day_h: float = setting(
        0.0, unit="h", minimum=0.0, maximum=24.0,
        doc="time of day of the boundaries when anchor = 'time-of-day' (0 <= value < 24)")
    settle_d: float = setting(
        2.0, unit="d", minimum=0.0, maximum=3650.0,
        doc="no command during the first settle_d days of a fresh run, while the estimates settle")
    max_step: float = setting(
        1e-15, unit="1", minimum=0.0, exclusive_minimum=True, maximum=1e-9,
        doc="largest fractional-frequency change of one command (larger ones are clipped)")
    max_total: float = setting(
        3e-13, unit="1", minimum=0.0, exclusive_minimum=True, maximum=1e-6,
        doc="largest total correction (sum of all applied changes); beyond it commands are clipped")
    dead_band_phase_ns: float = setting(
        0.1, unit="ns", minimum=0.0, maximum=1e6,
        doc="no command while |phase error| < this AND |proposed change| < dead_band_step")
    dead_band_step: float = setting(
        1e-17, unit="1", minimum=0.0, maximum=1e-9,
        doc="see dead_band_phase_ns; either at 0 switches the dead band off")
    initial_total_correction: float = setting(
        0.0, unit="1", minimum=-1e-6, maximum=1e-6,
        doc="total correction already set in the synthesizer when a fresh run starts")
    target: str = setting(
        "scale", choices=("scale", "external"),
        doc="'scale': steer onto the ensemble scale; 'external': onto scale + external_weight * "
            "(external reference - scale), the ensemble carrying time between external points")
    external_file: str = setting(
        "", doc="CSV mjd,offset[,uncertainty]: external reference - local scale [s]; relative "
                "paths are taken from the configuration file's folder")
    external_weight: float = setting(
        1.0, unit="1", minimum=0.0, maximum=1.0,
        doc="blend w: the target is scale + w * (external - scale); 1 follows the external reference")
    external_q1_s: float = setting(
        1e-27, unit="s", minimum=0.0, maximum=1e-18,
        doc="white-FM diffusion coefficient of (external - scale) in the flywheel filter")
    external_q2_per_s: float = setting(
        3e-37, unit="1/s", minimum=0.0, exclusive_minimum=True, maximum=1e-26,
        doc="random-walk-FM diffusion coefficient of (external - scale) in the flywheel filter")
    external_uncertainty_ns: float = setting(
        2.0, unit="ns", minimum=0.0, exclusive_minimum=True, maximum=1e6,
        doc="standard uncertainty of an external point whose uncertainty cell is empty or absent")
    external_rate_sd: float = setting(
        1e-13, unit="1", minimum=0.0, exclusive_minimum=True, maximum=1e-6,
        doc="prior standard deviation of the rate of (external - scale) at the first point")
    external_max_age_d: float = setting(
        45.0, unit="d", minimum=0.0, exclusive_minimum=True, maximum=3650.0,
        doc="hold the frequency (no command) when the newest external point is older than this")

    def validate(self, prefix: str = "steering", path: str | None = None) -> None:
        """Checks that involve several keys (called by ``build_section``)."""
        def fail(key, message, value=None, allowed=None, unit=None):
            raise ConfigError(message, key=f"{prefix}.{key}", value=value, allowed=allowed,
                              unit=unit, path=path)

        if self.time_of_day_h >= 24.0:
            fail("time_of_day_h", f"value {self.time_of_day_h!r} out of range", self.time_of_day_h,
                 "0 <= value < 24", "h")
        if self.output == "measured" and not self.output_channel:
            fail("output_channel", "output = 'measured' needs the name of the measured output "
                                   "channel", self.output_channel, "a channel name")
        if self.target == "external" and not self.external_file:
            fail("external_file", "target = 'external' needs a CSV file of external reference - "
                                  "scale offsets", self.external_file, "a file path")
        if self.max_step > self.max_total:
            fail("max_step", f"max_step {self.max_step!r} exceeds max_total {self.max_total!r}",
                 self.max_step, f"a number <= max_total ({self.max_total!r})", "1")
        if abs(self.initial_total_correction) > self.max_total:
            fail("initial_total_correction",
                 f"|{self.initial_total_correction!r}| exceeds max_total {self.max_total!r}",
                 self.initial_total_correction, f"|value| <= {self.max_total!r}", "1")
        if self.policy == "critical" and self.time_constant_d < self.interval_d:
            fail("time_constant_d",
                 f"time constant {self.time_constant_d!r} d is shorter than the interval "
                 f"{self.interval_d!r} d (that is dead-beat control with large steps)",
                 self.time_constant_d, f"a number >= interval_d ({self.interval_d!r})", "d")

    # Conversions used by the controller (SI).
    @property
    def interval_s(self) -> float:
        """Steering interval. [s]"""
        return self.interval_d * 86400.0

    @property
    def dead_band_phase_s(self) -> float:
        """Phase part of the dead band. [s]"""
        return self.dead_band_phase_ns * 1e-9

    @property
    def external_uncertainty_s(self) -> float:
        """Default uncertainty of an external point. [s]"""
        return self.external_uncertainty_ns * 1e-9

    def steered_clock(self, first_reference: str) -> str:
        """Name of the clock whose estimate the engine passes to the controller each epoch.

        Parameters
        ----------
        first_reference : str
            The measurement reference clock of the first epoch.

        Returns
        -------
        str
            ``output_channel`` in measured mode, else ``master_clock`` or, when that is empty,
            ``first_reference``.
        """
        if self.output == "measured":
            return self.output_channel
        return self.master_clock or first_reference


def steering_settings_from_table(table, *, path: str | None = None,
                                 prefix: str = "steering") -> SteeringSettings:
    """Validate a parsed ``[steering]`` TOML table (None: all defaults).

    A relative ``external_file`` is resolved against the folder of ``path`` when given.

    Raises
    ------
    ConfigError
        Unknown key, wrong type, value out of range or inconsistent keys.
    """
    settings = build_section(SteeringSettings, table, prefix, path)
    if settings.external_file and path is not None:
        file = pathlib.Path(settings.external_file)
        if not file.is_absolute():
            settings = replace(settings,
                               external_file=str(pathlib.Path(path).parent / file))
    return settings


def load_steering_settings(path: str | None = None, *, text: str | None = None) -> SteeringSettings:
    """Read the ``[steering]`` section of a TOML file (or of TOML text); defaults if absent.

    Parameters
    ----------
    path : str, optional
        Configuration file.
    text : str, optional
        TOML text instead of a file (e.g. an archive's ``config_toml`` attribute); ``path`` is
        then used only for messages and relative paths.

    Raises
    ------
    ConfigError
        The file cannot be read or parsed, or the section is invalid.
    """
    if text is None:
        if path is None:
            return SteeringSettings()
        try:
            text = pathlib.Path(path).read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"cannot read the configuration: {exc.strerror or exc}",
                              path=path) from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", path=path) from None
    return steering_settings_from_table(doc.get("steering"), path=path)
