"""Internal: colours, markers, line styles and units of the report's figures.

Colours come from the Okabe & Ito colour-blind-safe palette (Okabe M., Ito K. (2008), "Color
Universal Design (CUD): how to make figures and presentations that are friendly to colorblind
people", J*Fly, https://jfly.uni-koeln.de/color/).  Nothing is told by colour alone: every
series also has its own marker and line style, and shaded spans their own hatching, so the
figures read in grey-scale print as well.
"""

from __future__ import annotations

import math

import numpy as np

from ..units import MJD_UNIX_EPOCH

#: Okabe & Ito (2008) palette, in the order series are given colours.  Black is kept for the
#: time scale, so it is not among the clock colours.
PALETTE = (
    "#0072B2",   # blue
    "#E69F00",   # orange
    "#009E73",   # bluish green
    "#D55E00",   # vermillion
    "#56B4E9",   # sky blue
    "#CC79A7",   # reddish purple
    "#F0E442",   # yellow (light: always drawn with dark-edged markers)
)
#: Markers and line styles cycled with the colours.  The downward triangle is not among them:
#: it marks upper bounds.
MARKERS = ("o", "s", "^", "D", "P", "X", "*", "<")
LINESTYLES = ("-", "--", "-.", ":")

#: Marker, colour and legend label of each event kind (colour doubles the shape, never alone).
EVENT_STYLE = {
    "outlier": ("o", "#D55E00", "outlier"),
    "phase_step": ("^", "#0072B2", "phase step"),
    "frequency_step": ("s", "#009E73", "frequency step"),
    "drift_change": ("D", "#CC79A7", "drift change"),
}
#: Style of ``reference_*`` and any other kind.
REFERENCE_EVENT_STYLE = ("P", "#E69F00", "reference event")
OTHER_EVENT_STYLE = ("*", "#000000", "other event")

#: Shading of the standings other than active: face colour, hatch, legend label.  Absent spans
#: are left blank (the line has no points there).
STANDING_STYLE = {
    1: ("#F0E442", "//", "probation"),
    3: ("#D55E00", "xx", "excluded"),
    4: ("#555555", "..", "removed"),
    5: ("#56B4E9", "\\\\", "monitor"),
}
#: Opacity of the standing shading.
SHADE_ALPHA = 0.22

#: Main line colour of single-series panels and of the time scale in the stability plot.
LINE = "#0072B2"
SCALE_COLOUR = "#000000"


def series_style(k: int) -> dict:
    """Colour, marker and line style of the k-th series of a multi-series plot."""
    return {"color": PALETTE[k % len(PALETTE)], "marker": MARKERS[k % len(MARKERS)],
            "linestyle": LINESTYLES[k % len(LINESTYLES)]}   # (colour, style) unique for k < 28


def event_style(kind: str) -> tuple[str, str, str]:
    """(marker, colour, label) of an event kind."""
    if kind in EVENT_STYLE:
        return EVENT_STYLE[kind]
    if kind.startswith("reference"):
        return REFERENCE_EVENT_STYLE
    return OTHER_EVENT_STYLE


_PREFIXES = ((1.0, ""), (1e-3, "m"), (1e-6, "\u00b5"), (1e-9, "n"), (1e-12, "p"),
             (1e-15, "f"))


def time_unit(values_s) -> tuple[float, str]:
    """Scale factor and unit label for showing times in seconds with a readable prefix.

    Parameters
    ----------
    values_s : array_like
        Times (offsets, phase errors). [s]

    Returns
    -------
    (float, str)
        Divide the values by the factor to show them in the unit (``s``, ``ms``, ``µs``, ``ns``,
        ``ps`` or ``fs``); the largest absolute finite value then lies in [1, 1000) where
        possible.
    """
    v = np.asarray(values_s, dtype=float)
    v = np.abs(v[np.isfinite(v)])
    top = float(v.max()) if v.size else 0.0
    if top == 0.0:
        return 1e-9, "ns"
    for factor, prefix in _PREFIXES:
        if top >= factor:
            return factor, prefix + "s"
    return _PREFIXES[-1][0], _PREFIXES[-1][1] + "s"


def power_of_ten(values) -> tuple[float, str]:
    """A power of ten and its label ("1e-15") for showing small dimensionless values.

    Parameters
    ----------
    values : array_like
        Dimensionless values (fractional frequency). [1]
    """
    v = np.asarray(values, dtype=float)
    v = np.abs(v[np.isfinite(v) & (v != 0)])
    if not v.size:
        return 1e-15, "1e-15"
    exponent = int(math.floor(math.log10(float(v.max()))))
    return 10.0 ** exponent, f"1e{exponent}"


def duration_text(seconds: float) -> str:
    """A duration in the largest whole-ish unit: ``3600 s`` -> ``1 h``, ``864000 s`` -> ``10 d``."""
    s = float(seconds)
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if s >= size:
            return f"{s / size:.3g} {unit}"
    return f"{s:.3g} s"


def mjd_to_date_number(mjd):
    """MJD (UTC) -> matplotlib date numbers (days since 1970-01-01, MJD 40587)."""
    return np.asarray(mjd, dtype=float) - MJD_UNIX_EPOCH
