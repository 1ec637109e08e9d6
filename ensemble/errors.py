"""Exceptions of the package: every user-facing failure is an :class:`EnsembleError`.

The command line turns :class:`InputError` and :class:`ConfigError` into exit status 2 with the
one-line message; anything else is an internal error (exit 1).  The exceptions carry their data
as attributes, so callers can recover from the fields instead of parsing the text.
"""

from __future__ import annotations


class EnsembleError(Exception):
    """Base class of the package's own errors."""


class InputError(EnsembleError, ValueError):
    """Bad input data: the message names the file, the row, the column and what was expected.

    Parameters
    ----------
    message : str
        What is wrong and, where possible, how to fix it (one line, no trailing period needed).
    path : str, optional
        The file the problem was found in.
    row : int, optional
        1-based line number in the file (the header is line 1).
    column : str, optional
        Column name (or field) holding the bad value.
    value : object, optional
        The offending value as read.
    """

    def __init__(self, message: str, *, path: str | None = None, row: int | None = None,
                 column: str | None = None, value: object = None):
        self.reason = message
        self.path = None if path is None else str(path)
        self.row = row
        self.column = column
        self.value = value
        super().__init__(self._format())

    def _format(self) -> str:
        place = ""
        if self.path is not None:
            place = self.path
            if self.row is not None:
                place += f":{self.row}"
            place += ": "
        elif self.row is not None:
            place = f"row {self.row}: "
        col = f"column '{self.column}': " if self.column is not None else ""
        return " ".join(f"{place}{col}{self.reason}".split())


class ConfigError(EnsembleError, ValueError):
    """Bad configuration: names the key, the value, its unit and the allowed values.

    Parameters
    ----------
    message : str
        What is wrong.
    key : str, optional
        Dotted TOML key, e.g. ``"weights.cap_factor"``.
    value : object, optional
        The value found.
    unit : str, optional
        Unit of the key's value.
    allowed : str, optional
        Allowed values or range, in words.
    path : str, optional
        The configuration file.
    """

    def __init__(self, message: str, *, key: str | None = None, value: object = None,
                 unit: str | None = None, allowed: str | None = None, path: str | None = None):
        self.reason = message
        self.key = key
        self.value = value
        self.unit = unit
        self.allowed = allowed
        self.path = None if path is None else str(path)
        parts = []
        if self.path:
            parts.append(f"{self.path}:")
        if key:
            parts.append(f"key '{key}':")
        parts.append(message)
        if allowed:
            parts.append(f"(allowed: {allowed}{' ' + unit if unit else ''})")
        super().__init__(" ".join(" ".join(parts).split()))
