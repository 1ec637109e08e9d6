"""Internal: the report's HTML page (one self-contained file, inline CSS, no scripts).

The page refers to nothing outside its folder: no scripts, fonts, style sheets or remote
images; the only references are the PNG files written beside it.  Every value is escaped.
"""

from __future__ import annotations

import datetime as _dt
import html
import math
from dataclasses import dataclass

#: Marks the page as ours: a folder whose index.html carries it may be replaced by a new report.
GENERATOR = "ensemble report"

CSS = """
:root { --ink: #1a1a1a; --muted: #555; --rule: #c8c8c8; --band: #f3f3f3; }
* { box-sizing: border-box; }
body { font-family: system-ui, "Segoe UI", "Helvetica Neue", Arial, sans-serif; color: var(--ink);
       margin: 0 auto; max-width: 1180px; padding: 0 18px 40px; line-height: 1.4; font-size: 15px; }
header { border-bottom: 3px double var(--ink); padding: 14px 0 8px; }
h1 { font-size: 1.55em; margin: 0 0 4px; }
h2 { font-size: 1.2em; margin: 28px 0 8px; padding-bottom: 3px; border-bottom: 1px solid var(--rule); }
h3 { font-size: 1.0em; margin: 16px 0 6px; }
.sub { color: var(--muted); margin: 2px 0; }
.verdict { display: inline-block; margin-top: 6px; padding: 3px 10px; font-weight: 600;
           border: 2px solid var(--ink); }
.verdict.bad { border-style: dashed; background: #fde4d8; }
.verdict.good { background: #e3f1fb; }
nav { margin: 10px 0; font-size: 0.92em; }
nav a { margin-right: 12px; }
dl.glance { display: grid; grid-template-columns: max-content 1fr; gap: 3px 16px; margin: 6px 0; }
dl.glance dt { font-weight: 600; }
dl.glance dd { margin: 0; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 0.88em; }
th, td { border: 1px solid var(--rule); padding: 3px 7px; text-align: left; vertical-align: top; }
th { background: var(--band); }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.ci { color: var(--muted); font-size: 0.85em; display: block; }
.v-keep { background: #e3f1fb; } .v-watch { background: #fff4cc; }
.v-retire { background: #fde4d8; font-weight: 600; }
figure { margin: 10px 0 18px; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: 0.9em; color: var(--muted); margin-top: 3px; }
.notice { border-left: 4px solid var(--ink); background: var(--band); padding: 6px 10px; }
ol.cautions li, ul.plain li { margin: 2px 0; }
ul.reasons { margin: 0; padding-left: 18px; }
.small { font-size: 0.85em; color: var(--muted); }
footer { margin-top: 30px; border-top: 1px solid var(--rule); padding-top: 8px; }
@media print {
  body { max-width: none; font-size: 11pt; }
  nav { display: none; }
  figure, table { page-break-inside: avoid; }
  h2 { page-break-after: avoid; }
  a { color: inherit; text-decoration: none; }
}
"""

#: Symbols beside the verdict words, so that the verdict does not rest on colour.
VERDICT_MARK = {"keep": "\u2713", "watch": "!", "retire": "\u2717"}


@dataclass
class Picture:
    """One figure of the page: file name (beside index.html), caption, size in pixels."""

    file: str
    caption: str
    width: int
    height: int
    anchor: str = ""


def esc(value) -> str:
    """HTML-escaped text of a value."""
    return html.escape("" if value is None else str(value), quote=True)


def utc_of_mjd(mjd: float) -> str:
    """ISO 8601 UTC (to the second) of an MJD label (days of 86 400 s)."""
    base = _dt.datetime(1858, 11, 17, tzinfo=_dt.timezone.utc)
    return (base + _dt.timedelta(seconds=round(float(mjd) * 86400.0))).strftime(
        "%Y-%m-%d %H:%M:%SZ")


def num(value, spec: str, unit: str = "") -> str:
    """A formatted number, or an en dash for None/NaN."""
    if value is None:
        return "\u2013"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if not math.isfinite(v):
        return "\u2013"
    return f"{v:{spec}}{unit}"


def table(headers, rows, numeric=()) -> str:
    """An HTML table; ``rows`` hold already-escaped HTML cells; ``numeric`` column indices."""
    out = ["<table><thead><tr>"]
    out += [f"<th>{h}</th>" for h in headers]
    out.append("</tr></thead><tbody>")
    for row in rows:
        out.append("<tr>")
        for k, cell in enumerate(row):
            cls = ' class="num"' if k in numeric else ""
            out.append(f"<td{cls}>{cell}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def picture(p: Picture) -> str:
    """A <figure> with the image and its caption."""
    anchor = f' id="{esc(p.anchor)}"' if p.anchor else ""
    return (f'<figure{anchor}><img src="{esc(p.file)}" alt="{esc(p.caption)}" '
            f'width="{p.width}" height="{p.height}" loading="lazy">'
            f"<figcaption>{esc(p.caption)}</figcaption></figure>")


def document(title: str, header: str, nav: list, sections: list, footer: str) -> str:
    """The whole page."""
    links = "".join(f'<a href="#{esc(a)}">{esc(t)}</a>' for a, t in nav)
    body = "\n".join(sections)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<meta name=\"generator\" content=\"{GENERATOR}\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{esc(title)}</title><style>{CSS}</style></head><body>\n"
            f"<header>{header}<nav>{links}</nav></header>\n{body}\n"
            f"<footer class=\"small\">{footer}</footer>\n</body></html>\n")


def section(anchor: str, title: str, content: str) -> str:
    """One <section> with its heading."""
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>\n{content}\n</section>'


def verdict_cell(verdict) -> str:
    """A verdict with its symbol and a class for its background."""
    word = str(verdict)
    mark = VERDICT_MARK.get(word.lower(), "")
    cls = f"v-{word.lower()}" if word.lower() in VERDICT_MARK else ""
    return f'<span class="{cls}">{esc(mark)} {esc(word)}</span>' if mark else esc(word)


def reasons_cell(reasons) -> str:
    """A list of reasons as a bulleted list (an en dash when empty)."""
    items = list(reasons) if isinstance(reasons, (list, tuple)) else [reasons]
    items = [r for r in items if str(r).strip()]
    if not items:
        return "\u2013"
    return '<ul class="reasons">' + "".join(f"<li>{esc(r)}</li>" for r in items) + "</ul>"
