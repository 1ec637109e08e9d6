"""CSV text checks (internal): bytes -> UTF-8 text, header, one record per line, field counts.

Everything here works on the whole file at once with numpy byte arithmetic, so that a file of a
million lines is checked in a few tens of milliseconds, and every problem is reported with the
1-based line number of the file (the header is line 1).
"""

from __future__ import annotations

import csv
import hashlib
import os
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

#: What a header looks like, shown when there is none.
HEADER_HINT = "mjd,clock,reference,phase (long form) or mjd,<clock>,<clock>,... (wide form)"

_KEYWORDS = ("mjd", "time", "clock", "reference", "phase")
_MAGIC = (
    (b"\x1f\x8b", "a gzip-compressed file; decompress it first"),
    (b"PK\x03\x04", "a zip archive (or a spreadsheet); export the sheet as UTF-8 CSV"),
    (b"\x89HDF\r\n\x1a\n", "an HDF5 file (an archive?); expected the measurement CSV"),
    (b"%PDF", "a PDF document"),
)


def read_source(path: str | os.PathLike) -> bytes:
    """All bytes of ``path``; an unreadable path is an :class:`InputError`."""
    try:
        with open(path, "rb") as fh:
            return fh.read()
    except IsADirectoryError:
        raise InputError("is a folder; expected a measurement CSV file", path=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror or exc}", path=str(path)) from None


def sha256_hex(data: bytes) -> str:
    """SHA-256 of ``data`` as 64 hex digits."""
    return hashlib.sha256(data).hexdigest()


def _line_of(data: bytes, pos: int) -> int:
    return data.count(b"\n", 0, pos) + 1


def _column_of(data: bytes, pos: int) -> str | None:
    """Header name of the field holding byte ``pos`` (None in the header or past the last)."""
    start = data.rfind(b"\n", 0, pos) + 1
    if start == 0:
        return None
    try:
        header = data[: data.find(b"\n")].decode("utf-8").lstrip("\ufeff").split(",")
    except UnicodeDecodeError:
        return None
    idx = data.count(b",", start, pos)
    name = header[idx].strip() if idx < len(header) else ""
    return name if name.isprintable() and 0 < len(name) <= 40 else None


def decode(data: bytes, path: str) -> bytes:
    """Check that ``data`` is UTF-8 text; return it without BOM and with ``\\n`` line ends.

    Raises
    ------
    InputError
        Empty file, UTF-16/32 text, a known binary format, NUL or other control bytes, or a
        byte sequence that is not UTF-8 (naming the line and column).
    """
    if not data.strip(b" \t\r\n"):
        raise InputError(f"file is empty; expected a header line such as {HEADER_HINT}", path=path)
    for bom, name in ((b"\xff\xfe\x00\x00", "UTF-32"), (b"\x00\x00\xfe\xff", "UTF-32"),
                      (b"\xff\xfe", "UTF-16"), (b"\xfe\xff", "UTF-16")):
        if data.startswith(bom):
            raise InputError(f"file is not UTF-8 text: it starts with a {name} byte-order mark; "
                             f"save it as UTF-8 CSV", path=path, row=1)
    for magic, what in _MAGIC:
        if data.startswith(magic):
            raise InputError(f"file is not UTF-8 text: it looks like {what}", path=path, row=1)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    nul = data.find(b"\x00")
    if nul >= 0:
        head = np.frombuffer(data[:4096], dtype=np.uint8)
        zeros_odd, zeros_even = np.mean(head[1::2] == 0), np.mean(head[0::2] == 0)
        what = ("it looks like UTF-16 (every other byte is 0); save it as UTF-8 CSV"
                if max(zeros_odd, zeros_even) > 0.4 and min(zeros_odd, zeros_even) < 0.1
                else "it contains NUL bytes (a binary file?)")
        raise InputError(f"file is not UTF-8 text: {what}", path=path, row=_line_of(data, nul),
                         column=_column_of(data, nul))
    try:
        data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"file is not UTF-8 text: byte 0x{data[exc.start]:02x} cannot be decoded "
                         f"(Latin-1 or another code page?); save the file as UTF-8", path=path,
                         row=_line_of(data, exc.start),
                         column=_column_of(data, exc.start)) from None
    arr = np.frombuffer(data, dtype=np.uint8)
    control = ((arr < 32) & (arr != 9) & (arr != 10) & (arr != 13)) | (arr == 127)
    if control.any():
        pos = int(np.argmax(control))
        raise InputError(f"file is not UTF-8 text: control byte 0x{data[pos]:02x} (binary data?)",
                         path=path, row=_line_of(data, pos), column=_column_of(data, pos))
    odd = _unusual_break(data, arr)
    if odd >= 0:
        raise InputError("file is not plain text: it holds a Unicode line separator or C1 control "
                         "character", path=path, row=_line_of(data, odd),
                         column=_column_of(data, odd))
    if b"\r" in data:
        data = data.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
    return data


