"""Measurement CSV readers: long and wide form -> :class:`~ensemble.io.measurements.Measurements`.

Long form (docs/input.md): a header naming ``clock``, ``reference``, ``phase`` and one of
``mjd`` / ``time``, in any order; one row per (epoch, clock).  Wide form: ``mjd`` or ``time``
first, then one column per clock; the reference is named by the caller (``--reference``) and
its own column is absent or zero.  ``phase`` is clock - reference in seconds.

Every problem is one :class:`~ensemble.errors.InputError` naming the file, the 1-based line
(header = line 1), the column and what was expected; when several rows are bad, the first one
in the file is reported.  The happy path is vectorised (pandas' C parser, numpy masks), so a
long-form file of 100 clocks x 8760 hourly epochs reads in well under a second
(``benchmarks/bench_intake.py``).
"""

from __future__ import annotations

import io
import logging
import os
import re

import numpy as np

from ..errors import InputError
from . import timetags
from .sampling import fit_grid, place_on_grid
from .csvtext import Table, decode, read_source, sha256_hex, split
from .measurements import Measurements
from .summary import summarize

__all__ = ["read_measurements", "parse_measurements", "summarize", "CLOCK_ID_RULE",
           "MAX_ABS_PHASE_S", "LONG_GAP_S"]

#: Clock identifiers: 1 to 32 characters from A-Z a-z 0-9 _ . - (docs/input.md).
CLOCK_ID_RULE = "1 to 32 characters from A-Z a-z 0-9 _ . -"
_CLOCK_ID = re.compile(r"[A-Za-z0-9_.\-]{1,32}")
#: Largest accepted |clock - reference|: more is almost surely a unit error [s].
MAX_ABS_PHASE_S = 1.0

log = logging.getLogger(__name__)

_LONG_KEYS = ("clock", "reference", "phase")
_TIME_KEYS = ("mjd", "time")


# --------------------------------------------------------------------------- entry points
def read_measurements(path: str | os.PathLike, reference: str | None = None, *,
                      continues: tuple[float, float] | None = None) -> Measurements:
    """Read and validate a measurement CSV file (long or wide form).

    Parameters
    ----------
    path : path-like
        The CSV file.  Messages name it as given.
    reference : str, optional
        Reference clock of a wide-form file (required there).  For a long-form file it is
        optional and, if given, every row's ``reference`` must equal it.
    continues : (anchor_mjd, tau0_s), optional
        The file continues an archive whose last epoch is ``anchor_mjd`` on a ``tau0_s`` grid:
        the epochs must lie on that grid after the anchor (a single epoch is then enough), and
        ``elapsed_s`` counts from the anchor (so the first epoch has elapsed_s = k tau0 > 0).

    Returns
    -------
    Measurements
        Epochs sorted by time; ``phase_s`` [s] is clock - reference, NaN where missing, 0 in the
        column of each epoch's reference; ``sha256`` is that of the file's bytes.

    Raises
    ------
    InputError
        On any bad input, with file, row, column and what was expected.
    """
    return _parse_bytes(read_source(path), os.fspath(path), reference, continues)


def parse_measurements(text_or_fileobj, source: str, reference: str | None = None, *,
                       continues: tuple[float, float] | None = None) -> Measurements:
    """Parse measurement CSV given as text, bytes or an open file (text or binary).

    Parameters
    ----------
    text_or_fileobj : str, bytes or file object
        The CSV content.  Text is hashed as its UTF-8 encoding.
    source : str
        Name used in messages and stored as ``Measurements.source``.
    reference, continues : optional
        As for :func:`read_measurements`.
    """
    content = text_or_fileobj.read() if hasattr(text_or_fileobj, "read") else text_or_fileobj
    if isinstance(content, str):
        try:
            content = content.encode("utf-8")
        except UnicodeEncodeError as exc:
            raise InputError(f"text is not valid Unicode at character {exc.start}",
                             path=source) from None
    if not isinstance(content, (bytes, bytearray, memoryview)):
        raise TypeError(f"expected str, bytes or a file object, got {type(content).__name__}")
    return _parse_bytes(bytes(content), source, reference, continues)


