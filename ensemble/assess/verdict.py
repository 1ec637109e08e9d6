"""Internal: the verdict rules -- keep, watch or retire -- and the sentences that carry the
evidence.

Each rule looks at one kind of evidence and gives findings of level "retire", "watch" or
"note" (information, for example the holdover figures).  The verdict is the most serious level
found: retire if any rule says retire, else watch if any says watch, else keep.  The verdict is
advisory (common practice, no source: present evidence, not a judgement); every finding is a
sentence naming its numbers and the threshold it was compared with, and the thresholds are the
``[assessment]`` settings (docs/assessment.md lists every rule).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..model.presets import PRESETS
from ..units import SECONDS_PER_DAY
from .history import FREQUENCY_KINDS
from .records import ClockAssessment
from .settings import AssessmentSettings

_LEVELS = {"retire": 2, "watch": 1, "note": 0}
#: Cesium types, whose ageing has a known cause worth naming (cesium exhausted, multiplier worn:
#: practitioners' accounts, no publication cited).
_CESIUM = ("cesium_standard", "cesium_high_performance")


@dataclass(frozen=True)
class Finding:
    """One piece of evidence: its level ("retire", "watch", "note") and its sentence."""

    level: str
    text: str


def tau_text(tau_s: float) -> str:
    """An averaging time in words: 3600 -> '1 h', 86400 -> '1 d', 900 -> '15 min'."""
    for unit, size in (("d", SECONDS_PER_DAY), ("h", 3600.0), ("min", 60.0)):
        if tau_s >= size and abs(tau_s / size - round(tau_s / size, 1)) < 1e-9:
            return f"{tau_s / size:g} {unit}"
    return f"{tau_s:g} s"


def duration_text(t_s: float) -> str:
    """A holdover time in words (hours below two days, days below two years, else years)."""
    if not math.isfinite(t_s):
        return "beyond the horizon"
    if t_s < 2 * SECONDS_PER_DAY:
        return f"{t_s / 3600.0:.3g} h"
    if t_s < 730 * SECONDS_PER_DAY:
        return f"{t_s / SECONDS_PER_DAY:.3g} d"
    return f"{t_s / (365.25 * SECONDS_PER_DAY):.3g} years"


def budget_text(budget_s: float) -> str:
    """A time-error budget in words: 1e-7 -> '100 ns', 1e-6 -> '1 \u00b5s'."""
    if budget_s < 1e-6:
        return f"{budget_s * 1e9:.4g} ns"
    if budget_s < 1e-3:
        return f"{budget_s * 1e6:.4g} \u00b5s"
    return f"{budget_s * 1e3:.4g} ms"


def type_label(key: str | None) -> str:
    """Plain-words label of a clock type."""
    return PRESETS[key].label if key in PRESETS else str(key)


def with_article(label: str) -> str:
    """'a cesium beam', 'an active hydrogen maser'."""
    return ("an " if label[:1].lower() in "aeiou" else "a ") + label


def counted(n: int, word: str, plural: str | None = None) -> str:
    """'1 outlier', '2 outliers'."""
    return f"{n} {word if n == 1 else (plural or word + 's')}"


def decide(rec: ClockAssessment, tau_s: np.ndarray, span_days: float,
           settings: AssessmentSettings, confidence: float) -> tuple[str, tuple, bool]:
    """Verdict, reasons (most serious first) and whether repair rather than retirement fits.

    Parameters
    ----------
    rec : ClockAssessment
        The clock's evidence (its ``verdict`` and ``reasons`` are ignored).
    tau_s : ndarray, shape (n_tau,)
        The judged averaging times. [s]
    span_days : float
        Length of the assessed span. [d]
    settings : AssessmentSettings
    confidence : float
        Probability of the deviation intervals (for the wording).

    Returns
    -------
    (verdict, reasons, repair_suggested)
    """
    s = settings
    found: list[Finding] = []
    stab = _stability(rec, tau_s, s, confidence)
    found += stab
    noise_bad = any(f.level != "note" for f in stab)
    ageing = _ageing(rec, span_days, s)
    found += ageing
    aged = any(f.level != "note" for f in ageing)
    steps, repair = _steps(rec, span_days, s, healthy=not (noise_bad or aged))
    found += steps
    found += _standing(rec, s)
    found += _what_if(rec, tau_s, s)
    found += _holdover(rec)
    level = max((_LEVELS[f.level] for f in found), default=0)
    verdict = {2: "retire", 1: "watch", 0: "keep"}[level]
    ordered = sorted(found, key=lambda f: -_LEVELS[f.level])
    return verdict, tuple(f.text for f in ordered), repair and verdict != "keep"


def _ci(confidence: float) -> str:
    return f"{100 * confidence:.3g} %"


def _stability(rec, tau_s, s: AssessmentSettings, confidence) -> list[Finding]:
    out: list[Finding] = []
    h, typ = rec.hdev, rec.hdev_typical
    if rec.type_compared is None:
        if rec.type_configured == "auto" and s.auto_type == "skip":
            why = "its type is 'auto' and [assessment].auto_type = 'skip'"
        else:
            why = "no clock type could be matched"
        out.append(Finding("note", f"stability not compared with a type: {why}"))
    label = type_label(rec.type_compared)
    named = ("configured as" if rec.type_compared == rec.type_configured
             else "closest type:")
    worst = None
    for k, tau in enumerate(tau_s):
        if not (np.isfinite(typ[k]) and h.resolved[k]):
            continue
        ratio_lo = h.lo[k] / typ[k]
        if worst is None or ratio_lo > worst[0]:
            worst = (ratio_lo, k)
    if worst is not None and worst[0] > s.type_watch_factor:
        ratio_lo, k = worst
        level = "retire" if ratio_lo > s.type_retire_factor else "watch"
        limit = s.type_retire_factor if level == "retire" else s.type_watch_factor
        out.append(Finding(level, (
            f"Hadamard deviation at {tau_text(tau_s[k])} is {h.value[k]:.2e} ({_ci(confidence)} "
            f"interval {h.lo[k]:.2e} to {h.hi[k]:.2e}), {h.value[k] / typ[k]:.1f} times the "
            f"typical {typ[k]:.2e} of {with_article(label)} ({named} {rec.type_compared}); even "
            f"the lower "
            f"bound is more than the {limit:g}x {'retirement' if level == 'retire' else 'watch'}"
            f" threshold")))
        return out
    if worst is not None:
        ratio_lo, k = worst
        out.append(Finding("note", (
            f"stability as expected: Hadamard deviation at {tau_text(tau_s[k])} "
            f"{h.value[k]:.2e} ({_ci(confidence)} interval {h.lo[k]:.2e} to {h.hi[k]:.2e}) "
            f"against a typical {typ[k]:.2e} for {with_article(label)}, within the "
            f"{s.type_watch_factor:g}x "
            f"watch threshold at every judged averaging time")))
        return out
    # nothing resolved: say what the upper bound allows
    ub = [(h.upper_bound[k], typ[k], tau) for k, tau in enumerate(tau_s)
          if np.isfinite(h.upper_bound[k])]
    if ub:
        u, t_, tau = min(ub, key=lambda v: v[2])
        extra = ""
        if np.isfinite(t_):
            extra = (f"; the typical level of {with_article(label)} is {t_:.2e}, so the bound is "
                     f"{'within' if u <= s.type_watch_factor * t_ else 'beyond'} the "
                     f"{s.type_watch_factor:g}x watch threshold")
        out.append(Finding("note", (
            f"own stability not separable from the other clocks (its pairs with noisier "
            f"clocks cannot split it from its quietest partner); at {tau_text(tau)} it is at "
            f"most {u:.2e}, the deviation of its quietest pair{extra}")))
    else:
        out.append(Finding("note", "own stability not estimated: too few clocks or too "
                                   "little data for the N-cornered hat"))
    return out


def _ageing(rec, span_days, s: AssessmentSettings) -> list[Finding]:
    out: list[Finding] = []
    test = rec.white_fm_trend
    if test is None:
        out.append(Finding("note", "no ageing test of the white-FM level (not resolved in "
                                   "enough windows)"))
    elif test.significant:
        g = rec.white_fm_growth
        level = "retire" if g >= s.growth_retire_factor else "watch"
        cause = ""
        if rec.type_compared in _CESIUM or rec.type_configured in _CESIUM:
            cause = ("; in a cesium beam clock rising white FM is the usual sign of a tube "
                     "nearing the end of its life")
        if level == "retire":
            act = (f"more than the {s.growth_retire_factor:g}x retirement threshold: plan its "
                   f"replacement (or a new tube)")
        else:
            act = (f"below the {s.growth_retire_factor:g}x retirement threshold: watch the "
                   f"coming windows")
        out.append(Finding(level, (
            f"white-FM noise rising: its Allan deviation grew by a factor {g:.2f} over the "
            f"{span_days:.0f}-day span (trend of the white-FM level in {test.n_windows} "
            f"windows, one-sided p = {test.p_value:.2g} < {test.alpha:g}), {act}{cause}")))
    else:
        out.append(Finding("note", (
            f"no significant ageing of the white-FM level (one-sided p = "
            f"{test.p_value:.2g}, {test.n_windows} windows)")))
    d = rec.drift_trend
    if d is not None and d.significant:
        out.append(Finding("watch", (
            f"drift relative to the scale changing: {d.change_per_year * SECONDS_PER_DAY:+.2e} "
            f"per day per year (p = {d.p_value:.2g} < {d.alpha:g}, {d.n_windows} windows); "
            f"check the clock's environment and, for a maser, its hydrogen supply")))
    return out


def _steps(rec, span_days, s: AssessmentSettings, healthy: bool) -> tuple[list[Finding], bool]:
    out: list[Finding] = []
    hist = rec.history
    repair = False
    n_f = hist.count(*FREQUENCY_KINDS)
    n_p = hist.count("phase_step")
    n_o = hist.count("outlier")
    good = ("; its noise between the steps is normal for its type, so the steps point to a "
            "fault worth repairing (power, environment, electronics) rather than to "
            "retirement") if healthy else ""
    if n_f >= s.max_frequency_steps:
        sizes = [hist.events[k].largest for k in ("frequency_step",) if k in hist.events]
        big = f", the largest {sizes[0]:.2e}" if sizes else ""
        out.append(Finding("watch", (
            f"{n_f} frequency steps or drift changes in {span_days:.0f} days{big} (watch "
            f"threshold {s.max_frequency_steps}){good}")))
        repair = repair or healthy
    if n_p >= s.max_phase_steps:
        e = hist.events["phase_step"]
        out.append(Finding("watch", (
            f"{n_p} phase steps in {span_days:.0f} days, the largest {e.largest * 1e9:.3g} ns "
            f"(watch threshold {s.max_phase_steps}){good}")))
        repair = repair or healthy
    rate = n_o / max(span_days, 1e-9) * 30.0
    if n_o and rate > s.max_outliers_per_30_days:
        out.append(Finding("watch", (
            f"{n_o} outliers in {span_days:.0f} days ({rate:.1f} per 30 days, watch threshold "
            f"{s.max_outliers_per_30_days:g}): check its measurement channel (cabling, "
            f"comparator input) before the clock itself")))
        repair = True
    if not (n_f >= s.max_frequency_steps or n_p >= s.max_phase_steps
            or (n_o and rate > s.max_outliers_per_30_days)):
        parts = [counted(n, w, pl) for n, w, pl in
                 ((n_f, "frequency step or drift change", "frequency steps or drift changes"),
                  (n_p, "phase step", None), (n_o, "outlier", None)) if n]
        text = ", ".join(parts) if parts else "no anomalies"
        out.append(Finding("note", f"{text} detected in {span_days:.0f} days (below the watch "
                                   f"thresholds)"))
    return out, repair


def _standing(rec, s: AssessmentSettings) -> list[Finding]:
    out: list[Finding] = []
    hist = rec.history
    if rec.role == "member" and hist.excluded_days > s.max_excluded_days:
        out.append(Finding("watch", (
            f"excluded or removed for {hist.excluded_days:.1f} days in all (longest stretch "
            f"{hist.longest_exclusion_days:.1f} d; watch threshold {s.max_excluded_days:g} d)")))
    if hist.availability < s.min_availability:
        out.append(Finding("watch", (
            f"measured at only {100 * hist.availability:.1f} % of the epochs (watch threshold "
            f"{100 * s.min_availability:g} %): check its measurement channel")))
    if rec.role == "member":
        out.append(Finding("note", (
            f"weight in the scale {hist.mean_weight:.3g} on average, {hist.recent_weight:.3g} "
            f"over the last 7 days")))
    else:
        out.append(Finding("note", "monitor clock: measured against the scale, never weighted"))
    return out


def _what_if(rec, tau_s, s: AssessmentSettings) -> list[Finding]:
    w = rec.what_if
    if w is None:
        return []
    if w.error:
        return [Finding("note", f"what-if not available: {w.error}")]
    k = int(np.nanargmax(np.abs(w.adev_change))) if np.isfinite(w.adev_change).any() else 0
    change, std = w.adev_change[k], w.adev_change_std[k]
    at = f"at {tau_text(tau_s[k])}"
    if w.role == "better without":
        return [Finding("watch", (
            f"the scale is better without it: its estimated Allan deviation {at} falls by "
            f"{-100 * change:.2g} % +/- {100 * std:.2g} % when the clock is left out (threshold "
            f"{s.what_if_better_percent:g} % at {s.what_if_sigma:g} standard uncertainties); "
            f"consider making it a monitor clock"))]
    if w.role == "leans on":
        return [Finding("note", (
            f"the scale leans on it: without it the scale's estimated Allan deviation {at} "
            f"{change_text(change, std)} (to {w.scale_adev_without[k]:.2e}); arrange a "
            f"replacement before taking it out"))]
    if w.role == "not needed":
        return [Finding("note", (
            f"the scale does not need it: leaving it out changes the scale's estimated Allan "
            f"deviation by less than {s.what_if_negligible_percent:g} % at every judged "
            f"averaging time (largest {100 * change:+.2g} % {at})"))]
    return [Finding("note", (
        f"without it the scale's estimated Allan deviation {at} {change_text(change, std)}"))]


def change_text(change: float, std: float) -> str:
    """'rises by 12 % +/- 3 %', or for large changes 'rises 19.1-fold (+/- 2.7)'."""
    if change >= 1.0:
        return f"rises {1 + change:.3g}-fold (+/- {std:.2g})"
    verb = "rises" if change >= 0 else "falls"
    return f"{verb} by {100 * abs(change):.2g} % +/- {100 * std:.2g} %"


def _holdover(rec) -> list[Finding]:
    h = rec.holdover
    if h is None:
        return []
    parts = [f"{budget_text(b)} for {duration_text(t)}" for b, t in
             zip(h.budgets_s, h.time_to_budget_s)]
    return [Finding("note", (
        f"alone from the last epoch (its offset, frequency and drift corrected) it would stay "
        f"within {' and within '.join(parts)} ({100 * h.coverage:g} % bound)"))]


def what_if_role(change: np.ndarray, std: np.ndarray, s: AssessmentSettings) -> str:
    """Classify a clock by the change of the scale's Allan deviation without it.

    Parameters
    ----------
    change, std : ndarray, shape (n_tau,)
        sigma_without / sigma_with - 1 at each judged tau, and its uncertainty. [1]
    s : AssessmentSettings

    Returns
    -------
    str
        "better without" (a fall beyond what_if_better_percent and what_if_sigma standard
        uncertainties at some tau), "leans on" (a rise beyond what_if_lean_percent at some tau),
        "not needed" (|change| below what_if_negligible_percent at every tau) or "minor".
    """
    ok = np.isfinite(change)
    if not ok.any():
        return "minor"
    c, u = change[ok], np.where(np.isfinite(std[ok]), std[ok], np.inf)
    if np.any((-c > s.what_if_better_percent / 100.0) & (-c > s.what_if_sigma * u)):
        return "better without"
    if np.any(c > s.what_if_lean_percent / 100.0):
        return "leans on"
    if np.all(np.abs(c) < s.what_if_negligible_percent / 100.0):
        return "not needed"
    return "minor"
