"""A short human summary of a :class:`~ensemble.io.measurements.Measurements` (internal).

Used by ``ensemble run`` after reading the input; it reads only the container's fields, so it
works for any reader.
"""

from __future__ import annotations

import numpy as np

from . import timetags
from .measurements import Measurements

_MAX_RUNS = 4      # reference runs shown
_MAX_NAMES = 12    # clock names on the clocks line
_MAX_ROWS = 20     # per-clock lines; with more clocks only the least available are listed


def grid_slots(meas: Measurements) -> int:
    """Number of tau0 grid slots from the first to the last epoch, both included.

    An interval across a leap second is one second longer than its slots on a UTC grid of
    tau0 > 1 s (3601 s for hourly samples); with tau0 <= 1 s the leap second is a slot itself.
    """
    if meas.n_epochs == 0:
        return 0
    last_s = float(meas.elapsed_s[-1])
    x = last_s / meas.tau0_s
    if abs(x - round(x)) > 1e-6:
        leaps = int(timetags.tai_minus_utc_s(int(np.floor(meas.mjd[-1])))
                    - timetags.tai_minus_utc_s(int(np.floor(meas.mjd[0]))))
        x = (last_s - leaps) / meas.tau0_s
    return int(round(x)) + 1


def _duration(seconds: float, at_least: float = 2.0) -> str:
    """Seconds in the largest unit (d, h, min) of which there are ``at_least``."""
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= at_least * size:
            return f"{seconds / size:.4g} {unit}"
    return f"{seconds:.4g} s"


def _runs(reference: np.ndarray) -> list[tuple[int, int, int]]:
    """(reference column, first epoch, last epoch) of each run of equal references, 0-based."""
    change = np.flatnonzero(reference[1:] != reference[:-1]) + 1
    starts = np.concatenate(([0], change))
    ends = np.concatenate((change, [reference.size])) - 1
    return [(int(reference[s]), int(s), int(e)) for s, e in zip(starts, ends)]


def summarize(meas: Measurements) -> str:
    """A few lines describing the measurements: clocks, span, tau0, gaps, references.

    Parameters
    ----------
    meas : Measurements
        As returned by :func:`ensemble.io.csvread.read_measurements`.

    Returns
    -------
    str
        Lines without a trailing newline: the input and its SHA-256, the clocks, the number of
        epochs with tau0 and the missing grid slots, the span (MJD and ISO UTC), the
        reference(s) with the epochs where each one holds, and each clock's share of epochs with
        a value.
    """
    t, n = meas.n_epochs, meas.n_clocks
    digits = 0 if meas.tau0_s >= 1 else 3
    slots = grid_slots(meas)
    tau = f"{meas.tau0_s:g} s" + (f" ({_duration(meas.tau0_s, 1.0)})" if meas.tau0_s >= 60 else "")
    lines = [
        f"input      {meas.source}  (sha256 {meas.sha256[:16]}...)" if meas.sha256
        else f"input      {meas.source}",
        f"clocks     {n}: {' '.join(meas.clocks[:_MAX_NAMES])}"
        + (f" ... {meas.clocks[-1]}" if n > _MAX_NAMES else ""),
        f"epochs     {t} at tau0 = {tau}; {slots - t} of {slots} grid slots missing",
        f"span       MJD {meas.mjd[0]:.6f} to {meas.mjd[-1]:.6f}  "
        f"({timetags.format_iso_utc(meas.mjd[0], digits)} to "
        f"{timetags.format_iso_utc(meas.mjd[-1], digits)}, {_duration(float(meas.elapsed_s[-1]))})",
    ]
    runs = _runs(np.asarray(meas.reference))
    shown = [f"{meas.clocks[r]} (epochs {a + 1}-{b + 1})" for r, a, b in runs[:_MAX_RUNS]]
    more = ", ..." if len(runs) > _MAX_RUNS else ""
    changes = len(runs) - 1
    lines.append(f"reference  {', '.join(shown)}{more}; {changes} change"
                 f"{'' if changes == 1 else 's'}")
    counts = np.isfinite(meas.phase_s).sum(axis=0)
    as_ref = np.bincount(np.asarray(meas.reference), minlength=n)
    width = max(len(c) for c in meas.clocks)
    shown = np.arange(n)
    lines.append(f"values     per clock, of {t} epochs:")
    if n > _MAX_ROWS:
        gappy = np.flatnonzero(counts < t)
        shown = np.sort(gappy[np.argsort(counts[gappy], kind="stable")][:_MAX_ROWS])
    for i in shown:
        note = f"  ({as_ref[i]} as reference)" if as_ref[i] else ""
        lines.append(f"  {meas.clocks[i]:<{width}}  {counts[i]:>7d}  "
                     f"{100.0 * counts[i] / t:5.1f} %{note}")
    if shown.size < n:
        rest = np.setdiff1d(np.arange(n), shown)
        low = int(counts[rest].min())
        what = "a value at every epoch" if low == t else f"at least {low} values"
        who = f"the other {rest.size}" if shown.size else f"all {n}"
        lines.append(f"  {who} clocks have {what}")
    return "\n".join(lines)
