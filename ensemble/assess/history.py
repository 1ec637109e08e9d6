"""Internal: each clock's record in the archive -- anomalies, weights, standings, data -- and
the cleaned offsets the stability statistics use.

Cleaning (:func:`clean_offsets`): the noise statistics describe a clock's random noise, while
its anomalies are counted separately, so before any variance is computed a detected outlier's
reading is dropped (NaN), and detected phase steps, frequency steps and drift changes are
taken out of the later offsets with their estimated sizes, from the event's epoch on (a step,
a ramp, a parabola).  The report's stability figures use the same cleaning.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..units import SECONDS_PER_DAY

#: Standing codes of /scale/state (archive layout, docs/archive.md).
STATE_NAMES = {0: "absent", 1: "probation", 2: "active", 3: "excluded", 4: "removed",
               5: "monitor"}
#: Event kinds counted as frequency changes (steps of frequency or of drift).
FREQUENCY_KINDS = ("frequency_step", "drift_change")
#: Days over which the "recent" weight is averaged.
RECENT_DAYS = 7.0
#: Tolerance when matching an event's epoch to the grid. [d] (about 0.09 s)
_MJD_TOL_D = 1e-6


@dataclass(frozen=True)
class EventSummary:
    """Detected events of one kind for one clock.

    Attributes
    ----------
    count : int
    largest : float
        Largest |magnitude| in the archive's unit of the kind (s, 1, or 1/d); NaN if none.
    median : float
        Median |magnitude|, same unit; NaN if none.
    last_mjd : float
        Epoch of the latest one, MJD UTC; NaN if none. [d]
    unit : str
    """

    count: int
    largest: float
    median: float
    last_mjd: float
    unit: str


@dataclass(frozen=True)
class ClockHistory:
    """One clock's record over the assessed span.

    Attributes
    ----------
    availability : float
        Share of epochs with a measurement of the clock (the reference's own zero counts). [1]
    mean_weight, recent_weight, final_weight : float
        Weight in the scale averaged over the span, over the last 7 days, and at the last
        epoch. [1]
    state_days : dict of str to float
        Days spent in each standing (absent, probation, active, excluded, removed, monitor). [d]
    longest_exclusion_days : float
        Longest unbroken stretch excluded or removed. [d]
    events : dict of str to EventSummary
        Per event kind found for this clock (outlier, phase_step, frequency_step,
        drift_change, reference_*).
    """

    availability: float
    mean_weight: float
    recent_weight: float
    final_weight: float
    state_days: dict
    longest_exclusion_days: float
    events: dict = field(default_factory=dict)

    def count(self, *kinds: str) -> int:
        """Number of events of the given kinds."""
        return int(sum(self.events[k].count for k in kinds if k in self.events))

    @property
    def excluded_days(self) -> float:
        """Days excluded or removed. [d]"""
        return self.state_days.get("excluded", 0.0) + self.state_days.get("removed", 0.0)


def _units(kind: str) -> str:
    if kind == "frequency_step":
        return "1"
    if kind == "drift_change":
        return "1/d"
    return "s"


def clock_histories(clocks, mjd: np.ndarray, interval_s: np.ndarray, phase_s: np.ndarray,
                    weight: np.ndarray, state: np.ndarray, events) -> tuple[ClockHistory, ...]:
    """Summaries of every clock's record.

    Parameters
    ----------
    clocks : sequence of str, length N
    mjd : ndarray, shape (T,)
        Epochs, MJD UTC. [d]
    interval_s : ndarray, shape (T,)
        Time each epoch stands for (the nominal sampling interval). [s]
    phase_s : ndarray, shape (T, N)
        Measurements clock - reference (NaN where missing). [s]
    weight, state : ndarray, shape (T, N)
        /scale/weight [1] and /scale/state (codes).
    events : pandas.DataFrame
        /events (mjd, clock, kind, magnitude in the archive's units).

    Returns
    -------
    tuple of ClockHistory, length N
    """
    n_t = mjd.size
    recent = mjd >= mjd[-1] - RECENT_DAYS + _MJD_TOL_D if n_t else np.zeros(0, dtype=bool)
    days = interval_s / SECONDS_PER_DAY
    out = []
    for i, name in enumerate(clocks):
        st = state[:, i]
        state_days = {label: float(days[st == code].sum()) for code, label in STATE_NAMES.items()}
        out_of = (st == 3) | (st == 4)
        longest = _longest_run(out_of, days)
        mine = events[events["clock"] == name] if len(events) else events
        summary = {}
        for kind in sorted(set(mine["kind"])) if len(mine) else ():
            rows = mine[mine["kind"] == kind]
            mag = np.abs(rows["magnitude"].to_numpy(dtype=float))
            summary[kind] = EventSummary(int(len(rows)), float(np.max(mag)),
                                         float(np.median(mag)), float(rows["mjd"].max()),
                                         _units(kind))
        out.append(ClockHistory(
            availability=float(np.isfinite(phase_s[:, i]).mean()) if n_t else 0.0,
            mean_weight=float(np.mean(weight[:, i])) if n_t else 0.0,
            recent_weight=float(np.mean(weight[recent, i])) if recent.any() else 0.0,
            final_weight=float(weight[-1, i]) if n_t else 0.0,
            state_days=state_days, longest_exclusion_days=longest, events=summary))
    return tuple(out)


def _longest_run(flag: np.ndarray, days: np.ndarray) -> float:
    best = cur = 0.0
    for f, d in zip(flag, days):
        cur = cur + d if f else 0.0
        best = max(best, cur)
    return float(best)


def clean_offsets(offset_s: np.ndarray, mjd: np.ndarray, clocks, events) -> np.ndarray:
    """Offsets with detected outliers dropped and detected steps taken out.

    Phase steps are subtracted from their epoch on, frequency steps as the ramp
    c (t - t_k) and drift changes as d (t - t_k)^2 / 2, so that the clock's own stability is
    judged on its noise; the events themselves are counted separately.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        /scale/offset, clock - scale. [s]
    mjd : ndarray, shape (T,)
        Epochs. [d]
    clocks : sequence of str
    events : pandas.DataFrame or None
        /events: magnitude in s for outliers and phase steps, 1 for frequency steps, 1/d for
        drift changes (as the archive stores them); None: no events.

    Returns
    -------
    ndarray, shape (T, N)
        A cleaned copy. [s]
    """
    x = np.array(offset_s, dtype=float, copy=True)
    if events is None or not len(events):
        return x
    col = {c: i for i, c in enumerate(clocks)}
    for row in events.itertuples(index=False):
        i = col.get(row.clock)
        if i is None:
            continue
        k = int(np.searchsorted(mjd, row.mjd - _MJD_TOL_D))
        if k >= mjd.size:
            continue
        if row.kind == "outlier" and abs(mjd[k] - row.mjd) <= _MJD_TOL_D:
            x[k, i] = np.nan
        elif row.kind == "phase_step" and np.isfinite(row.magnitude):
            x[k:, i] -= float(row.magnitude)
        elif row.kind == "frequency_step" and np.isfinite(row.magnitude):
            x[k:, i] -= float(row.magnitude) * (mjd[k:] - row.mjd) * 86400.0
        elif row.kind == "drift_change" and np.isfinite(row.magnitude):
            x[k:, i] -= 0.5 * float(row.magnitude) / 86400.0 * ((mjd[k:] - row.mjd) * 86400.0) ** 2
    return x
