"""Internal: the content of each section of the report page, as HTML.

Each function takes the :class:`~ensemble.report.collect.ReportData` (and the pictures made
for its section) and returns the section's HTML.  Values are shown in the archive's units with
a readable prefix: offsets in ns, frequencies dimensionless, drift per day.
"""

from __future__ import annotations

import os

import numpy as np

from .page import (Picture, esc, num, picture, reasons_cell, section, table, utc_of_mjd,
                   verdict_cell)
from .style import duration_text

#: Sections in page order: (anchor, title).
SECTIONS = (
    ("glance", "At a glance"),
    ("clocks", "Clocks now"),
    ("events", "Recent events"),
    ("offsets", "Offsets from the scale"),
    ("weights", "Weights"),
    ("stability", "Stability"),
    ("steering", "Steering"),
    ("assessment", "Assessment"),
    ("runs", "Runs"),
)
TITLES = dict(SECTIONS)
#: Tables longer than this many rows can be folded away.
LONG_TABLE = 20


def _state_counts(summary) -> str:
    counts: dict = {}
    for c in summary["clocks"]:
        counts[c["state"]] = counts.get(c["state"], 0) + 1
    return ", ".join(f"{n} {esc(s)}" for s, n in sorted(counts.items(), key=lambda kv: -kv[1]))


def header(data, version: str, made_utc: str) -> str:
    """Title, span, software versions and the verifier's verdict."""
    s = data.summary
    span = s["span"]
    name = os.path.basename(data.path)
    lines = [f"<h1>Ensemble report: {esc(name)}</h1>"]
    if span:
        step = duration_text(span["interval_s"]) if span["interval_s"] else "?"
        lines.append(f'<p class="sub">{esc(span["first_utc"])} to {esc(span["last_utc"])} '
                     f'(MJD {span["first_mjd"]:.4f} to {span["last_mjd"]:.4f}), '
                     f'{s["n_epochs"]} epochs every {esc(step)}, {len(s["clocks"])} clocks</p>')
    lines.append(f'<p class="sub">archive written by ensemble {esc(s["software_version"])}, '
                 f'format {esc(s["format_version"])}, created {esc(s["created_utc"])}; '
                 f'report made {esc(made_utc)} by ensemble {esc(version)}</p>')
    if s["conformant"]:
        lines.append(f'<div class="verdict good">\u2713 archive conforms to format '
                     f'{esc(s["format_version"])} (verifier)</div>')
    else:
        items = "".join(f"<li>{esc(p)}</li>" for p in s["problems"][:20])
        more = (f"<li>and {len(s['problems']) - 20} more</li>" if len(s["problems"]) > 20
                else "")
        lines.append(f'<div class="verdict bad">\u2717 archive does NOT conform to format '
                     f'{esc(s["format_version"])}: {len(s["problems"])} problem(s)</div>'
                     f'<ul class="plain">{items}{more}</ul>')
    return "\n".join(lines)