def _parse_bytes(data: bytes, path: str, reference: str | None,
                 continues: tuple[float, float] | None = None) -> Measurements:
    sha = sha256_hex(data)
    table = split(decode(data, path), path)
    keys = [n.lower() for n in table.names]
    if reference is not None and not _CLOCK_ID.fullmatch(reference):
        raise InputError(f"--reference {reference!r} is not a clock identifier ({CLOCK_ID_RULE})",
                         path=path)
    if any(k in _LONG_KEYS for k in keys):
        meas, grid = _parse_long(table, keys, path, reference, sha, continues)
    else:
        meas, grid = _parse_wide(table, keys, path, reference, sha, continues)
    # warnings only once the whole file is good, so a bad file gives exactly one line
    if grid.spacing == "smallest":
        log.warning("%s: warning: the most common spacing of the epochs fits no grid; the "
                    "smallest one, %g s, is taken as the sampling interval", path, grid.tau0_s)
    _warn_long_gap(meas, path)
    timetags.warn_if_beyond_table(float(meas.mjd[-1]), path)
    return meas


#: A gap between consecutive epochs longer than this is reported (a mistyped year?) [s].
LONG_GAP_S = 30 * 86400.0


def _warn_long_gap(meas: Measurements, path: str) -> None:
    gaps = np.diff(meas.elapsed_s)
    if gaps.size and gaps.max() > LONG_GAP_S:
        i = int(np.argmax(gaps))
        log.warning("%s: warning: no epochs for %.4g days between %s and %s; check the tags",
                    path, gaps[i] / 86400.0, timetags.format_iso_utc(meas.mjd[i]),
                    timetags.format_iso_utc(meas.mjd[i + 1]))


# --------------------------------------------------------------------------- helpers
def _grid(day, sod, tags, path, rows, texts, column, continues):
    """The sampling grid: found from the epochs, or the archive's when the file continues one."""
    if continues is None:
        return fit_grid(day, sod, tags.resolution_s, exact_tags=tags.exact, path=path,
                        rows=rows, texts=texts, column=column)
    anchor_mjd, tau0_s = continues
    return place_on_grid(day, sod, tags.resolution_s, tau0_s=tau0_s, anchor_mjd=anchor_mjd,
                         exact_tags=tags.exact, path=path, rows=rows, texts=texts, column=column)


class _Problems:
    """Collects cell-level problems and raises the one on the earliest line (then leftmost)."""

    def __init__(self, path: str):
        self.path = path
        self.best: tuple[int, int, InputError] | None = None

    def add(self, row: int, position: int, message: str, column: str | None,
            value: object = None) -> None:
        if self.best is None or (row, position) < self.best[:2]:
            self.best = (row, position, InputError(message, path=self.path, row=row,
                                                   column=column, value=value))

    def add_error(self, exc: InputError, position: int = 0) -> None:
        row = exc.row if exc.row is not None else 0
        if self.best is None or (row, position) < self.best[:2]:
            self.best = (row, position, exc)

    def raise_first(self) -> None:
        if self.best is not None:
            raise self.best[2]


def _frame(table: Table, text_cols: list[int], path: str):
    """Parse the body with pandas: text columns as str, the others as float64.

    Returns (frame, floats) where ``floats`` maps a float column position to a tuple
    (values, bad_index, reason) -- bad_index is the first row whose text is no number (or
    non-finite), -1 if none.  Empty (or blank) cells are NaN.
    """
    import pandas as pd

    n = len(table.names)
    float_cols = [i for i in range(n) if i not in text_cols]
    common = dict(header=None, names=list(range(n)), keep_default_na=False,
                  skip_blank_lines=True, skipinitialspace=False, engine="c")
    try:
        frame = pd.read_csv(io.StringIO(table.body), na_values={i: [""] for i in float_cols},
                            dtype={i: (str if i in text_cols else np.float64) for i in range(n)},
                            **common)
        floats = {i: _checked(frame[i].to_numpy(dtype=np.float64)) for i in float_cols}
    except ValueError:
        frame = pd.read_csv(io.StringIO(table.body), dtype=str, **common)
        floats = {i: _slow_floats(frame[i]) for i in float_cols}
    if len(frame) != table.line_no.size:
        raise InputError("the CSV structure could not be read line by line (a quoted field "
                         "spanning lines?); write one record per line", path=path)
    return frame, floats


