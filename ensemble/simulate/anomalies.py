"""Injected anomalies and data availability (internal module of :mod:`ensemble.simulate`).

Turns a scenario's ``[[anomalies]]`` and ``[[reference_changes]]`` into arrays on the epoch grid:

* changes of the clock itself, added to its true phase (clock - ideal time), with t0 the event's
  epoch: phase step b: x += b for t >= t0; frequency step c: x += c (t - t0); drift change D:
  x += D (t - t0)^2 / 2.  On the second difference s_k = x_{k+1} - 2 x_k + x_{k-1} these give
  the signatures (derived here) (+b, -b, 0) and (0, c tau, 0) at k0 - 1, k0, k0 + 1;
* reading errors of a channel (outliers, +a at one epoch: (+a, -2a, +a)), which leave the clock
  alone;
* the multiplier of each clock's white-FM level per interval (noise growth);
* which (epoch, clock) measurements exist (gaps, joins, leaves; an epoch whose reference has no
  data has no data at all), and the reference of each epoch;
* the event records of everything injected, with sizes in SI units.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError
from .scenario import SECONDS_PER_DAY, Scenario

#: Unit of the ``size`` of each event kind.
EVENT_UNITS = {"phase_step": "s", "frequency_step": "1", "drift_change": "1/s", "outlier": "s",
               "gap": "d", "join": "", "leave": "", "noise_growth": "1", "reference_change": ""}


@dataclass(frozen=True)
class Event:
    """One injected event.

    Attributes
    ----------
    kind : str
        ``phase_step``, ``frequency_step``, ``drift_change``, ``outlier``, ``gap``, ``join``,
        ``leave``, ``noise_growth`` or ``reference_change``.
    clock : str
        Affected clock; ``"*"`` for a gap of every clock; the new reference for a change.
    mjd : float
        Epoch of the event (first epoch of a step, first missing epoch of a gap or after a
        leave, first epoch with data after a join, start of a noise growth). [d]
    size : float
        Phase step or outlier [s], frequency step [1], drift change [1/s], gap length [d],
        noise-growth factor [1]; NaN for join, leave and reference change.
    unit : str
        Unit of ``size`` (:data:`EVENT_UNITS`).
    end_mjd : float
        End of a span (first epoch after a gap; when a noise growth reaches its factor); NaN
        otherwise. [d]
    epoch : int
        Index of ``mjd`` in the epoch grid.
    """

    kind: str
    clock: str
    mjd: float
    size: float
    unit: str
    end_mjd: float = math.nan
    epoch: int = -1


@dataclass(frozen=True, eq=False)
class Injection:
    """Everything the scenario injects, on the epoch grid (T epochs, N clocks).

    Attributes
    ----------
    clock_change_s : ndarray, shape (T, N)
        Added to the true phase of each clock (steps, frequency steps, drift changes). [s]
    reading_error_s : ndarray, shape (T, N)
        Added to each channel's reading only (outliers). [s]
    white_fm_factor : ndarray, shape (T - 1, N)
        Multiplier of the white-FM level over each interval. [1]
    available : ndarray of bool, shape (T, N)
        True where the measurement clock - reference exists (the reference's own entry too).
    reference : ndarray of int, shape (T,)
        Column of each epoch's reference clock.
    events : tuple of Event
        Sorted by epoch, then kind, then clock.
    """

    clock_change_s: np.ndarray
    reading_error_s: np.ndarray
    white_fm_factor: np.ndarray
    available: np.ndarray
    reference: np.ndarray
    events: tuple[Event, ...]


def build_injection(scenario: Scenario, elapsed_s: np.ndarray, mjd: np.ndarray) -> Injection:
    """Arrays and event records of a scenario's anomalies and reference changes.

    Parameters
    ----------
    scenario : Scenario
    elapsed_s : ndarray, shape (T,)
        Time since the first epoch. [s]
    mjd : ndarray, shape (T,)
        Epoch tags. [d]

    Raises
    ------
    ConfigError
        The reference has no data over a stretch (it has not joined yet or has left), or an
        outlier is placed on the reference or where the clock has no data.
    """
    n_t, names = elapsed_s.shape[0], scenario.clock_names
    col = {name: i for i, name in enumerate(names)}
    n_c = len(names)
    change = np.zeros((n_t, n_c))
    reading = np.zeros((n_t, n_c))
    factor = np.ones((n_t - 1, n_c))
    member = np.ones((n_t, n_c), dtype=bool)        # joined and not yet left
    gap = np.zeros((n_t, n_c), dtype=bool)
    events: list[Event] = []
    reference, owner = _reference_track(scenario, n_t, col)
    outliers = []
    for i, a in enumerate(scenario.anomalies):
        k0 = scenario.epoch_of_day(a.day)
        key = f"anomalies[{i}]"
        c = col.get(a.clock, -1)
        if a.kind == "phase_step":
            change[k0:, c] += a.size_s
            events.append(Event(a.kind, a.clock, float(mjd[k0]), a.size_s, "s", epoch=k0))
        elif a.kind == "frequency_step":
            change[k0:, c] += a.size * (elapsed_s[k0:] - elapsed_s[k0])
            events.append(Event(a.kind, a.clock, float(mjd[k0]), a.size, "1", epoch=k0))
        elif a.kind == "drift_change":
            rate = a.size_per_day / SECONDS_PER_DAY
            change[k0:, c] += 0.5 * rate * (elapsed_s[k0:] - elapsed_s[k0]) ** 2
            events.append(Event(a.kind, a.clock, float(mjd[k0]), rate, "1/s", epoch=k0))
        elif a.kind == "outlier":
            reading[k0, c] += a.size_s
            outliers.append((k0, c, key))
            events.append(Event(a.kind, a.clock, float(mjd[k0]), a.size_s, "s", epoch=k0))
        elif a.kind == "gap":
            k1 = min(n_t, k0 + int(round(a.duration_days * SECONDS_PER_DAY / scenario.tau0_s)))
            if a.clock == "*":
                gap[k0:k1, :] = True
            else:
                gap[k0:k1, c] = True
            end = float(mjd[k1] if k1 < n_t else mjd[-1] + scenario.tau0_s / SECONDS_PER_DAY)
            events.append(Event(a.kind, a.clock, float(mjd[k0]), (k1 - k0) * scenario.tau0_s
                                / SECONDS_PER_DAY, "d", end_mjd=end, epoch=k0))
        elif a.kind == "join":
            member[:k0, c] = False
            events.append(Event(a.kind, a.clock, float(mjd[k0]), math.nan, "", epoch=k0))
        elif a.kind == "leave":
            member[k0:, c] = False
            events.append(Event(a.kind, a.clock, float(mjd[k0]), math.nan, "", epoch=k0))
        elif a.kind == "noise_growth":
            t0 = elapsed_s[k0]
            t1 = (elapsed_s[-1] if math.isinf(a.end_day)    # may lie beyond the run
                  else scenario.epoch_of_day(a.end_day) * scenario.tau0_s)
            factor[:, c] *= growth_factor(elapsed_s[:-1], t0, t1, a.factor, a.shape)
            events.append(Event(a.kind, a.clock, float(mjd[k0]), a.factor, "1",
                                end_mjd=mjd[0] + t1 / SECONDS_PER_DAY, epoch=k0))
        else:  # pragma: no cover - kinds are validated by the scenario
            raise ConfigError(f"unknown anomaly kind {a.kind!r}", key=f"{key}.kind")
    rows = np.arange(n_t)
    lost = ~member[rows, reference]
    if lost.any():
        k = int(np.argmax(lost))
        raise ConfigError(f"reference {names[reference[k]]!r} has no data from day "
                          f"{elapsed_s[k] / SECONDS_PER_DAY:g} (it has not joined yet or has "
                          f"left); add a reference change to a clock that is present",
                          key=owner[k], path=scenario.path)
    available = member & ~gap
    available &= available[rows, reference][:, None]
    for k0, c, key in outliers:
        if reference[k0] == c:
            raise ConfigError(f"clock {names[c]!r} is the reference at that epoch; an outlier "
                              f"belongs to another channel", key=f"{key}.clock",
                              path=scenario.path)
        if not available[k0, c]:
            raise ConfigError(f"clock {names[c]!r} has no data at that epoch", key=f"{key}.day",
                              path=scenario.path)
    for j, rc in enumerate(scenario.reference_changes):
        k0 = scenario.epoch_of_day(rc.day)
        events.append(Event("reference_change", rc.clock, float(mjd[k0]), math.nan, "", epoch=k0))
    events.sort(key=lambda e: (e.epoch, e.kind, e.clock))
    return Injection(change, reading, factor, available, reference, tuple(events))


def growth_factor(t_s: np.ndarray, t0_s: float, t1_s: float, factor: float,
                  shape: str) -> np.ndarray:
    """Multiplier of a white-FM level growing from 1 at t0 to ``factor`` at t1 (constant after).

    linear: 1 + (factor - 1) u; exponential: factor ** u; u = clip((t - t0) / (t1 - t0), 0, 1).

    Parameters
    ----------
    t_s : ndarray
        Times at which to evaluate. [s]
    t0_s, t1_s : float
        Start and end of the growth. [s]
    factor : float
        Multiplier reached at t1. [1]
    shape : {"linear", "exponential"}

    Returns
    -------
    ndarray, same shape as ``t_s``. [1]
    """
    u = np.clip((np.asarray(t_s, dtype=float) - t0_s) / max(t1_s - t0_s, 1e-300), 0.0, 1.0)
    if shape == "linear":
        return 1.0 + (factor - 1.0) * u
    if shape == "exponential":
        return factor ** u
    raise ValueError(f"unknown growth shape {shape!r}; known: linear, exponential")


def _reference_track(scenario: Scenario, n_t: int, col: dict) -> tuple[np.ndarray, list[str]]:
    """Column of the reference at each epoch, and the scenario key that set it."""
    reference = np.full(n_t, col[scenario.reference], dtype=np.int64)
    owner = ["simulation.reference"] * n_t
    for j, rc in enumerate(scenario.reference_changes):
        k0 = scenario.epoch_of_day(rc.day)
        reference[k0:] = col[rc.clock]
        owner[k0:] = [f"reference_changes[{j}].clock"] * (n_t - k0)
    return reference, owner
