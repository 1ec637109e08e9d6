"""Time tags (internal): MJD and ISO-8601 UTC parsing, the leap-second table, intervals.

Epoch tags are UTC labels.  Intervals between epochs come from the nominal sampling grid plus
the leap seconds in between, never from float differences of MJD (our own rule, explained in
docs/input.md under "Leap seconds" and "MJD labels"):

    elapsed_s = k * tau0_s + (TAI-UTC(t) - TAI-UTC(t0))

where k is the epoch's slot on the grid counted in UTC label seconds from the first epoch (the
grid itself is fitted in :mod:`ensemble.io.sampling`).  An hourly series on the UTC hour marks
therefore has a 3601 s interval across 2016-12-31 23:59:60, and a 1 s series that tags the
leap second itself (``23:59:60``) gets one extra slot.

UTC labels inside a leap second have no unique MJD: a tag ``23:59:60.f`` is given the label of
second 86399 + (1 + f) / 2 of its day (the day's last two seconds are compressed into one), so
labels stay strictly increasing and inside the right day.  Only ISO input can tag the leap
second; an MJD text is always read as seconds of an 86 400 s day.
"""

from __future__ import annotations

import datetime as _dt
import logging
import re
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

log = logging.getLogger(__name__)

#: Seconds in a UTC day without a leap second [s].
_DAY_S = 86400.0

# Leap-second table: (first UTC day on which the value holds, TAI - UTC from 00:00 UTC of that
# day [s]).  Provenance: the leap seconds announced in IERS Bulletin C (inserted after 23:59:59
# UTC on the last day of June or December), written down from memory, not copied from a file.
# Self-consistency checks (tests/test_timetags.py): TAI - UTC was set to exactly 10 s at
# 1972-01-01, every later step is +1 s, and the 27 steps give 37 s from 2017-01-01
# (MJD 57754), the present value (IERS Bulletin C; recalled from memory, like the table).
_LEAP_TABLE_DATES = (
    ("1972-01-01", 10), ("1972-07-01", 11), ("1973-01-01", 12), ("1974-01-01", 13),
    ("1975-01-01", 14), ("1976-01-01", 15), ("1977-01-01", 16), ("1978-01-01", 17),
    ("1979-01-01", 18), ("1980-01-01", 19), ("1981-07-01", 20), ("1982-07-01", 21),
    ("1983-07-01", 22), ("1985-07-01", 23), ("1988-01-01", 24), ("1990-01-01", 25),
    ("1991-01-01", 26), ("1992-07-01", 27), ("1993-07-01", 28), ("1994-07-01", 29),
    ("1996-01-01", 30), ("1997-07-01", 31), ("1999-01-01", 32), ("2006-01-01", 33),
    ("2009-01-01", 34), ("2012-07-01", 35), ("2015-07-01", 36), ("2017-01-01", 37),
)

#: The table is known to hold for tags before this date (00:00 UTC).  Reason: Bulletin C
#: announces each leap second about six months ahead and only the ends of June and December are
#: used in practice; the latest announcement recalled (from memory: no leap second at the end of
#: December 2025) leaves the end of June 2026 as the first unannounced insertion point.  Later
#: tags are read with a logged warning; update the table and this date from the next bulletin.
LEAP_TABLE_EXPIRES = "2026-07-01"

#: MJD 0 = 1858-11-17 (MJD = JD - 2 400 000.5).
_MJD_ORIGIN = _dt.date(1858, 11, 17)


def _date_to_mjd(iso_date: str) -> int:
    return (_dt.date.fromisoformat(iso_date) - _MJD_ORIGIN).days


#: Leap-second table as (MJD of the first day with the value, TAI - UTC [s]).
LEAP_SECONDS: tuple[tuple[int, int], ...] = tuple((_date_to_mjd(d), v)
                                                  for d, v in _LEAP_TABLE_DATES)
#: MJD of :data:`LEAP_TABLE_EXPIRES` [d].
LEAP_TABLE_EXPIRES_MJD: int = _date_to_mjd(LEAP_TABLE_EXPIRES)
#: Earliest supported tag, 1972-01-01 (UTC had non-SI rate offsets before) [MJD].
MJD_MIN: int = LEAP_SECONDS[0][0]
#: First unsupported day, 2100-01-01: later tags are taken as typing errors [MJD].
MJD_MAX: int = _date_to_mjd("2100-01-01")