def _checked(values: np.ndarray) -> tuple:
    """(values, first non-finite index or -1, reason) for parsed floats (NaN = empty)."""
    nonfinite = np.isinf(values)
    if nonfinite.any():
        i = int(np.argmax(nonfinite))
        return values, i, (f"{float(values[i])!r} is not a finite number; write seconds, or leave "
                            f"the cell empty for a missing value")
    return values, -1, ""


def _slow_floats(series) -> tuple:
    """Strings -> float64 with the first bad cell located (only when the fast parse failed)."""
    import pandas as pd

    text = series.astype(str).str.strip()
    empty = (text == "").to_numpy()
    values = pd.to_numeric(text.where(~empty, "nan"), errors="coerce").to_numpy(dtype=np.float64)
    lowered = text.str.lower().str.lstrip("+-")
    nan_text = lowered.isin(["nan", "inf", "infinity"]).to_numpy()
    unparsed = ~empty & np.isnan(values) & ~nan_text
    nonfinite = ~empty & ~unparsed & ~np.isfinite(values)
    values = np.where(empty, np.nan, values)
    bad = unparsed | nonfinite
    if not bad.any():
        return values, -1, ""
    i = int(np.argmax(bad))
    shown = timetags._show(text.iat[i])
    if nonfinite[i]:
        return values, i, (f"{shown} is not a finite number; leave the cell empty for a missing "
                           f"value")
    return values, i, (f"{shown} is not a number; write seconds with a decimal point (e.g. "
                       f"1.5e-9), or leave the cell empty for a missing value")


def _first_rows(codes: np.ndarray, n_codes: int) -> np.ndarray:
    """Index of the first row holding each code 0 .. n_codes-1 (every code occurs)."""
    _, first = np.unique(codes, return_index=True)
    if first.size != n_codes:                                # not reached with factorize codes
        raise ValueError("codes must cover 0 .. n_codes-1")
    return first


def _check_ids(uniques: list[str], codes, line_no, problems: _Problems, position: int,
               column: str, what: str) -> None:
    bad = np.array([not _CLOCK_ID.fullmatch(u) for u in uniques], dtype=bool)
    if not bad.any():
        return
    first = _first_rows(codes, len(uniques))
    j = int(np.flatnonzero(bad)[np.argmin(first[bad])])
    name = uniques[j]
    msg = (f"empty; expected a {what}" if name == "" else
           f"{timetags._show(name)} is not a clock identifier ({CLOCK_ID_RULE})")
    problems.add(int(line_no[first[j]]), position, msg, column, name)


def _parse_tags(uniques: list[str], key: str):
    return (timetags.parse_mjd_texts if key == "mjd" else timetags.parse_iso_texts)(uniques)


def _epochs(tags, codes, line_no, uniques):
    """Merge tag texts with equal labels into epochs sorted by time.

    Returns (day, sod_s, label, first_line, text, epoch_of_row): per epoch its UTC day, seconds
    of day, MJD label, the line of its first row and that row's tag text; per row the epoch.
    """
    label, inv = np.unique(tags.mjd, return_inverse=True)
    first = _first_rows(codes, len(uniques))                 # increasing: factorize order
    pick = np.full(label.size, len(uniques), dtype=np.int64)
    np.minimum.at(pick, inv, np.arange(len(uniques)))        # earliest text of each epoch
    return (tags.day[pick], tags.sod_s[pick], label, line_no[first[pick]],
            [uniques[j] for j in pick], inv[codes])


