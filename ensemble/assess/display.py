"""Internal: the assessment as a terminal table, as JSON, and as the archive's /assessment group.

Units at this edge: deviations dimensionless, times in s (JSON, archive) or in words (table),
frequency dimensionless, drift per day.  JSON has no NaN or infinity: such values become null
(an infinite holdover time also sets ``beyond_horizon``).
"""

from __future__ import annotations

import json
import math
import textwrap

import numpy as np

from ..units import SECONDS_PER_DAY
from .records import VERDICTS, Assessment, ClockAssessment
from .verdict import duration_text, tau_text

#: Width of the reason lines in the terminal.
_WIDTH = 100
#: A short note that goes with every verdict.
ADVISORY = ("Verdicts are advisory: they sum up the evidence listed with them against the "
            "[assessment] thresholds; the decision stays with the laboratory.")


# ----------------------------------------------------------------------------- terminal

def _dev_cell(dev, k: int) -> str:
    if dev.resolved[k] and np.isfinite(dev.value[k]):
        return f"{dev.value[k]:.2e}"
    if np.isfinite(dev.upper_bound[k]):
        return f"<{dev.upper_bound[k]:.1e}"
    return "-"


def _ratio(rec: ClockAssessment) -> str:
    ok = rec.hdev.resolved & np.isfinite(rec.hdev_typical)
    if not ok.any():
        return "-"
    return f"{np.max(rec.hdev.value[ok] / rec.hdev_typical[ok]):.2f}"


def _growth(rec: ClockAssessment) -> str:
    if rec.white_fm_trend is None or not math.isfinite(rec.white_fm_growth):
        return "-"
    mark = "*" if rec.white_fm_trend.significant else ""
    return f"x{rec.white_fm_growth:.2f}{mark}"


def _short_time(t_s: float) -> str:
    if not math.isfinite(t_s):
        return "beyond"
    return duration_text(t_s).replace(" ", "")


def table_text(a: Assessment) -> str:
    """The assessment as text for a terminal: a summary table, then each clock's reasons."""
    span_d = (a.last_mjd - a.first_mjd)
    lines = [f"clock assessment of {a.archive}",
             f"  span MJD {a.first_mjd:.4f} to {a.last_mjd:.4f} ({span_d:.1f} d), sampled every "
             f"{tau_text(a.tau0_s)}; own stability of each clock from the N-cornered hat of its "
             f"pair differences"]
    taus = [tau_text(t) for t in a.tau_s]
    types = [_type_cell(r) for r in a.records]
    tw = max([len(t) for t in types] + [13])
    cw = max([len(c) for c in a.clocks] + [5])
    head = (f"{'clock':<{cw}} {'verdict':<7} {'compared with':<{tw}} "
            + " ".join(f"{'HDEV ' + t:>10}" for t in taus)
            + f" {'x typ':>6} {'WFM':>7} {'f/p/o':>6} {'weight':>8} "
            + " ".join(f"{'to ' + _budget(b):>8}" for b in _budgets(a))
            + (f" {'w/o it':>8}" if a.what_if else ""))
    lines += ["", head, "-" * len(head)]
    for r, typ in zip(a.records, types):
        h = r.history
        events = f"{h.count('frequency_step', 'drift_change')}/{h.count('phase_step')}/" \
                 f"{h.count('outlier')}"
        hold = ([_short_time(t) for t in r.holdover.time_to_budget_s] if r.holdover
                else ["-"] * len(_budgets(a)))
        row = (f"{r.clock:<{cw}} {r.verdict:<7} {typ:<{tw}} "
               + " ".join(f"{_dev_cell(r.hdev, k):>10}" for k in range(len(taus)))
               + f" {_ratio(r):>6} {_growth(r):>7} {events:>6} {h.mean_weight:>8.2g} "
               + " ".join(f"{v:>8}" for v in hold))
        if a.what_if:
            row += f" {_what_if_cell(r):>8}"
        lines.append(row)
    legend = ("HDEV: own Hadamard deviation (<x: not separable, at most x); x typ: largest HDEV "
              "/ typical of the type; WFM: growth of the white-FM level over the span (* "
              "significant); f/p/o: frequency steps / phase steps / outliers; weight: mean; "
              "to ...: holdover within the budget (95 % bound)"
              + ("; w/o it: largest change of the scale's Allan deviation without the clock"
                 if a.what_if else ""))
    lines += [""] + textwrap.wrap(legend, _WIDTH)
    lines += [""] + textwrap.wrap(
        "scale (estimated own stability): " + ", ".join(
            f"ADEV {t} {v:.2e} +/- {u:.1e}" for t, v, u in
            zip(taus, a.scale_adev, a.scale_adev_std)), _WIDTH, subsequent_indent="  ")
    lines.append("")
    for r in a.records:
        lines.append(f"{r.clock}: {r.verdict}" + (" (repair suggested)" if r.repair_suggested
                                                  else ""))
        for text in r.reasons:
            lines += textwrap.wrap(text, _WIDTH, initial_indent="  - ",
                                   subsequent_indent="    ")
    if a.messages:
        lines += ["", "notes:"]
        for m in a.messages:
            lines += textwrap.wrap(m, _WIDTH, initial_indent="  - ", subsequent_indent="    ")
    lines += [""] + textwrap.wrap(ADVISORY, _WIDTH)
    return "\n".join(lines)