_LEAP_DAYS = np.array([m for m, _ in LEAP_SECONDS], dtype=np.int64)
_LEAP_VALUES = np.array([v for _, v in LEAP_SECONDS], dtype=np.int64)

#: Float slack added to every grid tolerance: a float64 MJD near 60 000 has an ulp of 0.63 us,
#: 1.26 us above MJD 65 536, so text -> float -> seconds of day is exact to about 1 us [s].
FLOAT_SLACK_S = 2e-6

#: The two accepted ISO forms, shown in messages.
ISO_FORMS = "2026-03-01T12:00:00Z or 2026-03-01T12:00:00+00:00"


# --------------------------------------------------------------------------- leap seconds
def tai_minus_utc_s(day: np.ndarray | int) -> np.ndarray:
    """TAI - UTC in force during UTC day ``day`` (an integer MJD) [s].

    During a leap second (23:59:60 of the day before a step) the day's own value holds; the
    step applies from 00:00 UTC of the next day.  Days before 1972-01-01 are not covered
    (callers check :data:`MJD_MIN`).

    Parameters
    ----------
    day : int or ndarray of int
        UTC day, integer MJD. [d]

    Returns
    -------
    ndarray of int64
        TAI - UTC. [s]
    """
    idx = np.searchsorted(_LEAP_DAYS, np.asarray(day, dtype=np.int64), side="right") - 1
    return _LEAP_VALUES[np.clip(idx, 0, None)]


def has_leap_second(day: np.ndarray | int) -> np.ndarray:
    """True where UTC day ``day`` (integer MJD) ends with a positive leap second (86 401 s)."""
    day = np.asarray(day, dtype=np.int64)
    return np.isin(day + 1, _LEAP_DAYS[1:])


def warn_if_beyond_table(last_mjd: float, source: str = "") -> bool:
    """Log a warning when a tag lies at or after :data:`LEAP_TABLE_EXPIRES`; True if so."""
    if last_mjd >= LEAP_TABLE_EXPIRES_MJD:
        where = f"{source}: " if source else ""
        log.warning("%swarning: epochs reach %s, beyond the leap-second table (valid before %s); "
                    "an unannounced leap second would make an interval 1 s short",
                    where, format_iso_utc(last_mjd), LEAP_TABLE_EXPIRES)
        return True
    return False


# --------------------------------------------------------------------------- calendar
def mjd_from_calendar(year, month, day) -> np.ndarray:
    """MJD of 00:00 on the given Gregorian date(s) (integer arrays in, int64 MJD out) [d].

    Days-from-civil algorithm on a calendar whose year starts on 1 March (so the leap day is the
    last day of the year); MJD 0 is 1858-11-17.
    """
    y = np.asarray(year, dtype=np.int64)
    m = np.asarray(month, dtype=np.int64)
    d = np.asarray(day, dtype=np.int64)
    y = y - (m <= 2)
    era = np.floor_divide(y, 400)
    yoe = y - era * 400
    mp = (m + 9) % 12                                # March = 0 ... February = 11
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    days_since_1970 = era * 146097 + doe - 719468
    return days_since_1970 + 40587                   # MJD 40587 = 1970-01-01


def _days_in_month(year: np.ndarray, month: np.ndarray) -> np.ndarray:
    leap = ((year % 4 == 0) & (year % 100 != 0)) | (year % 400 == 0)
    table = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])
    return table[np.clip(month, 1, 12) - 1] + ((month == 2) & leap)


def format_iso_utc(mjd: float, digits: int = 0) -> str:
    """ISO-8601 UTC text of an MJD label (seconds of an 86 400 s day; for display)."""
    day = int(np.floor(mjd))
    sod = round((mjd - day) * _DAY_S, digits)
    if sod >= _DAY_S:
        day, sod = day + 1, sod - _DAY_S
    date = _MJD_ORIGIN + _dt.timedelta(days=day)
    hh, rem = divmod(sod, 3600.0)
    mm, ss = divmod(rem, 60.0)
    sec = f"{ss:0{3 + digits}.{digits}f}" if digits else f"{int(round(ss)):02d}"
    return f"{date.isoformat()}T{int(hh):02d}:{int(mm):02d}:{sec}Z"