def _measure(path, sha, clocks, label, grid, phase, ref_idx):
    """(Measurements, grid); the reference's own column set to 0."""
    phase = np.ascontiguousarray(phase, dtype=np.float64)
    phase[np.arange(label.size), ref_idx] = 0.0
    meas = Measurements(tuple(clocks), np.asarray(label, dtype=np.float64), grid.elapsed_s,
                        phase, np.asarray(ref_idx, dtype=np.int64), float(grid.tau0_s), path, sha)
    return meas, grid


def _check_values(values, bad, reason, line_no, problems, position, column) -> None:
    if bad >= 0:
        problems.add(int(line_no[bad]), position, reason, column)
    big = np.abs(values) > MAX_ABS_PHASE_S
    if big.any():
        i = int(np.argmax(big))
        problems.add(int(line_no[i]), position,
                     f"|phase| = {abs(values[i]):.6g} s exceeds {MAX_ABS_PHASE_S:g} s: almost "
                     f"surely a unit error: phase is in seconds (1 ns = 1e-9)", column,
                     float(values[i]))


def _tag_problems(tags, codes, line_no, problems, position, column) -> None:
    if not tags.error:
        return
    first = _first_rows(codes, len(tags.day))
    j, reason = min(tags.error, key=lambda e: first[e[0]])
    problems.add(int(line_no[first[j]]), position, reason, column)


# --------------------------------------------------------------------------- long form
def _parse_long(table: Table, keys: list[str], path: str, reference: str | None, sha: str,
                continues=None):
    import pandas as pd

    names = table.names
    time_keys = [k for k in keys if k in _TIME_KEYS]
    if len(time_keys) == 2:
        raise InputError("the header has both 'mjd' and 'time'; keep one epoch column",
                         path=path, row=1)
    for k in ("mjd",) + _LONG_KEYS:
        if k == "mjd" and time_keys:
            continue
        if k not in keys:
            need = "'mjd' or 'time'" if k == "mjd" else f"'{k}'"
            raise InputError(f"missing column {need}; a long-form header names mjd (or time), "
                             f"clock, reference and phase", path=path, row=1)
    for i, k in enumerate(keys):
        if k not in _TIME_KEYS + _LONG_KEYS:
            raise InputError(f"unknown column; the long form has exactly the columns "
                             f"mjd (or time), clock, reference, phase", path=path, row=1,
                             column=names[i])
    pos = {k: keys.index(k) for k in keys}
    tkey = time_keys[0]
    tcol, ccol, rcol, pcol = pos[tkey], pos["clock"], pos["reference"], pos["phase"]
    frame, floats = _frame(table, [tcol, ccol, rcol], path)
    line_no = table.line_no
    problems = _Problems(path)

    tcodes, tuniq = pd.factorize(frame[tcol].to_numpy(dtype=object))
    tuniq = [str(u).strip() for u in tuniq]
    tags = _parse_tags(tuniq, tkey)
    _tag_problems(tags, tcodes, line_no, problems, tcol, names[tcol])

    ccodes, cuniq = pd.factorize(frame[ccol].to_numpy(dtype=object))
    rcodes, runiq = pd.factorize(frame[rcol].to_numpy(dtype=object))
    cuniq = [str(u).strip() for u in cuniq]
    runiq = [str(u).strip() for u in runiq]
    _check_ids(cuniq, ccodes, line_no, problems, ccol, names[ccol], "clock identifier")
    _check_ids(runiq, rcodes, line_no, problems, rcol, names[rcol], "reference clock identifier")
    if reference is not None:
        other = np.array([u != reference for u in runiq], dtype=bool)
        if other.any():
            first = _first_rows(rcodes, len(runiq))
            j = int(np.flatnonzero(other)[np.argmin(first[other])])
            problems.add(int(line_no[first[j]]), rcol,
                         f"reference {runiq[j]!r} differs from --reference {reference}; a "
                         f"long-form file names the reference in every row, so --reference "
                         f"is optional there", names[rcol], runiq[j])

    values, bad, reason = floats[pcol]
    _check_values(values, bad, reason, line_no, problems, pcol, names[pcol])
    clocks = sorted(set(cuniq) | set(runiq))
    index = {c: i for i, c in enumerate(clocks)}
    cidx = np.array([index[c] for c in cuniq], dtype=np.int64)[ccodes]
    ridx = np.array([index[c] for c in runiq], dtype=np.int64)[rcodes]
    self_bad = (cidx == ridx) & np.isfinite(values) & (values != 0)
    if self_bad.any():
        i = int(np.argmax(self_bad))
        problems.add(int(line_no[i]), pcol,
                     f"clock {clocks[cidx[i]]!r} is measured against itself with phase "
                     f"{float(values[i])!r}; a clock - itself is 0 (or leave the cell empty)",
                     names[pcol], float(values[i]))
    problems.raise_first()

    if len(clocks) < 2:
        raise InputError(f"only one clock ({clocks[0]!r}) in the file; an ensemble needs at least "
                         f"2 clocks", path=path, column=names[ccol])
    day, sod, label, ep_line, ep_text, epoch = _epochs(tags, tcodes, line_no, tuniq)
    problems = _Problems(path)
    try:
        grid = _grid(day, sod, tags, path, ep_line, ep_text, names[tcol], continues)
    except InputError as exc:
        problems.add_error(exc, tcol)
        grid = None
    n_clk = len(clocks)
    row_tag = np.asarray(tuniq, dtype=object)[tcodes]
    _duplicates(epoch * n_clk + cidx, line_no, problems, ccol, names[ccol], row_tag, clocks, cidx)
    ref_of_epoch = _one_reference(epoch, ridx, line_no, problems, rcol, names[rcol], clocks,
                                  label.size)
    problems.raise_first()

    phase = np.full((label.size, n_clk), np.nan)
    phase[epoch, cidx] = values
    return _measure(path, sha, clocks, label, grid, phase, ref_of_epoch)