def _type_cell(r: ClockAssessment) -> str:
    typ = r.type_compared or "-"
    if r.type_compared and r.type_configured == "auto":
        typ += " (auto)"
    return typ


def _budgets(a: Assessment) -> tuple:
    for r in a.records:
        if r.holdover is not None:
            return r.holdover.budgets_s
    return ()


def _budget(b_s: float) -> str:
    return f"{b_s * 1e9:g}ns" if b_s < 1e-6 else f"{b_s * 1e6:g}us"


def _what_if_cell(r: ClockAssessment) -> str:
    w = r.what_if
    if w is None:
        return "-"
    if w.error or not np.isfinite(w.adev_change).any():
        return "n/a"
    k = int(np.nanargmax(np.abs(w.adev_change)))
    c = w.adev_change[k]
    return f"x{1 + c:.3g}" if c >= 1.0 else f"{100 * c:+.2g}%"


# ----------------------------------------------------------------------------- JSON

def _num(v):
    v = float(v)
    return v if math.isfinite(v) else None


def _list(a) -> list:
    return [_num(v) for v in np.asarray(a, dtype=float).ravel()]


def _deviation(dev, taus) -> list:
    return [{"tau": _num(t), "value": _num(dev.value[k]), "lo": _num(dev.lo[k]),
             "hi": _num(dev.hi[k]), "edf": _num(dev.edf[k]), "resolved": bool(dev.resolved[k]),
             "upper_bound": _num(dev.upper_bound[k])} for k, t in enumerate(taus)]


def _trend(t) -> dict | None:
    if t is None:
        return None
    return {"slope": _num(t.slope), "slope_std": _num(t.slope_std),
            "change_per_year": _num(t.change_per_year), "p_value": _num(t.p_value),
            "alpha": _num(t.alpha), "alternative": t.alternative,
            "significant": bool(t.significant), "n_windows": int(t.n_windows),
            "n_effective": _num(t.n_effective), "description": t.description}