def label_mjd(day: np.ndarray, sod_s: np.ndarray) -> np.ndarray:
    """MJD label of UTC day ``day`` at ``sod_s`` seconds of that day [d].

    On a day ending with a leap second the last two seconds (86 399 <= sod < 86 401) are
    compressed into one, so the label of a tag in the leap second stays inside its day and
    labels stay strictly increasing.
    """
    day = np.asarray(day, dtype=np.int64)
    sod = np.asarray(sod_s, dtype=np.float64)
    squeeze = (sod >= _DAY_S - 1.0) & has_leap_second(day)
    sod = np.where(squeeze, _DAY_S - 1.0 + 0.5 * (sod - (_DAY_S - 1.0)), sod)
    return day + sod / _DAY_S


# --------------------------------------------------------------------------- parsing
_MJD_RE = r"\+?(\d+)(?:\.(\d*))?"
_ISO_RE = (r"(?P<y>\d{4})-(?P<mo>\d{2})-(?P<d>\d{2})T(?P<h>\d{2}):(?P<mi>\d{2}):(?P<s>\d{2})"
           r"(?:\.(?P<f>\d{1,9}))?(?P<z>Z|\+00:00)")
_ISO_NAIVE = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?")
_ISO_OFFSET = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?([+-]\d{2}:?\d{2})")


@dataclass(frozen=True)
class ParsedTags:
    """Parsed epoch tags (internal).

    Attributes
    ----------
    day : ndarray of int64, shape (n,)
        UTC day, integer MJD. [d]
    sod_s : ndarray of float64, shape (n,)
        Seconds of that UTC day, 86 400 <= sod < 86 401 inside a leap second. [s]
    error : list of (int, str)
        (index, reason) of tags that could not be parsed, in index order.
    resolution_s : float
        Finest step the tags are written with (one unit of the last decimal written). [s]
    exact : bool
        True for ISO times: a tag is the sampling instant to its last digit, so tau0 must be a
        whole number of steps.  False for MJD text, a decimal-day rounding of the instant.
    mjd : ndarray of float64, shape (n,)
        MJD labels: the value read for MJD text; :func:`label_mjd` of an ISO time. [d]
    """

    day: np.ndarray
    sod_s: np.ndarray
    error: list
    resolution_s: float
    exact: bool
    mjd: np.ndarray


def _check_range(day: np.ndarray, ok: np.ndarray, errors: dict, texts) -> None:
    for i in np.flatnonzero(ok & ((day < MJD_MIN) | (day >= MJD_MAX))):
        errors[int(i)] = (f"epoch {texts[i]!r} is outside the supported range 1972-01-01 "
                          f"(MJD {MJD_MIN}) to 2099-12-31 (UTC before 1972 had no whole-second "
                          f"leap steps)")


def parse_mjd_texts(texts) -> ParsedTags:
    """Parse decimal MJD texts (UTC), e.g. ``'60676.541667'``.

    Parameters
    ----------
    texts : sequence of str
        Stripped cell texts (typically the distinct values of a column).

    Returns
    -------
    ParsedTags
        ``resolution_s`` is 86 400 s x 10**-d for the most decimals d written in any tag.
    """
    import pandas as pd

    s = pd.Series(np.asarray(texts, dtype=object), dtype=object)
    parts = s.str.fullmatch(_MJD_RE).to_numpy(dtype=bool)
    values = pd.to_numeric(s.where(parts, None), errors="coerce").to_numpy(dtype=np.float64)
    ok = parts & np.isfinite(values)
    errors: dict[int, str] = {}
    for i in np.flatnonzero(~ok):
        t = texts[i]
        if t == "":
            errors[int(i)] = "empty; expected the epoch as decimal MJD (UTC), e.g. 60676.541667"
        elif t.lower().lstrip("+-") in ("nan", "inf", "infinity"):
            errors[int(i)] = f"{t!r} is not a finite epoch; expected decimal MJD (UTC)"
        else:
            errors[int(i)] = (f"{_show(t)} is not a decimal MJD; write e.g. 60676.541667 "
                              f"(UTC, days), or use a 'time' column with {ISO_FORMS}")
    values = np.where(ok, np.clip(values, -1.0, 1e6), 0.0)   # clipped: still out of range
    day = np.floor(values).astype(np.int64)
    sod = (values - day) * _DAY_S
    _check_range(day, ok, errors, texts)
    dot = s.str.find(".").to_numpy()
    lengths = s.str.len().to_numpy()
    decimals = np.where(ok & (dot >= 0), lengths - dot - 1, 0)
    dmax = int(decimals.max()) if decimals.size else 0
    return ParsedTags(day, sod, sorted(errors.items()), _DAY_S * 10.0 ** -min(dmax, 15), False,
                      values)


