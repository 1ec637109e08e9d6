"""Simulator scenarios: the TOML file format, its validation and the programmatic builders.

Internal module of :mod:`ensemble.simulate`; the key reference is docs/simulator.md and the
commented example configs/demo_scenario.toml.  Layout of a scenario file::

    [simulation]          seed, start_mjd, tau0_s, duration_days, reference
    [measurement]         white_pm_s, flicker_pm_tdev_s, [measurement.channel_white_pm_s]
    [[clocks]]            name, type, frequency_offset, drift_per_day, phase_offset_s, [levels]
    [[clock_groups]]      type, count, name_prefix, first_number, digits, random_offsets, [levels]
    [[reference_changes]] day, clock
    [[anomalies]]         kind = phase_step | frequency_step | drift_change | outlier | gap |
                          join | leave | noise_growth, with the keys of that kind

Values are in the units the keys name (days for epochs and drift, seconds, dimensionless
fractional frequency); :class:`Scenario` keeps them as written and converts to SI where the
simulator uses them.  Every problem raises :class:`~ensemble.errors.ConfigError` naming the
dotted key (``anomalies[2].day``).
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import ConfigError
from ..model.presets import LEVEL_FIELDS, PRESETS, ClockPreset
from ..settings import build_section, section_to_dict
from .tables import (ANOMALY_KINDS, ClockGroupSettings, ClockSettings, LevelSettings,
                     MeasurementSettings, ReferenceChangeSettings, SimulationSettings,
                     check_name)

SECONDS_PER_DAY = 86400.0
_GROUP_PREFIX = {"hydrogen_maser": "H", "cesium_standard": "C", "cesium_high_performance": "P",
                 "rubidium": "R", "chip_scale": "S"}
_TABLES = ("simulation", "measurement", "clocks", "clock_groups", "reference_changes", "anomalies")


# ----------------------------------------------------------------------------- resolved objects

@dataclass(frozen=True)
class ClockSpec:
    """One clock of a scenario, with its preset levels and overrides resolved.

    Attributes
    ----------
    name : str
    type : str
        Preset key.
    preset : ClockPreset
        The type's levels with the clock's overrides applied.
    frequency_offset : float
        Fractional frequency at the start (before noise). [1]
    drift_per_day : float
        Linear frequency drift. [1/d]
    phase_offset_s : float
        Clock - ideal time at the start. [s]
    levels : mapping
        The overrides as given (for writing the scenario back).
    """

    name: str
    type: str
    preset: ClockPreset
    frequency_offset: float = 0.0
    drift_per_day: float = 0.0
    phase_offset_s: float = 0.0
    levels: Mapping[str, float] = field(default_factory=dict)

    @property
    def drift_per_s(self) -> float:
        """Linear frequency drift. [1/s]"""
        return self.drift_per_day / SECONDS_PER_DAY


@dataclass(frozen=True, eq=False)
class Scenario:
    """A validated simulator scenario.  Build with :meth:`from_dict`, :meth:`from_toml` or
    :func:`lab_scenario`; run with :func:`ensemble.simulate.simulate`.

    Attributes
    ----------
    simulation : SimulationSettings
    measurement : MeasurementSettings
    channel_white_pm_s : mapping of str to float
        Per-channel white PM overriding ``measurement.white_pm_s``. [s]
    clocks : tuple of ClockSpec
        Explicit clocks first, then the expanded groups, in file order (the position fixes each
        clock's random stream).
    reference_changes : tuple of ReferenceChangeSettings
    anomalies : tuple
        Anomaly tables (:data:`ANOMALY_KINDS`) in file order.
    source_text : str
        The TOML text the scenario was read from ('' if built from a dict).
    path : str or None
        The file, for messages.
    """

    simulation: SimulationSettings
    measurement: MeasurementSettings
    channel_white_pm_s: Mapping[str, float]
    clocks: tuple[ClockSpec, ...]
    reference_changes: tuple[ReferenceChangeSettings, ...] = ()
    anomalies: tuple = ()
    source_text: str = ""
    path: str | None = None

    # -- derived quantities
    @property
    def seed(self) -> int:
        return self.simulation.seed

    @property
    def tau0_s(self) -> float:
        return self.simulation.tau0_s

    @property
    def n_epochs(self) -> int:
        """Number of epochs, duration_days * 86400 / tau0_s."""
        return int(round(self.simulation.duration_days * SECONDS_PER_DAY / self.tau0_s))

    @property
    def clock_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.clocks)

    @property
    def reference(self) -> str:
        """Reference clock at the first epoch."""
        return self.simulation.reference or self.clocks[0].name

    def epoch_of_day(self, day: float) -> int:
        """Index of the epoch nearest to ``day`` days after the start."""
        return int(round(day * SECONDS_PER_DAY / self.tau0_s))

    def white_pm_of(self, name: str) -> float:
        """White PM standard deviation of the channel of clock ``name``. [s]"""
        return float(self.channel_white_pm_s.get(name, self.measurement.white_pm_s))

    # -- construction
    @classmethod
    def from_toml(cls, path) -> "Scenario":
        """Read and validate a scenario file (ConfigError on any problem, naming the key)."""
        try:
            with open(path, "rb") as fh:
                raw = fh.read()
        except OSError as exc:
            raise ConfigError(f"cannot read scenario: {exc.strerror}", path=str(path)) from None
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise ConfigError(f"not UTF-8 text ({exc.reason} at byte {exc.start})",
                              path=str(path)) from None
        return cls.from_toml_text(text, path=str(path))

    @classmethod
    def from_toml_text(cls, text: str, path: str | None = None) -> "Scenario":
        """Parse and validate scenario TOML text."""
        try:
            table = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"not valid TOML: {exc}", path=path) from None
        return cls.from_dict(table, path=path, source_text=text)

    @classmethod
    def from_dict(cls, table: Mapping[str, Any], path: str | None = None,
                  source_text: str = "") -> "Scenario":
        """Validate a scenario given as nested dicts and lists (the parsed TOML layout).

        Examples
        --------
        >>> s = Scenario.from_dict({"simulation": {"seed": 1, "duration_days": 10},
        ...                         "clock_groups": [{"type": "cesium_standard", "count": 3}]})
        >>> s.clock_names, s.n_epochs
        (('C01', 'C02', 'C03'), 240)
        """
        if not isinstance(table, Mapping):
            raise ConfigError("a scenario must be a table", path=path)
        for key in table:
            if key not in _TABLES:
                raise ConfigError(f"unknown table; known: {', '.join(_TABLES)}", key=key,
                                  path=path)
        sim = build_section(SimulationSettings, table.get("simulation"), "simulation", path)
        meas_table = dict(_table(table.get("measurement"), "measurement", path))
        channels = meas_table.pop("channel_white_pm_s", {})
        meas = build_section(MeasurementSettings, meas_table, "measurement", path)
        channels = _float_map(channels, "measurement.channel_white_pm_s", path)
        clocks = [_clock_from_table(t, f"clocks[{i}]", path)
                  for i, t in enumerate(_array(table.get("clocks"), "clocks", path))]
        for i, t in enumerate(_array(table.get("clock_groups"), "clock_groups", path)):
            clocks.extend(_expand_group(t, i, f"clock_groups[{i}]", sim.seed, path))
        changes = tuple(_build(ReferenceChangeSettings, t, f"reference_changes[{i}]", path,
                               required=("day", "clock"))
                        for i, t in enumerate(_array(table.get("reference_changes"),
                                                     "reference_changes", path)))
        anomalies = tuple(_anomaly_from_table(t, f"anomalies[{i}]", path)
                          for i, t in enumerate(_array(table.get("anomalies"), "anomalies", path)))
        scenario = cls(sim, meas, channels, tuple(clocks), changes, anomalies, source_text, path)
        scenario._validate()
        return scenario

    # -- output
    def to_dict(self) -> dict:
        """The scenario as explicit nested dicts (groups expanded, drawn offsets written out)."""
        out = {"simulation": section_to_dict(self.simulation),
               "measurement": section_to_dict(self.measurement)}
        if self.channel_white_pm_s:
            out["measurement"]["channel_white_pm_s"] = dict(self.channel_white_pm_s)
        out["clocks"] = []
        for c in self.clocks:
            entry = {"name": c.name, "type": c.type, "frequency_offset": c.frequency_offset,
                     "drift_per_day": c.drift_per_day, "phase_offset_s": c.phase_offset_s}
            if c.levels:
                entry["levels"] = dict(c.levels)
            out["clocks"].append(entry)
        if self.reference_changes:
            out["reference_changes"] = [section_to_dict(r) for r in self.reference_changes]
        if self.anomalies:
            out["anomalies"] = [{k: v for k, v in section_to_dict(a).items()
                                 if not (isinstance(v, float) and math.isinf(v))}
                                for a in self.anomalies]
        return out

    def to_toml(self) -> str:
        """The source text if read from TOML, else :meth:`to_dict` written as TOML."""
        if self.source_text:
            return self.source_text
        import tomli_w
        return tomli_w.dumps(self.to_dict())

    # -- validation of cross-references and ranges
    def _validate(self) -> None:
        path = self.path
        sim = self.simulation
        n_exact = sim.duration_days * SECONDS_PER_DAY / sim.tau0_s
        if abs(n_exact - round(n_exact)) > 1e-6 * max(1.0, n_exact):
            raise ConfigError(f"{sim.duration_days!r} d is not a whole number of tau0_s = "
                              f"{sim.tau0_s!r} s intervals", key="simulation.duration_days",
                              value=sim.duration_days, unit="d", path=path)
        if self.n_epochs < 3:
            raise ConfigError(f"the run has {self.n_epochs} epoch(s); at least 3 are needed",
                              key="simulation.duration_days", value=sim.duration_days, path=path)
        if len(self.clocks) < 2:
            raise ConfigError("a scenario needs at least two clocks (a reference and one more)",
                              key="clocks", path=path)
        names = self.clock_names
        seen = set()
        for name in names:
            if name in seen:
                raise ConfigError(f"clock name {name!r} is used twice", key="clocks", value=name,
                                  path=path)
            seen.add(name)
        if sim.reference and sim.reference not in seen:
            raise ConfigError(f"unknown clock {sim.reference!r}", key="simulation.reference",
                              value=sim.reference, allowed=", ".join(names), path=path)
        for name in self.channel_white_pm_s:
            if name not in seen:
                raise ConfigError(f"unknown clock {name!r}",
                                  key=f"measurement.channel_white_pm_s.{name}", path=path,
                                  allowed=", ".join(names))
        last_day, current = 0.0, self.reference
        for i, rc in enumerate(self.reference_changes):
            key = f"reference_changes[{i}]"
            self._check_clock(rc.clock, f"{key}.clock")
            self._check_day(rc.day, f"{key}.day", first_epoch_allowed=False)
            if rc.day <= last_day and i > 0:
                raise ConfigError("reference changes must be in increasing order of day",
                                  key=f"{key}.day", value=rc.day, unit="d", path=path)
            if rc.clock == current:
                raise ConfigError(f"{rc.clock!r} is already the reference then",
                                  key=f"{key}.clock", value=rc.clock, path=path)
            last_day, current = rc.day, rc.clock
        joins, leaves = {}, {}
        for i, a in enumerate(self.anomalies):
            key = f"anomalies[{i}]"
            if not (a.kind == "gap" and a.clock == "*"):
                self._check_clock(a.clock, f"{key}.clock")
            first_ok = a.kind in ("outlier", "gap", "noise_growth")
            self._check_day(a.day, f"{key}.day", first_epoch_allowed=first_ok)
            if a.kind == "gap" and round(a.duration_days * SECONDS_PER_DAY / self.tau0_s) < 1:
                raise ConfigError("a gap must span at least one epoch",
                                  key=f"{key}.duration_days", value=a.duration_days, unit="d",
                                  path=path)
            if a.kind == "noise_growth" and math.isfinite(a.end_day) and a.end_day <= a.day:
                raise ConfigError(f"end_day must be later than day = {a.day!r}",
                                  key=f"{key}.end_day", value=a.end_day, unit="d", path=path)
            for kind, store in (("join", joins), ("leave", leaves)):
                if a.kind == kind:
                    if a.clock in store:
                        raise ConfigError(f"clock {a.clock!r} has two '{kind}' entries",
                                          key=f"{key}.clock", value=a.clock, path=path)
                    store[a.clock] = (a.day, key)
        for clock, (day, key) in leaves.items():
            if clock in joins and joins[clock][0] >= day:
                raise ConfigError(f"clock {clock!r} leaves before it joins", key=f"{key}.day",
                                  value=day, unit="d", path=path)

    def _check_clock(self, name: str, key: str) -> None:
        if name not in self.clock_names:
            raise ConfigError(f"unknown clock {name!r}", key=key, value=name,
                              allowed=", ".join(self.clock_names), path=self.path)

    def _check_day(self, day: float, key: str, first_epoch_allowed: bool) -> None:
        k = self.epoch_of_day(day)
        lo = 0 if first_epoch_allowed else 1
        if not (day >= 0 and lo <= k <= self.n_epochs - 1):
            raise ConfigError(f"day {day!r} is outside the run", key=key, value=day, unit="d",
                              allowed=f"{lo * self.tau0_s / SECONDS_PER_DAY:g} to "
                                      f"{(self.n_epochs - 1) * self.tau0_s / SECONDS_PER_DAY:g}",
                              path=self.path)


# ----------------------------------------------------------------------------- builders

def lab_scenario(clocks: Mapping[str, int] | Sequence[Mapping[str, Any]], duration_days: float, *,
                 tau0_s: float = 3600.0, seed: int = 0, start_mjd: float = 61041.0,
                 white_pm_s: float = 2e-12, reference: str = "",
                 reference_changes: Sequence[Mapping[str, Any]] = (),
                 anomalies: Sequence[Mapping[str, Any]] = (),
                 random_offsets: bool = True) -> Scenario:
    """Build a scenario programmatically (validated exactly like a file).

    Parameters
    ----------
    clocks : mapping of type to count, or sequence of clock tables
        ``{"hydrogen_maser": 2, "cesium_standard": 6}`` makes groups named H01, H02, C01, ...
        (offsets and drifts drawn from the types' typical scales if ``random_offsets``); a
        sequence gives explicit ``[[clocks]]`` tables.
    duration_days : float
        Span. [d]
    tau0_s : float
        Sampling interval. [s]
    seed : int
        Root of the random streams.
    start_mjd : float
        First epoch, MJD (UTC). [d]
    white_pm_s : float
        White PM of every channel. [s]
    reference : str
        Initial reference (default: the first clock).
    reference_changes, anomalies : sequences of tables
        As in the file (``{"day": 30, "clock": "H02"}``, ``{"kind": "phase_step", ...}``).
    random_offsets : bool
        For groups: draw offsets and drifts (True) or set them to zero.

    Returns
    -------
    Scenario

    Examples
    --------
    >>> s = lab_scenario({"hydrogen_maser": 1, "rubidium": 2}, 365.0, seed=7,
    ...                  anomalies=[{"kind": "phase_step", "clock": "R01", "day": 100.0,
    ...                              "size_s": 5e-9}])
    >>> s.clock_names, s.n_epochs
    (('H01', 'R01', 'R02'), 8760)
    """
    table: dict[str, Any] = {
        "simulation": {"seed": seed, "start_mjd": start_mjd, "tau0_s": tau0_s,
                       "duration_days": duration_days, "reference": reference},
        "measurement": {"white_pm_s": white_pm_s},
        "reference_changes": [dict(r) for r in reference_changes],
        "anomalies": [dict(a) for a in anomalies],
    }
    if isinstance(clocks, Mapping):
        table["clock_groups"] = [{"type": t, "count": int(n), "random_offsets": random_offsets}
                                 for t, n in clocks.items()]
    else:
        table["clocks"] = [dict(c) for c in clocks]
    return Scenario.from_dict(table)


# ----------------------------------------------------------------------------- helpers

def _table(value, key: str, path) -> Mapping[str, Any]:
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise ConfigError(f"expected a table, got {value!r}", key=key, path=path)
    return value


def _array(value, key: str, path) -> list:
    if value is None:
        return []
    if not isinstance(value, (list, tuple)) or not all(isinstance(v, Mapping) for v in value):
        raise ConfigError(f"expected an array of tables [[{key}]]", key=key, path=path)
    return list(value)


def _float_map(value, key: str, path) -> dict[str, float]:
    out = {}
    for name, v in _table(value, key, path).items():
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
            raise ConfigError(f"expected a number >= 0, got {v!r}", key=f"{key}.{name}", value=v,
                              unit="s", path=path)
        out[str(name)] = float(v)
    return out


def _levels(table, key: str, path) -> dict[str, float]:
    given = _table(table, key, path)
    checked = build_section(LevelSettings, given, key, path)   # names, types and ranges
    return {name: float(getattr(checked, name)) for name in given if name in LEVEL_FIELDS}


def _clock_from_table(table: Mapping[str, Any], key: str, path) -> ClockSpec:
    table = dict(table)
    levels = _levels(table.pop("levels", None), f"{key}.levels", path)
    s = _build(ClockSettings, table, key, path, required=("name", "type"), extra=("levels",))
    return ClockSpec(s.name, s.type, PRESETS[s.type].with_levels(**levels), s.frequency_offset,
                     s.drift_per_day, s.phase_offset_s, levels)


def _expand_group(table: Mapping[str, Any], index: int, key: str, seed: int,
                  path) -> list[ClockSpec]:
    table = dict(table)
    levels = _levels(table.pop("levels", None), f"{key}.levels", path)
    g = _build(ClockGroupSettings, table, key, path, required=("type",), extra=("levels",))
    prefix = g.name_prefix or _GROUP_PREFIX[g.type]
    preset = PRESETS[g.type].with_levels(**levels)
    # Offsets come from the group's own stream: (seed, 2, group index); clock noise uses (0, i).
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(2, index)))
    draws = rng.standard_normal((g.count, 2))
    out = []
    for j in range(g.count):
        name = f"{prefix}{g.first_number + j:0{g.digits}d}"
        check_name(name, f"{key}.name_prefix", path)
        y0 = float(preset.frequency_offset * draws[j, 0]) if g.random_offsets else 0.0
        d0 = float(preset.drift_per_day * draws[j, 1]) if g.random_offsets else 0.0
        out.append(ClockSpec(name, g.type, preset, y0, d0, 0.0, levels))
    return out


def _anomaly_from_table(table: Mapping[str, Any], key: str, path):
    kind = table.get("kind")
    if kind is None:
        raise ConfigError("missing key 'kind'", key=f"{key}.kind",
                          allowed=", ".join(ANOMALY_KINDS), path=path)
    if kind not in ANOMALY_KINDS:
        raise ConfigError(f"unknown anomaly kind {kind!r}", key=f"{key}.kind", value=kind,
                          allowed=", ".join(ANOMALY_KINDS), path=path)
    cls = ANOMALY_KINDS[kind]
    required = [f.name for f in dataclasses.fields(cls)
                if f.name in ("clock", "day", "size_s", "size", "size_per_day", "duration_days")
                and not (kind == "gap" and f.name == "clock")
                and not (kind == "noise_growth" and f.name == "day")]
    return _build(cls, table, key, path, required=required, what=f" for kind '{kind}'")


def _build(cls, table: Mapping[str, Any], key: str, path, required=(), extra=(), what=""):
    """build_section with the required keys enforced and every allowed key listed."""
    known = [f.name for f in dataclasses.fields(cls)] + list(extra)
    for name in table:
        if name not in known:
            raise ConfigError(f"unknown key{what}; known keys: {', '.join(known)}",
                              key=f"{key}.{name}", value=table[name], path=path)
    for name in required:
        if name not in table:
            raise ConfigError(f"missing key '{name}'{what}", key=f"{key}.{name}", path=path)
    return build_section(cls, table, key, path)
