"""Log-log plot of a stability table with confidence intervals and noise types (internal module).

Each point is drawn with its confidence interval as an error bar; the marker's shape and colour
give the noise type identified at that tau (colours from the Okabe & Ito colour-blind-safe
palette, and distinct shapes so that the plot also reads in grey).  The PNG is written
atomically (temporary file in the same folder, renamed when complete).
"""

from __future__ import annotations

import os
from typing import Sequence

from ..atomic import atomic_output
from ..errors import InputError
from .noiseid import NOISE_CODES, NOISE_NAMES

#: Marker colour and shape per noise exponent alpha (Okabe & Ito 2008 palette).
NOISE_STYLE = {
    2: ("#0072B2", "o"),     # blue, circle
    1: ("#56B4E9", "s"),     # sky blue, square
    0: ("#009E73", "^"),     # bluish green, triangle up
    -1: ("#E69F00", "D"),    # orange, diamond
    -2: ("#D55E00", "v"),    # vermillion, triangle down
    -3: ("#CC79A7", "P"),    # reddish purple, plus (filled)
    -4: ("#000000", "X"),    # black, x (filled)
}

#: Axis labels per statistic.
STATISTIC_LABELS = {
    "adev": "Allan deviation (non-overlapping)",
    "oadev": "overlapping Allan deviation",
    "mdev": "modified Allan deviation",
    "tdev": "time deviation [s]",
    "hdev": "Hadamard deviation (non-overlapping)",
    "ohdev": "overlapping Hadamard deviation",
    "totdev": "total deviation",
}


def plot_stability(rows: Sequence, path: str | os.PathLike, *, statistic: str,
                   title: str | None = None, confidence: float | None = None) -> None:
    """Write a log-log PNG of a stability table.

    Parameters
    ----------
    rows : sequence of StabilityRow
        Rows of :func:`~ensemble.stability.stability_table` (tau [s], deviation, lo, hi, alpha).
    path : path-like
        Output PNG file (replaced atomically; its folder must exist).
    statistic : str
        The statistic's name (sets the axis label).
    title : str, optional
        Plot title.
    confidence : float, optional
        Confidence level of the intervals, shown in the legend title.
    """
    if not rows:
        raise InputError("nothing to plot: the stability table is empty")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 4.6), dpi=110)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    taus = [r.tau_s for r in rows]
    devs = [r.deviation for r in rows]
    ax.plot(taus, devs, color="#999999", linewidth=1.0, zorder=1)
    for alpha in sorted({r.alpha for r in rows}, reverse=True):
        sel = [r for r in rows if r.alpha == alpha]
        colour, marker = NOISE_STYLE[alpha]
        ax.errorbar([r.tau_s for r in sel], [r.deviation for r in sel],
                    yerr=[[r.deviation - r.lo for r in sel], [r.hi - r.deviation for r in sel]],
                    fmt=marker, color=colour, markersize=6, capsize=3, elinewidth=1.0,
                    markeredgecolor="black", markeredgewidth=0.5, zorder=2,
                    label=f"{NOISE_CODES[alpha]}  {NOISE_NAMES[alpha]}")
    ax.set_xscale("log")
    positive = [r.lo for r in rows if r.lo > 0]
    if positive:
        ax.set_yscale("log")
    ax.set_xlabel("averaging time \u03c4 [s]")
    ax.set_ylabel(STATISTIC_LABELS.get(statistic, statistic))
    ax.grid(True, which="major", color="#cccccc", linewidth=0.7)
    ax.grid(True, which="minor", color="#eeeeee", linewidth=0.5)
    legend_title = "noise type"
    if confidence is not None:
        legend_title += f"  (bars: {100 * confidence:.1f} % interval)"
    ax.legend(title=legend_title, fontsize=8, title_fontsize=8, loc="best", framealpha=0.9)
    if title:
        ax.set_title(title, fontsize=10)
    fig.tight_layout()
    with atomic_output(path) as tmp:
        fig.savefig(tmp, format="png")
