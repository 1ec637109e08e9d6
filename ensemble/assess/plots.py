"""Internal: PNG plots of an assessment (``ensemble assess --plots DIR``).

* ``assessment_overview.png``: every clock's own Hadamard deviation and the scale's estimate;
* ``assessment_<clock>.png`` per clock: its own Hadamard deviation with confidence intervals
  (upper bounds where the hat cannot separate it) against its type's typical curve and the
  scale; its white-FM level and its drift relative to the scale in the sliding windows, with
  the fitted trends.

Colours from the Okabe & Ito (2008) colour-blind-safe palette, with distinct markers and line
styles so that the plots also read in grey.  Each file is written to a temporary name in the
folder and renamed when complete.
"""

from __future__ import annotations

import math
import pathlib

import numpy as np

from ..atomic import atomic_output
from ..units import SECONDS_PER_DAY
from .verdict import type_label

#: Okabe & Ito palette (black first), cycled over clocks.
PALETTE = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00",
           "#CC79A7")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
_CLOCK, _TYPE, _SCALE = "#0072B2", "#E69F00", "#009E73"


def _figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: pathlib.Path) -> pathlib.Path:
    fig.tight_layout()
    with atomic_output(path) as tmp:
        fig.savefig(tmp, format="png")
    return path


def _grid_axes(ax, ylabel: str) -> None:
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("averaging time \u03c4 [s]")
    ax.set_ylabel(ylabel)
    ax.grid(True, which="major", color="#cccccc", linewidth=0.7)
    ax.grid(True, which="minor", color="#eeeeee", linewidth=0.5)


def write_plots(a, folder) -> list[pathlib.Path]:
    """Write the overview and one figure per clock into ``folder`` (which must exist).

    Returns
    -------
    list of pathlib.Path
        The files written.
    """
    folder = pathlib.Path(folder)
    d = a.details
    own, tau = d["own_hadamard"], d["grid_tau_s"]
    scale = d["scale_grid"]
    out = [_overview(a, own, tau, scale, folder / "assessment_overview.png")]
    for i, rec in enumerate(a.records):
        out.append(_clock(a, i, rec, own, tau, scale, d["ageing"],
                          folder / f"assessment_{rec.clock}.png"))
    return out


def _overview(a, own, tau, scale, path):
    fig = _figure(7.5, 5.0)
    ax = fig.add_subplot(1, 1, 1)
    for i, rec in enumerate(a.records):
        colour, marker = PALETTE[i % len(PALETTE)], MARKERS[i % len(MARKERS)]
        ok = own.resolved[i]
        ax.plot(tau[ok], own.deviation[i, ok], marker=marker, color=colour, linewidth=1.0,
                markersize=5, markeredgecolor="black", markeredgewidth=0.4,
                label=f"{rec.clock} ({rec.verdict})")
        ub = ~ok & np.isfinite(own.upper_bound[i])
        if ub.any():
            ax.plot(tau[ub], own.upper_bound[i, ub], linestyle="none", marker="v",
                    color=colour, markersize=5, alpha=0.6)
    good = np.isfinite(scale["hdev"])
    ax.plot(tau[good], scale["hdev"][good], color=_SCALE, linestyle="--", linewidth=2.0,
            label="scale (estimated)")
    _grid_axes(ax, "own Hadamard deviation")
    ax.set_title(f"own stability of each clock (N-cornered hat); \u25bd: upper bound",
                 fontsize=10)
    ax.legend(fontsize=7, ncol=2, loc="best", framealpha=0.9)
    return _save(fig, path)