def record_dict(r: ClockAssessment, taus) -> dict:
    """One clock as a JSON-ready dict (contract keys first)."""
    h = r.history
    out = {"clock": r.clock, "verdict": r.verdict, "reasons": list(r.reasons),
           "repair_suggested": bool(r.repair_suggested), "role": r.role,
           "type_configured": r.type_configured, "type_compared": r.type_compared,
           "adev": _deviation(r.adev, taus), "hdev": _deviation(r.hdev, taus),
           "hdev_typical": _list(r.hdev_typical)}
    n = r.noise
    out["noise"] = None if n is None else {
        "q1_s": _num(n.q1_s), "q1_std_s": _num(n.q1_std_s),
        "white_fm_adev_1s": _num(n.white_fm_adev_1s), "flicker_adev": _num(n.flicker_adev),
        "flicker_adev_std": _num(n.flicker_adev_std), "q2_per_s": _num(n.q2_per_s),
        "q2_std_per_s": _num(n.q2_std_per_s), "r_s2": _num(n.r_s2), "r_std_s2": _num(n.r_std_s2),
        "assumed": bool(n.assumed)}
    out["frequency"] = {"value": _num(r.frequency), "std": _num(r.frequency_std)}
    out["drift_per_day"] = {"value": _num(r.drift_per_day), "std": _num(r.drift_std_per_day)}
    out["events"] = {k: {"count": e.count, "largest": _num(e.largest), "median": _num(e.median),
                         "last_mjd": _num(e.last_mjd), "unit": e.unit}
                     for k, e in h.events.items()}
    out["weight"] = {"mean": _num(h.mean_weight), "recent_7d": _num(h.recent_weight),
                     "final": _num(h.final_weight)}
    out["state_days"] = {k: _num(v) for k, v in h.state_days.items()}
    out["longest_exclusion_days"] = _num(h.longest_exclusion_days)
    out["availability"] = _num(h.availability)
    out["ageing"] = {"white_fm": _trend(r.white_fm_trend), "drift": _trend(r.drift_trend),
                     "white_fm_growth": _num(r.white_fm_growth)}
    ho = r.holdover
    out["holdover"] = None if ho is None else {
        "budgets_s": _list(ho.budgets_s), "time_to_budget_s": _list(ho.time_to_budget_s),
        "beyond_horizon": [not math.isfinite(t) for t in ho.time_to_budget_s],
        "horizon_s": _num(ho.horizon_s), "coverage": _num(ho.coverage),
        "bound_s": {f"{t:.0f}": _num(v) for t, v in ho.bound_s.items()}}
    w = r.what_if
    out["what_if"] = None if w is None else {
        "role": w.role, "adev_change": _list(w.adev_change),
        "adev_change_std": _list(w.adev_change_std),
        "scale_adev_without": _list(w.scale_adev_without), "error": w.error or None}
    return out


def to_json(a: Assessment) -> str:
    """The contract's JSON list, one object per clock, with the evidence numbers."""
    return json.dumps([record_dict(r, a.tau_s) for r in a.records], indent=1,
                      ensure_ascii=False, allow_nan=False)


# ----------------------------------------------------------------------------- archive

def _field(name, dtype, units, text, length=0):
    from ..archive import TableField
    return TableField(name, dtype, units, text, length)


def write_assessment(path, a: Assessment, config_toml: str) -> None:
    """Write the assessment into the archive's /assessment group (atomically).

    Parameters
    ----------
    path : path-like
        The archive (replaced atomically by the writer; a concurrent writer is refused).
    a : Assessment
    config_toml : str
        Effective configuration of the assessment (its SHA-256 goes into /provenance).
    """
    import os

    from ..archive import ArchiveWriter
    from ..archive.layout import utc_now

    content, units, desc = _group(a)
    content["assessed_utc"] = utc_now()
    reasons = [json.dumps(list(r.reasons), ensure_ascii=False) for r in a.records]
    longest = max([len(t.encode("utf-8")) for t in reasons] + [1])
    size = 256 * math.ceil(longest / 256)
    with ArchiveWriter.open_for_append(path) as w:
        w.write_group("/assessment", content, units=units, descriptions=desc,
                      description="per-clock assessment (ensemble assess): evidence and "
                                  "advisory verdicts")
        w.write_table("/assessment/clocks", {
            "clock": list(a.clocks), "verdict": [r.verdict for r in a.records],
            "reasons": reasons,
            "type_compared": [r.type_compared or "" for r in a.records],
            "repair_suggested": np.array([r.repair_suggested for r in a.records], dtype=np.int8)},
            (_field("clock", "str", "none", "clock identifier", 32),
             _field("verdict", "str", "none", "keep, watch or retire (advisory)", 8),
             _field("reasons", "str", "none", "the reasons behind the verdict, most serious "
                    "first: a JSON list of sentences with their numbers", size),
             _field("type_compared", "str", "none", "clock type whose typical levels the "
                    "clock was compared with ('' if none)", 32),
             _field("repair_suggested", "i1", "1", "1 if the evidence points to a repair "
                    "rather than to retirement")),
            "verdict of each clock and its reasons, in /clocks/name order")
        w.add_run_record(os.path.basename(str(path)), config_toml=config_toml, mode="assess")


