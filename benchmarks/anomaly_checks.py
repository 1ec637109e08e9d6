"""Anomaly part of the engine benchmark: injected sizes relative to the true noise, matching of
detected to injected events, and the variants that attribute a change of the scale.

Size references (from each clock's true power-law levels h_alpha and its channel's white PM r,
``Simulation.noise``; Allan variance of the power-law terms, the usual relations recalled from
memory and reproduced in ``ensemble.model.presets.allan_variance_from_h``):

* one-step prediction noise sigma_1 = sqrt(tau0^2 AVAR_clock(tau0) + 2 r): the standard deviation
  of a clock's phase prediction error over one sampling interval (its own white FM, flicker FM
  and random-walk FM, plus the white PM of the two readings); phase steps must be 20 sigma_1;
* frequency noise at one day: ADEV_clock(1 d); frequency steps must be 5 ADEV(1 d).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ensemble.model.presets import allan_variance_from_h

DAY_S = 86400.0
#: Required size of each kind in units of its noise reference, and the tolerance accepted.
REQUIRED = {"phase_step": 20.0, "frequency_step": 5.0}
SIZE_TOLERANCE = 0.03
#: Detection delay allowed [epochs], by kind (drift changes: no target, shown with 24).
DELAY_LIMIT = {"phase_step": 3, "outlier": 3, "frequency_step": 24, "drift_change": 24}
TARGET_KINDS = ("phase_step", "outlier", "frequency_step")
DETECTABLE = ("phase_step", "outlier", "frequency_step", "drift_change")


def sigma_one_step_s(h, r_s2: float, tau0_s: float) -> float:
    """sigma_1 = sqrt(tau0^2 AVAR_clock(tau0) + 2 r) [s] from power-law levels h and white PM r."""
    return math.sqrt(tau0_s ** 2 * float(allan_variance_from_h(h, tau0_s)) + 2.0 * r_s2)


def adev_day(h) -> float:
    """Allan deviation at one day of a clock's own power-law noise h [1]."""
    return math.sqrt(float(allan_variance_from_h(h, DAY_S)))


def one_step_noise_s(sim, clock: str) -> float:
    """sigma_1 of a simulated clock [s]."""
    par = sim.noise[clock]
    return sigma_one_step_s(par.h, par.clock_noise.r_s2, sim.tau0_s)


def adev_one_day(sim, clock: str) -> float:
    """The simulated clock's own Allan deviation at one day, from its true levels [1]."""
    return adev_day(sim.noise[clock].h)


def sized_anomaly_scenario(base):
    """``base`` (mixed_lab_anomalies) with its steps resized relative to the true noise.

    Phase steps become 20 sigma_1 and frequency steps 5 ADEV(1 d) of their clock (sign kept,
    three significant digits); everything else (seed, clocks, outliers, gaps, reference change,
    join, leave, drift change, noise growth) is unchanged, so the clock noise stays that of the
    clean scenario with the same seed.
    """
    from ensemble.simulate import Scenario

    table = base.to_dict()
    specs = {c.name: c for c in base.clocks}
    for ev in table.get("anomalies", []):
        if ev["kind"] not in REQUIRED:
            continue
        spec = specs[ev["clock"]]
        h = spec.preset.h_coefficients()
        if ev["kind"] == "phase_step":
            ref = sigma_one_step_s(h, base.white_pm_of(spec.name) ** 2, base.tau0_s)
            key = "size_s"
        else:
            ref = adev_day(h)
            key = "size"
        ev[key] = math.copysign(float(f"{REQUIRED[ev['kind']] * ref:.3g}"), ev[key])
    return Scenario.from_dict(table, path="mixed_lab_anomalies_sized (derived)")