def _clock(a, i, rec, own, tau, scale, age, path):
    from ..model.presets import expected_hdev

    fig = _figure(10.0, 4.8)
    ax = fig.add_subplot(1, 2, 1)
    ok = own.resolved[i] & np.isfinite(own.deviation[i])
    if ok.any():
        dev = own.deviation[i, ok]
        ax.errorbar(tau[ok], dev, yerr=[dev - own.lo[i, ok], own.hi[i, ok] - dev], fmt="o",
                    color=_CLOCK, markersize=5, capsize=3, markeredgecolor="black",
                    markeredgewidth=0.5, label=f"{rec.clock} ({100 * a.confidence:.3g} % "
                                                 f"intervals)")
    ub = ~ok & np.isfinite(own.upper_bound[i])
    if ub.any():
        ax.plot(tau[ub], own.upper_bound[i, ub], linestyle="none", marker="v", color=_CLOCK,
                alpha=0.6, label="upper bound (not separable)")
    if rec.type_compared:
        white_pm = math.sqrt(rec.noise.r_s2) if rec.noise is not None else 0.0
        ax.plot(tau, expected_hdev(rec.type_compared, tau, white_pm_s=white_pm), color=_TYPE,
                linestyle="-.", linewidth=1.5, label=f"typical: {type_label(rec.type_compared)}")
    good = np.isfinite(scale["hdev"])
    ax.plot(tau[good], scale["hdev"][good], color=_SCALE, linestyle="--", linewidth=1.5,
            label="scale (estimated)")
    _grid_axes(ax, "own Hadamard deviation")
    ax.set_title(f"{rec.clock}: {rec.verdict}", fontsize=10)
    ax.legend(fontsize=7, loc="best", framealpha=0.9)
    n_w = age.layout.n_windows
    ax_q = fig.add_subplot(2, 2, 2)
    ax_d = fig.add_subplot(2, 2, 4, sharex=ax_q)
    if n_w:
        x = age.layout.centre_mjd
        q1, q1s = age.q1_s[:, i], age.q1_std_s[:, i]
        fin = np.isfinite(q1)
        if fin.any():
            level = np.sqrt(q1[fin])
            ax_q.errorbar(x[fin], level, yerr=0.5 * q1s[fin] / level, fmt="s", color=_CLOCK,
                          markersize=4, capsize=2, label="white-FM level per window")
            _trend_line(ax_q, rec.white_fm_trend, x[fin], np.log(q1[fin]), q1s[fin] / q1[fin],
                        transform=lambda v: np.exp(0.5 * v))
        dr, drs = age.drift_per_s[:, i] * SECONDS_PER_DAY, age.drift_std_per_s[:, i] * \
            SECONDS_PER_DAY
        fin = np.isfinite(dr)
        if fin.any():
            ax_d.errorbar(x[fin], dr[fin], yerr=drs[fin], fmt="D", color=_CLOCK, markersize=4,
                          capsize=2, label="drift per window")
            _trend_line(ax_d, rec.drift_trend, x[fin], dr[fin], drs[fin])
    ax_q.set_ylabel("white FM, ADEV at 1 s")
    ax_q.grid(True, color="#dddddd", linewidth=0.6)
    ax_d.set_ylabel("drift vs scale [1/d]")
    ax_d.set_xlabel("window centre [MJD]")
    ax_d.grid(True, color="#dddddd", linewidth=0.6)
    ax_q.set_title(f"ageing ({age.layout.note})", fontsize=8)
    return _save(fig, path)


def _trend_line(ax, test, x, y, u, transform=None):
    """The weighted least-squares line of the trend test (same weights), drawn dashed."""
    if test is None or x.size < 2:
        return
    w = 1.0 / np.where(u > 0, u, np.inf) ** 2
    if not np.isfinite(w).all() or w.sum() == 0:
        return
    xm = np.average(x, weights=w)
    ym = np.average(y, weights=w)
    slope_per_day = test.slope * SECONDS_PER_DAY
    line = ym + slope_per_day * (x - xm)
    if transform is not None:
        line = transform(line)
    label = f"trend, p = {test.p_value:.2g}" + (" (significant)" if test.significant else "")
    ax.plot(x, line, color=_TYPE, linestyle="--", linewidth=1.2, label=label)
    ax.legend(fontsize=7, loc="best", framealpha=0.9)