def glance(data) -> str:
    """The one-minute summary."""
    s = data.summary
    rows = []
    if data.days is not None:
        rows.append(("shown", f"the last {data.days:g} days: {utc_of_mjd(data.mjd[0])} to "
                              f"{utc_of_mjd(data.mjd[-1])} ({data.mjd.size} epochs)"))
    else:
        rows.append(("shown", f"the whole archive ({data.mjd.size} epochs)"))
    rows.append(("standings now", _state_counts(s) or "no clocks"))
    others = [c for c in s["clocks"] if c["state"] != "active"]
    if others:
        listed = ", ".join(f"{esc(c['clock'])} {esc(c['state'])}" for c in others[:12])
        more = f" and {len(others) - 12} more" if len(others) > 12 else ""
        rows.append(("not active now", listed + more))
    heavy = sorted((c for c in s["clocks"] if (c.get("weight") or 0.0) >= 0.0005),
                   key=lambda c: -c["weight"])[:5]
    if heavy:
        rows.append(("largest weights now", ", ".join(f"{esc(c['clock'])} {c['weight']:.3f}"
                                                      for c in heavy)))
    ev = s["events"]
    kinds = ", ".join(f"{v} {esc(k)}" for k, v in ev["by_kind"].items()) or "none"
    in_window = len(data.window_events)
    rows.append(("events", f"{ev['count']} in the archive ({kinds}); {in_window} in the shown "
                           f"span"))
    if ev["recent"]:
        e = ev["recent"][-1]
        rows.append(("latest event", f"{esc(e['utc'])} {esc(e['clock'])} {esc(e['kind'])} "
                                     f"({_magnitude(e['kind'], e['magnitude'])})"))
    if data.steering is not None:
        error = np.asarray(data.steering["phase_error"], dtype=float)
        error = error[np.isfinite(error)]
        error_ns = float(error[-1]) * 1e9 if error.size else float("nan")
        total = data.steering.get("total_correction")
        total_now = float(total[-1]) if total is not None and len(total) else float("nan")
        limit = data.steering_settings.max_total
        rows.append(("steering now", f"phase error {num(error_ns, '+.3f', ' ns')}, total "
                                     f"correction {num(total_now, '+.3e')} (limit "
                                     f"\u00b1{limit:.3g}); advisory, see the cautions"))
    else:
        rows.append(("steering now", "no steering rows in the shown span"))
    st = data.stability
    if st is not None:
        parts = []
        for k in _tau_columns(st)[:2]:
            d, hi = st.scale_deviation[k], st.scale_hi[k]
            value = f"{d:.2g}" if np.isfinite(d) else (f"&lt; {hi:.2g}" if np.isfinite(hi) else "")
            if value:
                parts.append(f"{value} at \u03c4 = {esc(duration_text(st.tau_s[k]))}")
        if parts:
            rows.append(("scale stability", ", ".join(parts) + " (estimate, overlapping "
                                                               "Hadamard deviation)"))
    counts = data.assessment.counts()
    if counts:
        text = ", ".join(f"{n} {verdict_cell(v)}" for v, n in sorted(counts.items()))
    else:
        text = esc(data.assessment.notice)
    rows.append(("assessment", text))
    if s["runs"]:
        last = s["runs"][-1]
        rows.append(("runs", f"{s['run_count']}; the last {esc(last['time_utc'])} "
                             f"({esc(last['mode'])}, +{last['epochs_added']} epochs from "
                             f"{esc(last['input_name'])})"))
    items = "".join(f"<dt>{esc(k)}</dt><dd>{v}</dd>" for k, v in rows)
    return section("glance", TITLES["glance"], f'<dl class="glance">{items}</dl>')


def clocks_now(data) -> str:
    """Standing, weight, offset, frequency and drift of each clock at the last epoch."""
    rows = []
    for c in data.summary["clocks"]:
        offset = c.get("offset_s")
        rows.append([esc(c["clock"]), esc(c["state"]), num(c["weight"], ".4f"),
                     num(None if offset is None else offset * 1e9, "+.3f"),
                     num(c.get("frequency"), "+.3e"), num(c.get("drift_per_day"), "+.3e"),
                     esc(utc_of_mjd(c["last_seen_mjd"])) if c.get("last_seen_mjd") else "never"])
    body = table(["clock", "standing", "weight", "offset [ns]", "frequency [1]",
                  "drift [1/d]", "last measured (UTC)"], rows, numeric=(2, 3, 4, 5))
    note = ('<p class="small">At the last epoch of the archive; offset = clock \u2212 scale, '
            'frequency and drift relative to the scale.</p>')
    if len(rows) > LONG_TABLE:
        body = (f"<details open><summary>{len(rows)} clocks (click to fold)</summary>{body}"
                f"</details>")
    return section("clocks", TITLES["clocks"], body + note)


def _magnitude(kind: str, value) -> str:
    if kind in ("outlier", "phase_step") or kind.startswith("reference"):
        return num(None if value is None else value * 1e9, "+.3f", " ns")
    if kind == "drift_change":
        return num(value, "+.3e", " /d")
    return num(value, "+.3e")


def recent_events(data) -> str:
    """The last events of the archive."""
    ev = data.summary["events"]
    if not ev["recent"]:
        return section("events", TITLES["events"], "<p>No events in the archive.</p>")
    rows = [[esc(e["utc"]), num(e["mjd"], ".4f"), esc(e["clock"]), esc(e["kind"]),
             _magnitude(e["kind"], e["magnitude"]), num(e["score"], ".1f")]
            for e in reversed(ev["recent"])]
    body = table(["time (UTC)", "MJD", "clock", "kind", "magnitude", "score"], rows,
                 numeric=(1, 4, 5))
    note = (f'<p class="small">The last {len(rows)} of {ev["count"]} events, newest first. '
            f'Magnitude: ns for outliers and phase steps, fractional frequency for frequency '
            f'steps, per day for drift changes.</p>')
    return section("events", TITLES["events"], body + note)


