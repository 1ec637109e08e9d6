"""Internal: the report's stability figures (hat estimates of the clocks and of the scale).

Up to :data:`TOGETHER_MAX` clocks share one log-log plot, each with its own colour, marker and
line style.  With more clocks an overview shows every clock as a thin line beside the scale,
and pages of small panels give each clock with its intervals.
"""

from __future__ import annotations

import numpy as np

from . import style
from .figures_time import new_figure, save

#: Most clocks drawn together in one stability plot.
TOGETHER_MAX = 8
#: Panels per page of the per-clock stability plots (rows x columns).
PANEL_ROWS, PANEL_COLS = 5, 4
Y_LABEL = "overlapping Hadamard deviation [1]"
X_LABEL = "averaging time \u03c4 [s]"


def _days_axis(ax) -> None:
    top = ax.secondary_xaxis("top", functions=(lambda s: s / 86400.0, lambda d: d * 86400.0))
    top.set_xlabel("\u03c4 [d]", fontsize=8)
    top.tick_params(labelsize=7)


def _draw_clock(ax, st, i, sty, *, label=True, markersize=4.5) -> bool:
    """Resolved points with intervals and upper bounds of clock i; True if any bound drawn."""
    tau, dev, lo, hi = st.tau_s, st.deviation[i], st.lo[i], st.hi[i]
    ok = np.isfinite(dev)
    if ok.any():
        ax.errorbar(tau[ok], dev[ok], yerr=[dev[ok] - lo[ok], hi[ok] - dev[ok]],
                    color=sty["color"], marker=sty["marker"], linestyle=sty["linestyle"],
                    linewidth=1.0, markersize=markersize, capsize=2, elinewidth=0.8,
                    markeredgecolor="black", markeredgewidth=0.4,
                    label=st.clocks[i] if label else None)
    bound = ~ok & np.isfinite(hi)
    if bound.any():
        ax.plot(tau[bound], hi[bound], linestyle="none", marker="v", markersize=markersize + 1,
                markerfacecolor="none", markeredgecolor=sty["color"], markeredgewidth=1.1,
                label=(f"{st.clocks[i]} (upper bound)" if label and not ok.any() else None))
    return bool(bound.any())


def _draw_scale(ax, st, *, label=True) -> None:
    ok = np.isfinite(st.scale_deviation)
    if ok.any():
        ax.fill_between(st.tau_s[ok], st.scale_lo[ok], st.scale_hi[ok], facecolor="#999999",
                        alpha=0.35, hatch="..", edgecolor="#666666", linewidth=0.0)
        ax.plot(st.tau_s[ok], st.scale_deviation[ok], color=style.SCALE_COLOUR, linewidth=2.2,
                marker="*", markersize=8, label="scale (estimate)" if label else None)
    bound = ~ok & np.isfinite(st.scale_hi)
    if bound.any():
        ax.plot(st.tau_s[bound], st.scale_hi[bound], linestyle="none", marker="v", markersize=7,
                markerfacecolor="none", markeredgecolor=style.SCALE_COLOUR, markeredgewidth=1.3,
                label="scale (upper bound)" if label and not ok.any() else None)


def _log_axes(ax, fontsize=9) -> None:
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.grid(True, which="major", color="#cccccc", linewidth=0.6)
    ax.grid(True, which="minor", color="#eeeeee", linewidth=0.4)
    ax.set_xlabel(X_LABEL, fontsize=fontsize)
    ax.set_ylabel(Y_LABEL, fontsize=fontsize)


def _limits(ax, st) -> None:
    values = np.concatenate([st.lo[np.isfinite(st.lo)], st.hi[np.isfinite(st.hi)],
                             st.scale_lo[np.isfinite(st.scale_lo)]])
    values = values[values > 0]
    if values.size:
        ax.set_ylim(values.min() / 1.6, values.max() * 1.6)
    ax.set_xlim(st.tau_s[0] / 1.4, st.tau_s[-1] * 1.4)


def plot_stability_together(st, path) -> str:
    """All clocks and the scale in one log-log plot (for up to TOGETHER_MAX clocks)."""
    from matplotlib.lines import Line2D

    fig = new_figure(11.0, 5.6)
    ax = fig.add_subplot(1, 1, 1)
    handles = []
    any_bound = False
    for i in range(len(st.clocks)):
        sty = style.series_style(i)
        any_bound |= _draw_clock(ax, st, i, sty, label=False)
        resolved = bool(np.isfinite(st.deviation[i]).any())
        handles.append(Line2D([], [], color=sty["color"], marker=sty["marker"],
                              linestyle=sty["linestyle"], markeredgecolor="black",
                              markeredgewidth=0.4,
                              label=st.clocks[i] + ("" if resolved else " (upper bounds only)")))
    _draw_scale(ax, st, label=False)
    handles.append(Line2D([], [], color=style.SCALE_COLOUR, linewidth=2.2, marker="*",
                          markersize=8, label="scale (estimate)"))
    if any_bound or not np.isfinite(st.scale_deviation).all():
        handles.append(Line2D([], [], linestyle="none", marker="v", markerfacecolor="none",
                              markeredgecolor="black", markersize=7,
                              label="open \u25bd: upper bound (not resolved)"))
    _log_axes(ax)
    _limits(ax, st)
    _days_axis(ax)
    ax.legend(handles=handles, loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8,
              frameon=False)
    fig.tight_layout()
    save(fig, path)
    return _caption(st)


