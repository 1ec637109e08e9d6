"""Internal: everything the report shows, read from the archive once.

The archive is opened read-only; nothing is written to it.  The report window is the whole
archive or, with ``days``, the epochs of the last ``days`` days up to the last epoch.  Time
plots, the steering figures and the stability estimates use the window; the header (standings
now, recent events, runs, the verifier's verdict) describes the whole archive.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError


@dataclass
class ReportData:
    """The report's content (archive units: s, 1, 1/d; epochs MJD UTC).

    Attributes
    ----------
    path : str
        The archive.
    clocks : tuple of str
    mjd : ndarray (T_w,)
        Epochs of the window. [d]
    tau0_s : float
        Nominal sampling interval (median epoch spacing, to the millisecond). [s]
    offset_s, weight, state : ndarray (T_w, N)
        Clock - scale [s], weights [1], standing codes, over the window.
    events : DataFrame
        The whole /events table (mjd [d], clock, kind, magnitude, score ...).
    steering : dict of ndarray or None
        The /steering columns over the window (None if the table is empty).
    steering_settings : SteeringSettings
        Limits and policy of the archive's configuration (defaults if it has none).
    summary : dict
        :func:`ensemble.commands.inspect.summarise` of the whole archive (header, verdict).
    assessment : AssessmentView
    stability : ClockStability or None
    days : float or None
        The window asked for. [d]
    notes : list of str
        Remarks for the reader (configuration problems, short records ...).
    """

    path: str
    clocks: tuple
    mjd: np.ndarray
    tau0_s: float
    offset_s: np.ndarray
    weight: np.ndarray
    state: np.ndarray
    events: object
    steering: dict | None
    steering_settings: object
    summary: dict
    assessment: object
    stability: object
    days: float | None
    state_codes: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    @property
    def window_events(self):
        """Events inside the window."""
        if not len(self.events) or not self.mjd.size:
            return self.events.iloc[0:0]
        ev = self.events
        return ev[(ev["mjd"] >= self.mjd[0]) & (ev["mjd"] <= self.mjd[-1])]


def check_days(days) -> float | None:
    """Validate the window length: None, or a finite number of days > 0."""
    if days is None:
        return None
    try:
        value = float(days)
    except (TypeError, ValueError):
        raise InputError(f"--days {days!r}: expected a number of days > 0") from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"--days {days!r}: expected a number of days > 0")
    return value


def nominal_interval_s(mjd: np.ndarray) -> float:
    """Median spacing of the epochs, to the millisecond [s] (86 400 s for a single epoch)."""
    if mjd.size < 2:
        return 86400.0
    return max(1e-3, round(float(np.median(np.diff(mjd))) * 86400.0, 3))


def _steering_settings(config_toml: str, path: str, notes: list):
    from ..errors import ConfigError
    from ..steering.settings import load_steering_settings

    try:
        return load_steering_settings(path, text=config_toml or "")
    except ConfigError as exc:
        notes.append(f"the archive's [steering] configuration could not be read ({exc}); "
                     f"the limits shown are the defaults")
        return load_steering_settings()


def collect(archive_path, days: float | None = None) -> ReportData:
    """Read the archive and compute what the report shows.

    Parameters
    ----------
    archive_path : path-like
        An archive written by ``ensemble run``.
    days : float, optional
        Show only the last ``days`` days (default: everything). [d]

    Returns
    -------
    ReportData

    Raises
    ------
    InputError
        Not an archive (missing, not HDF5, damaged, newer format), or ``days`` not > 0.
    """
    from ..archive import open_archive
    from ..commands.inspect import summarise
    from .assessment import assessment_view
    from .clockstability import clock_stability

    days = check_days(days)
    path = os.fspath(archive_path)
    notes: list[str] = []
    with open_archive(path) as a:
        mjd_all = a.mjd
        if not mjd_all.size:
            raise InputError("the archive has no epochs; run 'ensemble run' first", path=path)
        start = None if days is None else float(mjd_all[-1]) - days
        offset = a.array("/scale/offset", start)
        weight = a.array("/scale/weight", start)
        state = a.array("/scale/state", start)
        elapsed = (a.array("/measurements/elapsed", start)
                   if "/measurements/elapsed" in a.datasets else None)
        mjd = mjd_all if start is None else mjd_all[mjd_all >= start]
        events = a.events
        steering_all = a.steering
        if len(steering_all):
            lo = -np.inf if start is None else start
            keep = steering_all["mjd"].to_numpy() >= lo
            steering = {c: steering_all[c].to_numpy()[keep] for c in steering_all.columns}
            if not keep.any():
                steering = None
        else:
            steering = None
        settings = _steering_settings(a.config_toml, path, notes)
        assessment = assessment_view(a, path)
        codes = a.state_codes
        clocks = a.clocks
    tau0 = nominal_interval_s(mjd_all)
    summary = summarise(path, n_events=10, n_runs=10)
    stability = clock_stability(offset, mjd, clocks, tau0, weights=weight, events=events,
                                elapsed_s=elapsed)
    if stability is None:
        notes.append("stability: the N-cornered hat needs at least three clocks with data "
                     "and a record of at least four epochs")
    return ReportData(path=path, clocks=tuple(clocks), mjd=mjd, tau0_s=tau0, offset_s=offset,
                      weight=weight, state=state, events=events, steering=steering,
                      steering_settings=settings, summary=summary, assessment=assessment,
                      stability=stability, days=days, state_codes=codes, notes=notes)