def offsets(data, pictures: list[Picture], pages: list[list[int]]) -> str:
    """The pages of offset panels, with an index of the clocks."""
    links = []
    for p, cols in zip(pictures, pages):
        for j in cols:
            links.append(f'<a href="#{esc(p.anchor)}">{esc(data.clocks[j])}</a>')
    index = ('<p class="small">Clocks: ' + " \u00b7 ".join(links) + "</p>"
             if len(pictures) > 1 else "")
    intro = ('<p>Left: each clock\'s offset from the ensemble scale (clock \u2212 scale). '
             'Right: the same minus a quadratic fitted over the shown span, which leaves the '
             'clock\'s wander, steps and outliers visible. Markers give the detected events '
             '(shape and colour by kind); shaded spans the standings other than active '
             '(hatching by standing).</p>')
    return section("offsets", TITLES["offsets"],
                   intro + index + "\n".join(picture(p) for p in pictures))


def weights(data, pictures: list[Picture]) -> str:
    return section("weights", TITLES["weights"], "\n".join(picture(p) for p in pictures))


def _tau_columns(st) -> list[int]:
    wanted = [0]
    for days in (1.0, 10.0, 100.0):
        k = int(np.argmin(np.abs(st.tau_s - days * 86400.0)))
        if abs(st.tau_s[k] - days * 86400.0) < 1e-6 * days * 86400.0:
            wanted.append(k)
    wanted.append(len(st.tau_s) - 1)
    return sorted(set(wanted))


def _stability_cell(st, i, k) -> str:
    dev, lo, hi = st.deviation[i, k], st.lo[i, k], st.hi[i, k]
    if np.isfinite(dev):
        code = st.noise[i, k]
        return (f"{dev:.3g}<span class=\"ci\">[{lo:.3g}, {hi:.3g}]"
                f"{' ' + esc(code) if code else ''}</span>")
    if np.isfinite(hi):
        return f"&lt; {hi:.3g}<span class=\"ci\">not resolved</span>"
    return "\u2013"


def stability(data, pictures: list[Picture]) -> str:
    """Stability figures, a table at selected averaging times, and how it was estimated."""
    st = data.stability
    if st is None:
        return section("stability", TITLES["stability"],
                       '<p class="notice">No stability estimate: the N-cornered hat needs at '
                       'least three clocks with data, and enough epochs, in the shown span.</p>')
    cols = _tau_columns(st)
    headers = ["clock"] + [f"\u03c4 = {esc(duration_text(st.tau_s[k]))}" for k in cols]
    rows = [[esc(c)] + [_stability_cell(st, i, k) for k in cols]
            for i, c in enumerate(st.clocks)]
    scale_row = ["<b>scale (estimate)</b>"]
    for k in cols:
        d, lo, hi = st.scale_deviation[k], st.scale_lo[k], st.scale_hi[k]
        scale_row.append(f"{d:.3g}<span class=\"ci\">[{lo:.3g}, {hi:.3g}]</span>"
                         if np.isfinite(d) else
                         (f"&lt; {hi:.3g}" if np.isfinite(hi) else "\u2013"))
    rows.append(scale_row)
    text = [
        '<p>Overlapping Hadamard deviation (insensitive to linear frequency drift) of each '
        f'clock over the shown span, separated by the N-cornered hat ({esc(st.method)}) from '
        'the pair differences offset<sub>i</sub> \u2212 offset<sub>j</sub> = clock<sub>i</sub> '
        '\u2212 clock<sub>j</sub>, which hold no scale. Detected outliers are left out and '
        'detected phase steps taken out before; frequency steps stay in. Brackets: 68.3 % '
        'interval (chi-squared with the effective degrees of freedom of the hat estimate), '
        'then the noise type found on the clock\'s offset. "&lt;": the estimate is below '
        'its uncertainty, so only an upper bound is given.</p>',
        '<p>The scale\'s line is an estimate, not a measurement: '
        '\u03c3<sub>scale</sub>\u00b2 = \u03a3<sub>j</sub> \u27e8w<sub>j</sub>\u00b2\u27e9 '
        '\u03c3<sub>j</sub>\u00b2, the clocks\' hat variances (negative ones as 0) combined '
        'with the mean squared weights over the span, as for independent clocks.</p>',
    ]
    notes = "".join(f"<li>{esc(n)}</li>" for n in st.notes[:30])
    more = f"<li>and {len(st.notes) - 30} more</li>" if len(st.notes) > 30 else ""
    values = table(headers, rows, numeric=tuple(range(1, len(headers))))
    if len(rows) > LONG_TABLE:
        values = (f"<details open><summary>{len(rows) - 1} clocks and the scale (click to "
                  f"fold)</summary>{values}</details>")
    body = ("\n".join(picture(p) for p in pictures) + "".join(text) + values
            + (f'<ul class="plain small">{notes}{more}</ul>' if notes else ""))
    return section("stability", TITLES["stability"], body)


