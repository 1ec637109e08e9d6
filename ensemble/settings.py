"""Declarative settings: frozen dataclasses whose fields carry unit, meaning and allowed values.

Each subsystem declares its TOML section as a dataclass built with :func:`setting`; the loader
in :mod:`ensemble.config` validates a parsed TOML table against it with :func:`build_section`, so
every message names the dotted key, the value, the unit and the allowed values.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Mapping

from .errors import ConfigError


def setting(default: Any, *, unit: str = "", doc: str = "", choices: tuple | None = None,
            minimum: float | None = None, maximum: float | None = None,
            exclusive_minimum: bool = False) -> Any:
    """A dataclass field with its documentation and validation rules.

    Parameters
    ----------
    default : bool, int, float, str or tuple
        Default value; its type is the type the key must have (an int is accepted for a float).
    unit : str
        Unit of the value as written in TOML, e.g. ``"s"`` or ``"1"``.
    doc : str
        One line: what the key does.
    choices : tuple, optional
        Allowed values for a string key.
    minimum, maximum : float, optional
        Inclusive bounds (``exclusive_minimum=True`` makes the lower bound strict).
    """
    meta = {"unit": unit, "doc": doc, "choices": choices, "minimum": minimum,
            "maximum": maximum, "exclusive_minimum": exclusive_minimum}
    if isinstance(default, (list, tuple)):
        value = tuple(default)
        return dataclasses.field(default_factory=lambda: value, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def _allowed_text(meta: Mapping[str, Any], kind: type) -> str:
    if meta.get("choices"):
        return ", ".join(repr(c) for c in meta["choices"])
    lo, hi = meta.get("minimum"), meta.get("maximum")
    name = {bool: "true or false", int: "an integer", float: "a number", str: "a string",
            tuple: "a list"}.get(kind, kind.__name__)
    if lo is not None and hi is not None:
        op = "<" if meta.get("exclusive_minimum") else "<="
        return f"{name}, {lo} {op} value <= {hi}"
    if lo is not None:
        return f"{name} {'>' if meta.get('exclusive_minimum') else '>='} {lo}"
    if hi is not None:
        return f"{name} <= {hi}"
    return name


def _check_value(key: str, value: Any, default: Any, meta: Mapping[str, Any], path: str | None):
    kind = type(default)
    unit = meta.get("unit") or None
    if kind is tuple:
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"expected a list, got {value!r}", key=key, value=value,
                              allowed="a list", path=path)
        return tuple(value)
    ok = isinstance(value, kind) and not (kind is not bool and isinstance(value, bool))
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value, ok = float(value), True
    if not ok:
        raise ConfigError(f"expected {_allowed_text(meta, kind)}, got {value!r}", key=key,
                          value=value, unit=unit, allowed=_allowed_text(meta, kind), path=path)
    if kind is float and not math.isfinite(value):
        raise ConfigError(f"value must be finite, got {value!r}", key=key, value=value, unit=unit,
                          allowed=_allowed_text(meta, kind), path=path)
    if meta.get("choices") and value not in meta["choices"]:
        raise ConfigError(f"unknown value {value!r}", key=key, value=value,
                          allowed=_allowed_text(meta, kind), path=path)
    lo, hi = meta.get("minimum"), meta.get("maximum")
    if kind in (int, float):
        too_low = lo is not None and (value <= lo if meta.get("exclusive_minimum") else value < lo)
        if too_low or (hi is not None and value > hi):
            raise ConfigError(f"value {value!r} out of range", key=key, value=value, unit=unit,
                              allowed=_allowed_text(meta, kind), path=path)
    return value


def build_section(cls: type, table: Mapping[str, Any] | None, prefix: str,
                  path: str | None = None) -> Any:
    """Validate a TOML table against the settings dataclass ``cls`` and build it.

    Parameters
    ----------
    cls : dataclass type
        Fields declared with :func:`setting`.
    table : mapping or None
        Parsed TOML table (None: all defaults).
    prefix : str
        Dotted name of the table, used in messages (``"weights"``).
    path : str, optional
        Configuration file, for messages.

    Raises
    ------
    ConfigError
        Unknown key (the message lists the known ones), wrong type or out-of-range value.
    """
    table = {} if table is None else table
    if not isinstance(table, Mapping):
        raise ConfigError(f"expected a table [{prefix}], got {table!r}", key=prefix, path=path)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    values = {}
    for key, value in table.items():
        dotted = f"{prefix}.{key}" if prefix else key
        if key not in fields:
            raise ConfigError(f"unknown key; known keys in [{prefix}]: {', '.join(fields)}",
                              key=dotted, value=value, path=path)
        field = fields[key]
        default = field.default if field.default is not dataclasses.MISSING else field.default_factory()
        values[key] = _check_value(dotted, value, default, field.metadata, path)
    obj = cls(**values)
    validate = getattr(obj, "validate", None)
    if validate is not None:
        validate(prefix, path)
    return obj


def section_to_dict(obj: Any) -> dict:
    """Settings dataclass -> plain dict suitable for TOML output (tuples become lists)."""
    out = {}
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name)
        if dataclasses.is_dataclass(value):
            value = section_to_dict(value)
        elif isinstance(value, tuple):
            value = list(value)
        elif isinstance(value, dict):
            value = {k: section_to_dict(v) if dataclasses.is_dataclass(v) else v
                     for k, v in value.items()}
        if value is None:
            continue
        out[f.name] = value
    return out


def describe_section(cls: type) -> list[tuple[str, Any, str, str, str]]:
    """(key, default, unit, allowed, doc) for every field of a settings class (for docs)."""
    rows = []
    for f in dataclasses.fields(cls):
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        rows.append((f.name, default, f.metadata.get("unit", ""),
                     _allowed_text(f.metadata, type(default)), f.metadata.get("doc", "")))
    return rows