def parse_iso_texts(texts) -> ParsedTags:
    """Parse ISO-8601 UTC timestamps: ``2026-03-01T12:00:00Z`` or ``...+00:00``.

    Fractional seconds (up to 9 digits) are allowed; ``23:59:60`` is accepted at the end of a
    day with a positive leap second.  Naive times (no zone) and other offsets are refused.

    Parameters
    ----------
    texts : sequence of str
        Stripped cell texts.

    Returns
    -------
    ParsedTags
        ``resolution_s`` is 10**-d s for the most fractional digits d written (1 s if none).
    """
    import pandas as pd

    s = pd.Series(np.asarray(texts, dtype=object), dtype=object)
    g = s.str.extract("^" + _ISO_RE + "$")
    matched = g["y"].notna().to_numpy()
    ints = {k: pd.to_numeric(g[k], errors="coerce").fillna(0).to_numpy(dtype=np.int64)
            for k in ("y", "mo", "d", "h", "mi", "s")}
    frac_txt = g["f"].fillna("")
    frac = pd.to_numeric("0." + frac_txt, errors="coerce").fillna(0.0).to_numpy(dtype=np.float64)
    year, month, dom = ints["y"], ints["mo"], ints["d"]
    hour, minute, second = ints["h"], ints["mi"], ints["s"]
    date_ok = (month >= 1) & (month <= 12) & (dom >= 1) & (dom <= _days_in_month(year, month))
    day = np.where(date_ok, mjd_from_calendar(year, np.clip(month, 1, 12), np.clip(dom, 1, 31)), 0)
    leap_tag = (second == 60) & (hour == 23) & (minute == 59)
    time_ok = (hour <= 23) & (minute <= 59) & ((second <= 59) | leap_tag)
    leap_ok = ~leap_tag | has_leap_second(day)
    errors: dict[int, str] = {}
    for i in np.flatnonzero(~matched):
        errors[int(i)] = _iso_reason(texts[i])
    for i in np.flatnonzero(matched & ~date_ok):
        errors[int(i)] = f"{texts[i]!r} is not a calendar date"
    for i in np.flatnonzero(matched & date_ok & ~time_ok):
        errors[int(i)] = f"{texts[i]!r} is not a time of day (00:00:00 to 23:59:59)"
    in_range = (day >= MJD_MIN) & (day < MJD_MAX)
    for i in np.flatnonzero(matched & date_ok & time_ok & in_range & ~leap_ok):
        errors[int(i)] = (f"{texts[i]!r}: 23:59:60 exists only at the end of a day with a "
                          f"leap second, and the leap-second table (valid before "
                          f"{LEAP_TABLE_EXPIRES}) has none on that day")
    ok = matched & date_ok & time_ok
    _check_range(day, ok, errors, texts)
    sod = hour * 3600.0 + minute * 60.0 + second + frac
    digits = frac_txt.str.len().to_numpy()
    dmax = int(digits[matched].max()) if matched.any() else 0
    day, sod = day.astype(np.int64), np.where(ok, sod, 0.0)
    return ParsedTags(day, sod, sorted(errors.items()), 10.0 ** -dmax, True, label_mjd(day, sod))