def flicker_equivalent_q2(sim, clock: str, match_epochs: int = 48) -> float:
    """True q2 plus the flicker floor carried as random-walk FM [1/s].

    The start-up of the engine (ensemble/engine/startup.py) carries a fitted flicker FM level
    h_-1 by a random-walk FM level with the same Hadamard variance at 48 tau0:
    q2 += 6 (4 ln 2 - 1.5 ln 3) h_-1 / (48 tau0) (HVAR of flicker FM 1.124670 h_-1, a recalled
    value whose closed form we identified numerically, and of random-walk FM q2 tau / 6, derived
    here; ensemble/model/presets.py).  This is that level from the true h_-1.
    """
    par = sim.noise[clock]
    hvar_factor = 4.0 * math.log(2.0) - 1.5 * math.log(3.0)
    return par.clock_noise.q2_per_s + 6.0 * hvar_factor * par.h.get(-1, 0.0) / (
        match_epochs * sim.tau0_s)


@dataclass
class SizeRow:
    kind: str
    clock: str
    epoch: int
    size: float
    reference: float
    ratio: float
    required: float          # NaN when no size is required

    @property
    def ok(self) -> bool:
        if math.isnan(self.required):
            return True
        return abs(self.ratio / self.required - 1.0) <= SIZE_TOLERANCE


def size_rows(sim) -> list[SizeRow]:
    """Every injected step, outlier and drift change with its size relative to the noise."""
    rows = []
    for ev in sim.events:
        if ev.kind not in DETECTABLE:
            continue
        if ev.kind == "frequency_step":
            ref = adev_one_day(sim, ev.clock)
        elif ev.kind == "drift_change":
            ref = adev_one_day(sim, ev.clock) / DAY_S      # frequency noise of a day per day
        else:
            ref = one_step_noise_s(sim, ev.clock)
        rows.append(SizeRow(ev.kind, ev.clock, int(ev.epoch), float(ev.size), ref,
                            abs(ev.size) / ref, REQUIRED.get(ev.kind, math.nan)))
    return rows


@dataclass
class Match:
    """An injected event and the detected event matched to it (if any)."""

    kind: str
    clock: str
    epoch: int
    size: float
    detected_kind: str = ""
    onset_epoch: int = -1
    delay: int = -1
    estimate: float = math.nan
    note: str = ""
    peak_slow_stat: float = math.nan

    @property
    def on_time(self) -> bool:
        return bool(self.detected_kind == self.kind and 0 <= self.delay <= DELAY_LIMIT[self.kind])


def epoch_of(mjd: float, mjd0: float, tau0_s: float) -> int:
    """Index of an epoch tag on the grid."""
    return int(round((mjd - mjd0) * DAY_S / tau0_s))


def match_events(sim, detected, slow_stat: np.ndarray | None = None,
                 search_days: float = 10.0) -> tuple[list[Match], list]:
    """Match detected events to the injected ones by clock, kind and epoch.

    A detected event matches when it has the injected clock and kind, its onset lies within the
    kind's delay limit of the injected epoch and it was decided no earlier than the injection.
    Otherwise the first event of the same clock decided within ``search_days`` after the
    injection is shown (late or of another kind).  Returns (matches, unmatched detected events).
    """
    mjd0, tau0 = float(sim.mjd[0]), sim.tau0_s
    used = set()
    out = []
    for ev in sim.events:
        if ev.kind not in DETECTABLE:
            continue
        k0 = int(ev.epoch)
        lim = DELAY_LIMIT[ev.kind]
        m = Match(ev.kind, ev.clock, k0, float(ev.size))
        if slow_stat is not None and slow_stat.size:
            col = sim.clocks.index(ev.clock)
            m.peak_slow_stat = float(np.max(slow_stat[k0:k0 + lim + 1, col]))
        best = None
        for j, d in enumerate(detected):
            if j in used or d.clock != ev.clock:
                continue
            onset = epoch_of(d.mjd, mjd0, tau0)
            decided = epoch_of(d.detected_mjd, mjd0, tau0)
            if d.kind == ev.kind and abs(onset - k0) <= lim and decided >= k0:
                best = j
                break
        if best is None:
            horizon = k0 + search_days * DAY_S / tau0
            for j, d in enumerate(detected):
                decided = epoch_of(d.detected_mjd, mjd0, tau0)
                if j not in used and d.clock == ev.clock and k0 <= decided <= horizon:
                    best = j
                    m.note = "late" if d.kind == ev.kind else "other kind"
                    break
        if best is not None:
            d = detected[best]
            used.add(best)
            m.detected_kind = d.kind
            m.onset_epoch = epoch_of(d.mjd, mjd0, tau0)
            m.delay = epoch_of(d.detected_mjd, mjd0, tau0) - k0
            m.estimate = float(d.magnitude)
            if m.note == "" and not m.on_time:
                m.note = "late"
        else:
            m.note = "missed"
        out.append(m)
    unmatched = [d for j, d in enumerate(detected) if j not in used]
    return out, unmatched