def _duplicates(key, line_no, problems, position, column, row_tag, clocks, cidx) -> None:
    order = np.argsort(key, kind="stable")
    sk = key[order]
    dup = np.flatnonzero(sk[1:] == sk[:-1]) + 1             # later members of equal runs
    if dup.size == 0:
        return
    run_start = np.flatnonzero(np.concatenate(([True], sk[1:] != sk[:-1])))
    run_of = np.searchsorted(run_start, dup, side="right") - 1
    later = order[dup]
    k = int(np.argmin(later))
    i, j = int(later[k]), int(order[run_start[run_of[k]]])
    problems.add(int(line_no[i]), position,
                 f"clock {clocks[cidx[i]]!r} at epoch {row_tag[i]!r} appears twice (rows "
                 f"{int(line_no[j])} and {int(line_no[i])}); keep one row per epoch and clock",
                 column)


def _one_reference(epoch, ridx, line_no, problems, position, column, clocks, n_epochs):
    """The reference of each epoch; rows naming another reference at one epoch are errors."""
    order = np.argsort(epoch, kind="stable")
    starts = np.flatnonzero(np.concatenate(([True], epoch[order][1:] != epoch[order][:-1])))
    first_row = order[starts]                                 # earliest row of each epoch
    ref = np.empty(n_epochs, dtype=np.int64)
    ref[epoch[first_row]] = ridx[first_row]
    first_of = np.empty(n_epochs, dtype=np.int64)
    first_of[epoch[first_row]] = first_row
    other = ridx != ref[epoch]
    if other.any():
        i = int(np.argmax(other))
        j = int(first_of[epoch[i]])
        problems.add(int(line_no[i]), position,
                     f"reference {clocks[ridx[i]]!r} differs from {clocks[ref[epoch[i]]]!r} "
                     f"named at the same epoch in row {int(line_no[j])}; every row of one epoch "
                     f"names the same reference", column, clocks[ridx[i]])
    return ref