def _unusual_break(data: bytes, arr: np.ndarray) -> int:
    """Position of the first U+0080..U+009F, U+2028 or U+2029 in UTF-8 ``data``, or -1.

    These break lines in some programs and not in others, so line numbers would disagree.
    """
    found = [data.find(b"\xe2\x80\xa8"), data.find(b"\xe2\x80\xa9")]
    lead = np.flatnonzero(arr[:-1] == 0xC2)
    c1 = lead[(arr[lead + 1] >= 0x80) & (arr[lead + 1] <= 0x9F)]
    if c1.size:
        found.append(int(c1[0]))
    found = [f for f in found if f >= 0]
    return min(found) if found else -1


@dataclass(frozen=True)
class Table:
    """The layout of a checked CSV text (internal).

    Attributes
    ----------
    names : list of str
        Header fields, stripped of blanks (and of quotes).
    line_no : ndarray of int64, shape (n_rows,)
        1-based file line number of each non-blank data line, in file order.
    body : str
        The text after the header line (what the CSV parser reads).
    quoted : bool
        True when the text contains double quotes.
    """

    names: list
    line_no: np.ndarray
    body: str
    quoted: bool


def split(data: bytes, path: str) -> Table:
    """Header, data lines and field counts of checked UTF-8 bytes (from :func:`decode`).

    Raises
    ------
    InputError
        Empty first line, unnamed or duplicated columns, header only, a line whose number of
        fields differs from the header's, or quotes that span lines.
    """
    arr = np.frombuffer(data, dtype=np.uint8)
    nl = np.flatnonzero(arr == 10)
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [arr.size]))
    if ends[-1] == starts[-1]:                             # the file ends with a newline
        starts, ends = starts[:-1], ends[:-1]
    blank = _blank_lines(data, arr, starts, ends)
    header_line = data[: ends[0]].decode("utf-8")
    if blank[0]:
        raise InputError(f"line 1 is empty; the first line must be the header, e.g. {HEADER_HINT}",
                         path=path, row=1)
    quoted = b'"' in data
    names = next(csv.reader([header_line])) if quoted else header_line.split(",")
    names = [n.strip() for n in names]
    seen: dict[str, int] = {}
    for i, name in enumerate(names):
        if not name:
            raise InputError(f"column {i + 1} of the header has no name (a stray comma?); "
                             f"expected {HEADER_HINT}", path=path, row=1)
        key = name.lower() if name.lower() in _KEYWORDS else name
        if key in seen:
            raise InputError(f"column name appears twice (columns {seen[key] + 1} and {i + 1}); "
                             f"every column needs its own name", path=path, row=1, column=name)
        seen[key] = i
    line_no = np.flatnonzero(~blank[1:]) + 2
    if line_no.size == 0:
        raise InputError(f"header only: no measurement rows after line 1 ({header_line.strip()})",
                         path=path, row=1)
    n = len(names)
    if quoted:
        counts = _quoted_field_counts(data, starts, ends, path)
    else:
        counts = _per_line(arr == 44, nl, starts.size) + 1
    wrong = ~blank & (counts != n)
    wrong[0] = False
    if wrong.any():
        i = int(np.argmax(wrong))
        raise InputError(f"line has {counts[i]} fields, expected {n} like the header "
                         f"({','.join(names)})", path=path, row=i + 1)
    body = data[ends[0] + 1:].decode("utf-8")
    return Table(names, line_no, body, quoted)


def _per_line(mask: np.ndarray, newlines: np.ndarray, n_lines: int) -> np.ndarray:
    """Number of True bytes of ``mask`` on each line (``newlines``: positions of the LFs)."""
    line = np.searchsorted(newlines, np.flatnonzero(mask))   # LFs before each byte
    return np.bincount(line, minlength=n_lines)[:n_lines]


def _blank_lines(data: bytes, arr: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """True for lines that are empty or hold only spaces and tabs (the CSV parser skips them)."""
    empty = ends == starts
    first = arr[np.minimum(starts, arr.size - 1)]
    maybe = np.flatnonzero(~empty & ((first == 32) | (first == 9)))
    blank = empty.copy()
    if maybe.size > 1000:                   # many indented lines: count text bytes per line
        nl = np.flatnonzero(arr == 10)
        text = (arr != 32) & (arr != 9) & (arr != 10)
        blank |= _per_line(text, nl, starts.size) == 0
    else:
        for i in maybe:
            blank[i] = not data[starts[i]:ends[i]].strip(b" \t")
    return blank


def _quoted_field_counts(data: bytes, starts, ends, path: str) -> np.ndarray:
    """Fields per line when quotes are present (the csv module; quotes must not span lines)."""
    lines = data.decode("utf-8").split("\n")[: starts.size]
    counts = np.zeros(starts.size, dtype=np.int64)
    for i, line in enumerate(lines):
        if line.count('"') % 2:
            raise InputError("unbalanced double quote (a quoted field must end on its own line)",
                             path=path, row=i + 1)
        counts[i] = len(next(csv.reader([line]))) if line.strip() else 0
    return counts