def also_in(event, others, mjd0: float, tau0_s: float, window: int = 24) -> bool:
    """Whether an event of the same clock and kind with a nearby onset is in ``others``."""
    k = epoch_of(event.mjd, mjd0, tau0_s)
    return any(o.clock == event.clock and o.kind == event.kind
               and abs(epoch_of(o.mjd, mjd0, tau0_s) - k) <= window for o in others)


#: Variants of the anomaly scenario with one group of events each (for the attribution table).
VARIANT_GROUPS = (
    ("reference change", (), True),
    ("gaps", ("gap",), False),
    ("join", ("join",), False),
    ("leave", ("leave",), False),
    ("outliers", ("outlier",), False),
    ("phase steps", ("phase_step",), False),
    ("frequency steps", ("frequency_step",), False),
    ("drift change", ("drift_change",), False),
    ("noise growth", ("noise_growth",), False),
)


def variant_label(table: dict, base: str) -> str:
    """``base`` with the clocks the variant's events concern, e.g. "join (P03)"."""
    clocks = [a["clock"] for a in table.get("anomalies", [])]
    clocks += [f"to {c['clock']}" for c in table.get("reference_changes", [])]
    return f"{base} ({', '.join(clocks)})" if clocks else base


def variant_table(full: dict, kinds, with_reference_change: bool) -> dict:
    """A scenario table with only the anomalies of ``kinds`` (and the reference change or not)."""
    table = dict(full)
    table["anomalies"] = [a for a in full.get("anomalies", []) if a["kind"] in kinds]
    table["reference_changes"] = (list(full.get("reference_changes", []))
                                  if with_reference_change else [])
    return table


def difference_stats(err_a: np.ndarray, err_b: np.ndarray, limit_s: float, tau0_s: float,
                     detrend_before: int | None = None) -> dict:
    """Max and rms of err_a - err_b over the common epochs, and when it first exceeds a limit.

    With ``detrend_before`` = k1 the straight line fitted to the difference over epochs
    [0, k1) (before any injected event) is removed first: two free-running scales whose
    ensembles differ from the start (a clock that joins later) differ by an arbitrary phase and
    frequency, which this takes out, leaving what the events themselves changed.
    """
    d = err_a - err_b
    ok = np.isfinite(d)
    if detrend_before is not None:
        k = np.arange(d.size)
        fit = ok & (k < detrend_before)
        if fit.sum() >= 2:
            coef = np.polyfit(k[fit] * tau0_s, d[fit], 1)
            d = d - np.polyval(coef, k * tau0_s)
    first = np.flatnonzero(ok & (np.abs(np.where(ok, d, 0.0)) > limit_s))
    return {"max": float(np.max(np.abs(d[ok]))), "rms": float(np.sqrt(np.mean(d[ok] ** 2))),
            "epochs": int(ok.sum()),
            "first_day": float(first[0] * tau0_s / DAY_S) if first.size else math.nan}


def first_event_epoch(sim) -> int:
    """Epoch of the first injected event of any kind (reference changes included)."""
    return min(int(ev.epoch) for ev in sim.events)