# --------------------------------------------------------------------------- wide form
def _parse_wide(table: Table, keys: list[str], path: str, reference: str | None, sha: str,
                continues=None):
    import pandas as pd

    names = table.names
    if keys[0] not in _TIME_KEYS:
        if re.fullmatch(r"[+-]?[\d.]+([eE][+-]?\d+)?", names[0]):
            raise InputError(f"line 1 looks like data ({names[0]!r}...), not a header; the first "
                             f"line must be the header, e.g. mjd,clock,reference,phase",
                             path=path, row=1)
        raise InputError(f"first column is {names[0]!r}; expected 'mjd' or 'time' first (wide "
                         f"form: mjd,<clock>,<clock>,...) or a long-form header "
                         f"mjd,clock,reference,phase", path=path, row=1, column=names[0])
    for i, name in enumerate(names[1:], start=1):
        if keys[i] in _TIME_KEYS:
            raise InputError("the header has two epoch columns ('mjd'/'time'); keep one",
                             path=path, row=1, column=name)
        if not _CLOCK_ID.fullmatch(name):
            raise InputError(f"{timetags._show(name)} is not a clock identifier "
                             f"({CLOCK_ID_RULE})", path=path, row=1, column=name)
    if reference is None:
        raise InputError(f"a wide-form file needs the reference clock named on the command line "
                         f"(--reference NAME): one of {', '.join(names[1:])} or another clock",
                         path=path)
    clocks = list(names[1:]) + ([] if reference in names[1:] else [reference])
    if len(clocks) < 2:
        raise InputError(f"only one clock ({clocks[0]!r}); an ensemble needs at least 2 clocks",
                         path=path, row=1)
    frame, floats = _frame(table, [0], path)
    line_no = table.line_no
    problems = _Problems(path)
    tcodes, tuniq = pd.factorize(frame[0].to_numpy(dtype=object))
    tuniq = [str(u).strip() for u in tuniq]
    tags = _parse_tags(tuniq, keys[0])
    _tag_problems(tags, tcodes, line_no, problems, 0, names[0])
    n_rows = line_no.size
    phase_rows = np.full((n_rows, len(clocks)), np.nan)
    for i in range(1, len(names)):
        values, bad, reason = floats[i]
        _check_values(values, bad, reason, line_no, problems, i, names[i])
        if names[i] == reference:
            nonzero = np.isfinite(values) & (values != 0)
            if nonzero.any():
                r = int(np.argmax(nonzero))
                problems.add(int(line_no[r]), i,
                             f"the reference's own column must be empty or 0 (every value is "
                             f"measured against {reference}); found {float(values[r])!r}", names[i],
                             float(values[r]))
        phase_rows[:, i - 1] = values
    problems.raise_first()

    day, sod, label, ep_line, ep_text, epoch = _epochs(tags, tcodes, line_no, tuniq)
    if label.size != n_rows:                                  # one epoch on two rows
        order = np.argsort(epoch, kind="stable")
        same = np.flatnonzero(epoch[order][1:] == epoch[order][:-1])
        later = order[same + 1]
        k = int(np.argmin(later))
        i, j = int(later[k]), int(order[same[k]])
        raise InputError(f"epoch {tuniq[tcodes[i]]!r} appears twice (rows {int(line_no[j])} and "
                         f"{int(line_no[i])}); keep one row per epoch", path=path,
                         row=int(line_no[i]), column=names[0])
    grid = _grid(day, sod, tags, path, ep_line, ep_text, names[0], continues)
    phase = np.empty_like(phase_rows)
    phase[epoch] = phase_rows
    ref_idx = np.full(label.size, clocks.index(reference), dtype=np.int64)
    return _measure(path, sha, clocks, label, grid, phase, ref_idx)