def steering(data, pictures: list[Picture], summary_lines: list[str], cautions) -> str:
    """Steering summary, figure and the cautions (always shown)."""
    parts = []
    if data.steering is None:
        parts.append('<p class="notice">No steering rows in the shown span.</p>')
    else:
        parts.append('<ul class="plain">' + "".join(f"<li>{esc(line)}</li>"
                                                    for line in summary_lines) + "</ul>")
        parts.extend(picture(p) for p in pictures)
    s = data.steering_settings
    parts.append(f'<p class="small">Limits: {s.max_step:.3g} per command, {s.max_total:.3g} '
                 f'in total; policy {esc(s.policy)}, a command every {s.interval_d:g} d. '
                 f'A positive change makes the output run faster; phase error = steered '
                 f'output \u2212 target.</p>')
    items = "".join(f"<li>{esc(c)}</li>" for c in cautions)
    parts.append(f'<h3>Cautions</h3><ol class="cautions">{items}</ol>')
    return section("steering", TITLES["steering"], "\n".join(parts))


def _assessment_table(t, verdicts: bool) -> str:
    headers = []
    for c in t.columns:
        unit = t.units.get(c, "") if isinstance(t.units, dict) else ""
        headers.append(esc(c) + (f" [{esc(unit)}]" if unit and unit not in ("none", "") else ""))
    rows = []
    for r in t.rows:
        cells = []
        for c, v in zip(t.columns, r):
            if c == "verdict":
                cells.append(verdict_cell(v))
            elif c == "reasons":
                cells.append(reasons_cell(v))
            elif isinstance(v, float):
                cells.append(num(v, ".4g"))
            else:
                cells.append(esc(v))
        rows.append(cells)
    title = "" if verdicts else f"<h3>{esc(t.title)}</h3>"
    desc = f'<p class="small">{esc(t.description)}</p>' if t.description else ""
    more = (f'<p class="small">{t.omitted} more rows not shown.</p>' if t.omitted else "")
    return title + desc + table(headers, rows) + more


def assessment(data) -> str:
    """The verdict table (clock, verdict, reasons), other assessment tables, or the notice."""
    view = data.assessment
    parts = [f'<p class="notice">{esc(view.notice)}</p>']
    if view.verdicts is not None:
        parts.append(_assessment_table(view.verdicts, True))
    for t in view.tables:
        parts.append(_assessment_table(t, False))
    if view.values:
        parts.append(table(["name", "value"], [[esc(k), esc(v)] for k, v in view.values]))
    return section("assessment", TITLES["assessment"], "\n".join(parts))


def runs(data) -> str:
    """The runs that wrote the archive (provenance)."""
    s = data.summary
    rows = [[esc(r["time_utc"]), esc(r["mode"]), esc(r["software_version"]),
             esc(r["input_name"]), f"<code>{esc(r['input_sha256'][:16])}</code>",
             str(r["epochs_added"]),
             num(r["first_mjd"], ".4f"), num(r["last_mjd"], ".4f")] for r in reversed(s["runs"])]
    body = table(["time (UTC)", "mode", "ensemble", "input", "input SHA-256 (start)",
                  "epochs added", "first MJD", "last MJD"], rows, numeric=(5, 6, 7))
    shown = (f"the last {len(rows)} of {s['run_count']}" if len(rows) < s["run_count"]
             else f"all {len(rows)}")
    return section("runs", TITLES["runs"],
                   body + f'<p class="small">Runs that wrote the archive: {shown}, newest '
                          f'first.</p>')


def footer(data) -> str:
    """How the pictures were made."""
    notes = "".join(f"<li>{esc(n)}</li>" for n in data.notes)
    return ("<p>Long series are thinned for the pictures only: each line keeps the smallest "
            "and largest value of every run of consecutive epochs (about 1000 runs per "
            "panel), so extremes stay visible; stacked weights keep the run means. Every "
            "statistic uses all epochs of the shown span. Colours: Okabe &amp; Ito "
            "colour-blind-safe palette; markers, line styles and hatching tell the same "
            "apart in grey print.</p>"
            + (f'<ul class="plain">{notes}</ul>' if notes else ""))
