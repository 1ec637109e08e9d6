"""Configuration: a TOML file -> validated, frozen settings; the effective settings -> TOML text.

Every key has a documented default (see configs/default.toml and README), so a run needs no
configuration at all.  Unknown tables or keys, wrong types and out-of-range values raise
:class:`~ensemble.errors.ConfigError` naming the dotted key and the allowed values.  Nothing in a
configuration is ever executed.
"""

from __future__ import annotations

import dataclasses
import math
import pathlib
import re
import tomllib
from dataclasses import dataclass, field
from typing import Any, Mapping

from .engine.settings import ClockSettings, DetectionSettings, EnsembleSettings
from .errors import ConfigError
from .settings import build_section, section_to_dict, setting

_ID = re.compile(r"^[A-Za-z0-9_.\-]{1,32}$")


@dataclass(frozen=True)
class InputSettings:
    """The [input] section: how the measurement file is read."""

    reference: str = setting("", doc="reference clock of a wide-form file (the command line's "
                                     "--reference takes precedence)")


def _section_classes() -> dict[str, type]:
    """Top-level tables and their settings classes (imported lazily: optional subsystems)."""
    sections: dict[str, type] = {"input": InputSettings, "ensemble": EnsembleSettings,
                                 "detection": DetectionSettings}
    try:
        from .steering.settings import SteeringSettings
        sections["steering"] = SteeringSettings
    except ImportError:  # pragma: no cover - subsystem not present in this build
        pass
    try:
        from .assess.settings import AssessmentSettings
        sections["assessment"] = AssessmentSettings
    except ImportError:  # pragma: no cover
        pass
    return sections


@dataclass(frozen=True)
class Config:
    """The whole configuration: one settings object per table, and the per-clock tables."""

    sections: Mapping[str, Any]
    clocks: Mapping[str, ClockSettings] = field(default_factory=dict)
    source: str = ""

    def __getattr__(self, name: str) -> Any:
        sections = object.__getattribute__(self, "sections")
        if name in sections:
            return sections[name]
        raise AttributeError(name)

    def clock(self, name: str) -> ClockSettings:
        """Settings of clock ``name`` (defaults if the configuration does not mention it)."""
        return self.clocks.get(name, ClockSettings())

    def to_toml(self) -> str:
        """The effective configuration as TOML text (defaults filled in, NaN keys omitted)."""
        import tomli_w

        doc: dict[str, Any] = {}
        for name, obj in self.sections.items():
            doc[name] = _drop_nan(section_to_dict(obj))
        if self.clocks:
            doc["clocks"] = {k: _drop_nan(section_to_dict(v)) for k, v in self.clocks.items()}
        return tomli_w.dumps(doc)


def _drop_nan(d: dict) -> dict:
    return {k: v for k, v in d.items() if not (isinstance(v, float) and math.isnan(v))}


def default_config() -> Config:
    """Every section at its defaults."""
    return Config({name: cls() for name, cls in _section_classes().items()})


def parse_config(table: Mapping[str, Any], source: str = "") -> Config:
    """Validate a parsed TOML document (a mapping) and build the configuration."""
    classes = _section_classes()
    known = list(classes) + ["clocks"]
    path = source or None
    for key in table:
        if key not in known:
            raise ConfigError(f"unknown table; known tables: {', '.join(known)}", key=key,
                              path=path)
    sections = {}
    for name, cls in classes.items():
        if name == "steering":
            from .steering.settings import steering_settings_from_table
            sections[name] = steering_settings_from_table(table.get(name), path=path)
        else:
            sections[name] = build_section(cls, table.get(name), name, path)
    clocks_table = table.get("clocks", {})
    if not isinstance(clocks_table, Mapping):
        raise ConfigError("expected tables [clocks.NAME]", key="clocks", path=path)
    clocks = {}
    for name, sub in clocks_table.items():
        if not _ID.match(name):
            raise ConfigError("clock identifiers have 1 to 32 characters from A-Z a-z 0-9 _ . -",
                              key=f"clocks.{name}", path=path)
        if not isinstance(sub, Mapping):
            raise ConfigError("expected a table of settings", key=f"clocks.{name}", path=path)
        clocks[name] = build_section(ClockSettings, sub, f"clocks.{name}", path)
    return Config(sections, clocks, source)


def load_config(path: str | pathlib.Path | None) -> Config:
    """Read and validate a TOML configuration file (None: all defaults).

    Raises
    ------
    ConfigError
        Unreadable file, invalid TOML (with the line), unknown or invalid keys.
    """
    if path is None:
        return default_config()
    p = pathlib.Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ConfigError(f"cannot read the configuration: {exc.strerror}", path=str(p)) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ConfigError("the configuration is not UTF-8 text", path=str(p)) from None
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", path=str(p)) from None
    return parse_config(table, str(p))


def replace_section(config: Config, name: str, **changes) -> Config:
    """A copy of ``config`` with some keys of one section changed (for the Python API)."""
    sections = dict(config.sections)
    sections[name] = dataclasses.replace(sections[name], **changes)
    return Config(sections, dict(config.clocks), config.source)


def documented_defaults() -> str:
    """The default configuration as TOML text, every key with its unit, allowed values and
    meaning in a comment (``ensemble config`` prints it; configs/default.toml is this text)."""
    from .settings import describe_section

    import tomli_w

    lines = ["# ensemble: the default configuration, every key at its default value.",
             "# Copy what you want to change; unknown keys are errors.  Units as written.", ""]
    for name, cls in _section_classes().items():
        lines.append(f"[{name}]")
        doc = (cls.__doc__ or "").strip().splitlines()[0]
        doc = re.sub(r":\w+:`([^`]*)`", r"\1", doc).replace("``", "")
        lines.insert(len(lines) - 1, f"# {doc}")
        for key, default, unit, allowed, text in describe_section(cls):
            if isinstance(default, float) and math.isnan(default):
                continue
            lines.append(f"# {text} [{unit or '-'}; {allowed}]")
            value = tomli_w.dumps({key: list(default) if isinstance(default, tuple)
                                   else default}).strip()
            lines.append(value)
        lines.append("")
    lines.append("# Per-clock tables (one per clock; all keys optional; noise levels absent = "
                 "estimated from the data):")
    lines.append("# [clocks.H1]")
    for key, default, unit, allowed, text in describe_section(ClockSettings):
        shown = "(estimated)" if isinstance(default, float) and math.isnan(default) else \
            tomli_w.dumps({key: default}).strip()
        lines.append(f"# {key}: {text} [{unit or '-'}; {allowed}]; default {shown}")
    lines.append("")
    return "\n".join(lines)