def _group(a: Assessment):
    """Datasets (N,) and (N, n_tau) of the evidence, with units and descriptions."""
    recs = a.records
    n_b = len(_budgets(a))
    vec = lambda f: np.array([f(r) for r in recs], dtype=float)     # noqa: E731
    mat = lambda f: np.array([f(r) for r in recs], dtype=float).reshape(len(recs), -1)  # noqa
    nz = lambda r, k: getattr(r.noise, k) if r.noise is not None else np.nan  # noqa: E731
    c = {"tau": np.asarray(a.tau_s, dtype=float),
         "verdict_code": np.array([VERDICTS.index(r.verdict) for r in recs], dtype=np.int8)}
    u = {"tau": "s", "verdict_code": "1"}
    d = {"tau": "judged averaging times, the columns of every (clock, tau) dataset",
         "verdict_code": "0 keep, 1 watch, 2 retire (advisory), in /clocks/name order"}
    for stat in ("adev", "hdev"):
        for part, what in (("value", "own deviation"), ("lo", "lower confidence bound"),
                           ("hi", "upper confidence bound"), ("upper_bound", "deviation of "
                           "the quietest pair, an upper bound")):
            name = stat if part == "value" else f"{stat}_{part}"
            c[name] = mat(lambda r, s=stat, p=part: getattr(getattr(r, s), p))
            u[name] = "1"
            d[name] = (f"{what}, {'overlapping Allan (linear drift removed)' if stat == 'adev' else 'overlapping Hadamard'}"  # noqa: E501
                       f" deviation of each clock from the N-cornered hat (clock, tau)")
        c[f"{stat}_resolved"] = mat(lambda r, s=stat: getattr(r, s).resolved).astype(np.int8)
        u[f"{stat}_resolved"] = "1"
        d[f"{stat}_resolved"] = "1 where the hat separates the clock at that tau (clock, tau)"
    c["hdev_typical"] = mat(lambda r: r.hdev_typical)
    u["hdev_typical"] = "1"
    d["hdev_typical"] = "typical Hadamard deviation of the compared type plus the channel's " \
                        "white PM (clock, tau)"
    for name, key, unit, text in (
            ("q1", "q1_s", "s", "white-FM level q1, sigma_y^2 = q1 / tau"),
            ("q1_std", "q1_std_s", "s", "standard uncertainty of q1"),
            ("flicker_adev", "flicker_adev", "1", "flicker-FM floor as an Allan deviation"),
            ("flicker_adev_std", "flicker_adev_std", "1", "its standard uncertainty"),
            ("q2", "q2_per_s", "1/s", "random-walk-FM level q2, sigma_y^2 = q2 tau / 3"),
            ("q2_std", "q2_std_per_s", "1/s", "standard uncertainty of q2"),
            ("r", "r_s2", "s^2", "white PM of the measurement channel, variance per reading")):
        c[name] = vec(lambda r, k=key: nz(r, k))
        u[name] = unit
        d[name] = f"{text}, fitted to each clock's own Hadamard variance"
    for name, f, unit, text in (
            ("frequency", lambda r: r.frequency, "1", "fractional frequency relative to the "
             "scale at the last epoch"),
            ("frequency_std", lambda r: r.frequency_std, "1", "its standard uncertainty"),
            ("drift", lambda r: r.drift_per_day, "1/d", "frequency drift relative to the "
             "scale"),
            ("drift_std", lambda r: r.drift_std_per_day, "1/d", "its standard uncertainty"),
            ("white_fm_growth", lambda r: r.white_fm_growth, "1", "growth factor of the white-"
             "FM Allan deviation over the span (fitted trend)"),
            ("white_fm_trend_p", lambda r: r.white_fm_trend.p_value if r.white_fm_trend else
             np.nan, "1", "one-sided p-value of the white-FM trend test"),
            ("drift_trend_p", lambda r: r.drift_trend.p_value if r.drift_trend else np.nan,
             "1", "two-sided p-value of the drift trend test"),
            ("mean_weight", lambda r: r.history.mean_weight, "1", "mean weight in the scale"),
            ("recent_weight", lambda r: r.history.recent_weight, "1", "mean weight over the "
             "last 7 days"),
            ("availability", lambda r: r.history.availability, "1", "share of epochs with a "
             "measurement"),
            ("excluded_days", lambda r: r.history.excluded_days, "d", "time excluded or "
             "removed"),
            ("frequency_steps", lambda r: r.history.count("frequency_step", "drift_change"),
             "1", "frequency steps and drift changes detected"),
            ("phase_steps", lambda r: r.history.count("phase_step"), "1", "phase steps "
             "detected"),
            ("outliers", lambda r: r.history.count("outlier"), "1", "outliers detected")):
        c[name] = vec(f)
        u[name] = unit
        d[name] = f"{text} (per clock)"
    if n_b:
        c["holdover_budget"] = np.array(_budgets(a), dtype=float)
        u["holdover_budget"] = "s"
        d["holdover_budget"] = "time-error budgets, the columns of holdover_time"
        c["holdover_time"] = np.array([r.holdover.time_to_budget_s if r.holdover else
                                       [np.nan] * n_b for r in recs], dtype=float)
        u["holdover_time"] = "s"
        d["holdover_time"] = ("time until the 95 % bound of each clock's time error, alone "
                              "from the last epoch, exceeds each budget (inf: beyond the "
                              "horizon) (clock, budget)")
    for name, v, text in (("scale_adev", a.scale_adev, "estimated own Allan deviation of the "
                           "scale"), ("scale_adev_std", a.scale_adev_std, "its uncertainty"),
                          ("scale_hdev", a.scale_hdev, "estimated own Hadamard deviation of "
                           "the scale"), ("scale_hdev_std", a.scale_hdev_std, "its uncertainty")):
        c[name] = np.asarray(v, dtype=float)
        u[name] = "1"
        d[name] = f"{text} (tau)"
    if a.what_if:
        nan = np.full(a.tau_s.size, np.nan)
        c["what_if_change"] = mat(lambda r: r.what_if.adev_change if r.what_if else nan)
        c["what_if_change_std"] = mat(lambda r: r.what_if.adev_change_std if r.what_if else nan)
        u["what_if_change"] = u["what_if_change_std"] = "1"
        d["what_if_change"] = ("relative change of the scale's estimated Allan deviation when "
                               "the clock is left out (clock, tau)")
        d["what_if_change_std"] = "its standard uncertainty (clock, tau)"
    age = a.details.get("ageing")
    if age is not None and age.layout.n_windows:
        c["windows"] = {"centre_mjd": np.asarray(age.layout.centre_mjd, dtype=float),
                        "q1": age.q1_s, "q1_std": age.q1_std_s,
                        "drift": age.drift_per_s * SECONDS_PER_DAY,
                        "drift_std": age.drift_std_per_s * SECONDS_PER_DAY}
        for k, unit, text in (("centre_mjd", "d", "centre of each window, MJD UTC"),
                              ("q1", "s", "white-FM level of each clock in each window "
                               "(window, clock)"),
                              ("q1_std", "s", "its standard uncertainty (window, clock)"),
                              ("drift", "1/d", "drift relative to the scale in each window "
                               "(window, clock)"),
                              ("drift_std", "1/d", "its standard uncertainty (window, "
                               "clock)")):
            u[f"windows/{k}"] = unit
            d[f"windows/{k}"] = text
    c["first_mjd"] = float(a.first_mjd)
    c["last_mjd"] = float(a.last_mjd)
    c["what_if_done"] = bool(a.what_if)
    c["confidence"] = float(a.confidence)
    c["messages"] = list(a.messages)
    return c, u, d