def _iso_reason(text: str) -> str:
    if text == "":
        return f"empty; expected a UTC time such as {ISO_FORMS}"
    m = _ISO_OFFSET.fullmatch(text)
    if m:
        return (f"{_show(text)} has the offset {m.group(1)}, not UTC; convert to UTC and write "
                f"{ISO_FORMS}")
    if _ISO_NAIVE.fullmatch(text):
        return (f"{_show(text)} has no time zone (a naive time is ambiguous); write UTC as "
                f"{ISO_FORMS}")
    return f"{_show(text)} is not an ISO-8601 UTC time; expected {ISO_FORMS}"


def _show(value: object, width: int = 40) -> str:
    """A value for a one-line message: repr, control characters escaped, truncated."""
    text = repr(value)
    return text if len(text) <= width else text[: width - 4] + "...'"


# --------------------------------------------------------------------------- appends
def interval_s(mjd_from: float, mjd_to: float, tau0_s: float, *,
               tol_s: float | None = None) -> float:
    """Exact interval between two epochs on a tau0 grid, leap seconds counted [s].

    Parameters
    ----------
    mjd_from, mjd_to : float
        MJD labels (UTC) of the earlier and the later epoch, read as seconds of an 86 400 s day.
    tau0_s : float
        Sampling interval of the grid. [s]
    tol_s : float, optional
        Accepted distance from the grid [s]; default min(tau0/4, 0.1 s), enough for two tags
        written as six-decimal MJD (0.0432 s each).

    Returns
    -------
    float
        k * tau0 + (TAI-UTC(to) - TAI-UTC(from)). [s]

    Raises
    ------
    InputError
        If the two epochs are not a whole number of intervals apart.
    """
    tol = min(0.25 * tau0_s, 0.1) if tol_s is None else tol_s
    d0, d1 = int(np.floor(mjd_from)), int(np.floor(mjd_to))
    labels_s = (d1 - d0) * _DAY_S + ((mjd_to - d1) - (mjd_from - d0)) * _DAY_S
    k = round(labels_s / tau0_s)
    if abs(labels_s - k * tau0_s) > tol:
        raise InputError(f"epoch {mjd_to!r} is {labels_s - k * tau0_s:+.4g} s off the {tau0_s:g} s "
                         f"grid of epoch {mjd_from!r} (tolerance {tol:.3g} s)")
    return float(k * tau0_s + int(tai_minus_utc_s(d1) - tai_minus_utc_s(d0)))


def check_continuation(last_mjd: float, new_mjd: float, tau0_s: float, *, path: str | None = None,
                       row: int | None = None, column: str = "mjd",
                       tol_s: float | None = None) -> float:
    """Check that new data start after the last archived epoch; return the interval [s].

    Parameters
    ----------
    last_mjd : float
        Last epoch already archived, MJD (UTC). [d]
    new_mjd : float
        First epoch of the new data, MJD (UTC). [d]
    tau0_s : float
        Sampling interval of the archive. [s]
    path, row, column : optional
        Where the new epoch was read (for the message).
    tol_s : float, optional
        Grid tolerance, see :func:`interval_s`. [s]

    Raises
    ------
    InputError
        When the new epoch is at or before the last archived one (overlap or time going
        backwards), or off the archive's grid.
    """
    tol = min(0.25 * tau0_s, 0.1) if tol_s is None else tol_s
    if (new_mjd - last_mjd) * _DAY_S <= tol:
        kind = "repeats" if abs(new_mjd - last_mjd) * _DAY_S <= tol else "is before"
        raise InputError(f"new data start at {format_iso_utc(new_mjd)} (MJD {new_mjd!r}), which "
                         f"{kind} the last archived epoch {format_iso_utc(last_mjd)} (MJD "
                         f"{last_mjd!r}); time must go forward: drop the overlapping rows",
                         path=path, row=row, column=column, value=new_mjd)
    try:
        return interval_s(last_mjd, new_mjd, tau0_s, tol_s=tol)
    except InputError as exc:
        raise InputError(exc.reason + "; new data must continue the archive's grid", path=path,
                         row=row, column=column, value=new_mjd) from None