def _caption(st) -> str:
    return ("Stability of each clock (N-cornered hat of the pairwise offset differences, "
            f"{st.method}) and the scale's estimate, with 68.3 % intervals.")


def plot_stability_overview(st, path) -> str:
    """Every clock as a thin line (resolved points only) and the scale with its interval."""
    fig = new_figure(11.0, 5.0)
    ax = fig.add_subplot(1, 1, 1)
    for i in range(len(st.clocks)):
        ok = np.isfinite(st.deviation[i])
        if ok.any():
            ax.plot(st.tau_s[ok], st.deviation[i][ok], color="#7f7f7f", linewidth=0.6,
                    alpha=0.7, marker=".", markersize=2,
                    label="clocks (one line each)" if i == 0 else None)
    _draw_scale(ax, st)
    _log_axes(ax)
    _limits(ax, st)
    _days_axis(ax)
    handles, labels = ax.get_legend_handles_labels()
    unique = dict(zip(labels, handles))
    ax.legend(unique.values(), unique.keys(), loc="best", fontsize=8)
    fig.tight_layout()
    save(fig, path)
    return (f"Stability of all {len(st.clocks)} clocks (grey, one line each, resolved "
            f"estimates only) and the scale's estimate with its 68.3 % interval.")


def _decade_ticks(lo: float, hi: float) -> list[float]:
    """Powers of ten from below lo to above hi."""
    return [10.0 ** k for k in range(int(np.floor(np.log10(lo))), int(np.ceil(np.log10(hi))) + 1)]


def plot_stability_page(st, rows, path) -> str:
    """Small panels, one per clock (indices ``rows``), each with the scale for reference.

    The panels share their axes, with fixed decade ticks and no minor ticks (drawing the
    ticks of many log axes is what takes time).
    """
    from matplotlib.ticker import FixedLocator, LogFormatterSciNotation, NullLocator

    n = len(rows)
    n_rows = -(-n // PANEL_COLS)
    row_in, top_in, bottom_in = 2.2, 0.15, 0.6
    height = top_in + bottom_in + row_in * n_rows
    fig = new_figure(11.0, height)
    axes = fig.subplots(n_rows, PANEL_COLS, sharex=True, sharey=True, squeeze=False)
    fig.subplots_adjust(left=0.08, right=0.99, top=1 - top_in / height,
                        bottom=bottom_in / height, wspace=0.06, hspace=0.22)
    _limits(axes[0, 0], st)
    x_lo, x_hi = axes[0, 0].get_xlim()
    y_lo, y_hi = axes[0, 0].get_ylim() if axes[0, 0].get_yscale() == "log" else (1e-16, 1e-10)
    for k, ax in enumerate(axes.ravel()):
        if k >= n:
            ax.set_visible(False)
            continue
        i = rows[k]
        _draw_clock(ax, st, i, {"color": style.LINE, "marker": "o", "linestyle": "-"},
                    label=False, markersize=3.5)
        ok = np.isfinite(st.scale_deviation)
        ax.plot(st.tau_s[ok], st.scale_deviation[ok], color=style.SCALE_COLOUR, linewidth=1.0,
                linestyle="--")
        ax.text(0.03, 0.04, st.clocks[i], transform=ax.transAxes, fontsize=9,
                fontweight="bold", ha="left", va="bottom",
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1.5})
        ax.set_xscale("log")
        ax.set_yscale("log")
        for axis, (lo, hi) in ((ax.xaxis, (x_lo, x_hi)), (ax.yaxis, (y_lo, y_hi))):
            axis.set_major_locator(FixedLocator(_decade_ticks(lo, hi)))
            axis.set_minor_locator(NullLocator())
            axis.set_major_formatter(LogFormatterSciNotation())
        ax.set_xlim(x_lo, x_hi)
        ax.set_ylim(y_lo, y_hi)
        ax.grid(True, color="#cccccc", linewidth=0.6)
        ax.tick_params(labelsize=7)
        if k % PANEL_COLS == 0:
            ax.set_ylabel(Y_LABEL if k == PANEL_COLS * (n_rows // 2) else "[1]", fontsize=7)
        if k >= n - PANEL_COLS:
            ax.set_xlabel(X_LABEL, fontsize=7)
    save(fig, path)
    names = f"{st.clocks[rows[0]]} to {st.clocks[rows[-1]]}"
    return (f"Stability of {names} (blue circles with 68.3 % intervals, open \u25bd upper "
            f"bounds) against the scale's estimate (black dashed).")
