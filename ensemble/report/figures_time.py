"""Internal: the report's time plots (offsets, weights, steering) as PNG files.

Each function draws one figure with matplotlib's object API (Agg canvas, no display, no global
figure state), saves it to ``path`` and returns its one-line caption.  Long series are thinned
for drawing only (:mod:`.decimate`).  Time runs along x as UTC dates.
"""

from __future__ import annotations

import numpy as np

from . import style
from .decimate import bucket_means, envelope, spans

#: Resolution of every PNG [dots per inch].
DPI = 100
#: Clocks per page of offset panels.
CLOCKS_PER_PAGE = 10
#: Clocks drawn separately in the stacked weights (the others are summed).
WEIGHT_LAYERS = 9
#: Smallest mean weight drawn as a layer of its own [1].
WEIGHT_OWN_LAYER = 0.005
#: Hatches of the weight layers (with the colours, so that layers differ in grey print).
_HATCHES = ("", "//", "..", "xx", "\\\\", "++", "oo", "--", "||", "**")


def new_figure(width_in: float, height_in: float):
    """A matplotlib Figure on an Agg canvas (no display needed)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=DPI, facecolor="white")
    FigureCanvasAgg(fig)
    return fig


def save(fig, path) -> None:
    """Write the figure as PNG."""
    fig.savefig(path, format="png", dpi=DPI, facecolor="white")


def date_ticks(start_date: float, stop_date: float):
    """Tick positions, labels and the offset text ("2026") for a date axis (computed once).

    Parameters
    ----------
    start_date, stop_date : float
        Limits in matplotlib date numbers [d].
    """
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    values = locator.tick_values(mdates.num2date(start_date), mdates.num2date(stop_date))
    ticks = [float(v) for v in values if start_date <= v <= stop_date]
    formatter = mdates.ConciseDateFormatter(locator)
    labels = formatter.format_ticks(ticks)
    return ticks, labels, formatter.get_offset()


def date_axis(ax, ticks, labels=None, offset: str = "", label: bool = True) -> None:
    """UTC dates along x at fixed ticks (labels only where given)."""
    from matplotlib.ticker import FixedFormatter, FixedLocator, NullFormatter, NullLocator

    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_major_formatter(FixedFormatter(labels) if labels is not None
                                 else NullFormatter())
    if label:
        ax.set_xlabel("date (UTC)" + (f", {offset}" if offset else ""))


def x_limits(data) -> tuple[float, float]:
    """Date-number limits of the time plots: first epoch to last epoch + one interval."""
    x = style.mjd_to_date_number(data.mjd)
    return float(x[0]), float(x[-1]) + data.tau0_s / 86400.0


def _merged_spans(mjd, codes, code, step_d, min_gap_d):
    out = []
    for a, b in spans(mjd, codes, code, step_d):
        if out and a - out[-1][1] < min_gap_d:
            out[-1] = (out[-1][0], b)
        else:
            out.append((a, b))
    return out


def shade_standings(ax, mjd, codes, step_d: float) -> set:
    """Shade the spans of probation, excluded, removed and monitor; returns the codes shown."""
    shown = set()
    width = float(mjd[-1] - mjd[0]) if mjd.size > 1 else step_d
    for code, (colour, hatch, _label) in style.STANDING_STYLE.items():
        for a, b in _merged_spans(mjd, codes, code, step_d, width / 800.0):
            ax.axvspan(style.mjd_to_date_number(a), style.mjd_to_date_number(b),
                       facecolor=colour, alpha=style.SHADE_ALPHA, hatch=hatch,
                       edgecolor="#444444", linewidth=0.0, zorder=0)
            shown.add(code)
    return shown


def _quadratic_residual(mjd, y, skip):
    """y minus a least-squares quadratic in time over the finite points not in ``skip``."""
    t = mjd - mjd[0]
    ok = np.isfinite(y) & ~skip
    if ok.sum() < 4:
        return np.full_like(y, np.nan)
    poly = np.polynomial.Polynomial.fit(t[ok], y[ok], 2)
    return y - poly(t)


def _event_marks(ax, mjd, y, unit, events) -> set:
    """Mark events on the series y (value at the event epoch, interpolated); kinds shown."""
    shown = set()
    ok = np.isfinite(y)
    if not ok.any() or not len(events):
        return shown
    for kind, group in events.groupby("kind"):
        marker, colour, _ = style.event_style(kind)
        at = group["mjd"].to_numpy(dtype=float)
        value = np.interp(at, mjd[ok], y[ok]) / unit
        ax.plot(style.mjd_to_date_number(at), value, linestyle="none", marker=marker,
                markersize=7, markerfacecolor=colour, markeredgecolor="black",
                markeredgewidth=0.7, zorder=5)
        shown.add(kind)
    return shown


def _legend_handles(kinds: set, codes: set, line_label: str | None = None):
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = []
    if line_label:
        handles.append(Line2D([], [], color=style.LINE, linewidth=1.2, label=line_label))
    for kind in sorted(kinds):
        marker, colour, label = style.event_style(kind)
        text = label if kind in style.EVENT_STYLE else f"{label} ({kind})"
        handles.append(Line2D([], [], linestyle="none", marker=marker, markersize=7,
                              markerfacecolor=colour, markeredgecolor="black", label=text))
    for code in sorted(codes):
        colour, hatch, label = style.STANDING_STYLE[code]
        handles.append(Patch(facecolor=colour, alpha=0.45, hatch=hatch, edgecolor="#444444",
                             label=label))
    return handles


def plot_offset_page(data, columns, path) -> str:
    """One page of offset panels: per clock, its offset and the offset minus a quadratic fit.

    Parameters
    ----------
    data : ReportData
    columns : sequence of int
        Clock columns on this page.
    path : path-like
        PNG file.

    Returns
    -------
    str
        The caption.
    """
    rows = len(columns)
    row_in, top_in, bottom_in = 1.55, 0.55, 0.55
    height = top_in + bottom_in + row_in * rows
    fig = new_figure(11.0, height)
    axes = fig.subplots(rows, 2, sharex=True, squeeze=False)
    fig.subplots_adjust(left=0.075, right=0.985, top=1 - top_in / height,
                        bottom=bottom_in / height, wspace=0.16, hspace=0.42)
    mjd = data.mjd
    step_d = data.tau0_s / 86400.0
    x0, x1 = x_limits(data)
    ticks, labels, offset = date_ticks(x0, x1)
    events = data.window_events
    kinds, codes = set(), set()
    for r, j in enumerate(columns):
        clock = data.clocks[j]
        y = data.offset_s[:, j]
        mine = events[events["clock"] == clock] if len(events) else events
        outliers = np.zeros(mjd.size, dtype=bool)
        if len(mine):
            at = mine.loc[mine["kind"] == "outlier", "mjd"].to_numpy(dtype=float)
            outliers[np.searchsorted(mjd, at - 1e-6).clip(0, mjd.size - 1)] = True
        resid = _quadratic_residual(mjd, y, outliers)
        for c, (series, what) in enumerate(((y, "offset"), (resid, "residual"))):
            ax = axes[r, c]
            unit, unit_label = style.time_unit(series)
            td, yd = envelope(mjd, series)
            ax.plot(style.mjd_to_date_number(td), yd / unit, color=style.LINE, linewidth=0.8,
                    zorder=2)
            codes |= shade_standings(ax, mjd, data.state[:, j], step_d)
            kinds |= _event_marks(ax, mjd, series, unit, mine)
            ax.set_ylabel(f"{what} [{unit_label}]", fontsize=8)
            ax.tick_params(labelsize=7)
            ax.grid(True, color="#dddddd", linewidth=0.5)
            ax.set_xlim(x0, x1)
            title = (f"{clock}: clock \u2212 scale" if c == 0 else
                     f"{clock}: minus a quadratic fit (phase, frequency, drift)")
            ax.text(0.0, 1.03, title, transform=ax.transAxes, ha="left", va="bottom",
                    fontsize=8.5, fontweight="bold" if c == 0 else None)
            last = r == rows - 1
            date_axis(ax, ticks, labels if last else None, offset, label=last)
    handles = _legend_handles(kinds, codes)
    if handles:
        fig.legend(handles=handles, loc="upper center", ncol=min(6, len(handles)), fontsize=8,
                   frameon=False, bbox_to_anchor=(0.5, 1.0 - 0.05 / height))
    save(fig, path)
    names = ", ".join(data.clocks[j] for j in columns)
    return (f"Offset of each clock from the ensemble scale (left) and the same minus a "
            f"quadratic fitted over the shown span (right), with detected events and shaded "
            f"standings: {names}.")


def plot_weights(data, path) -> str:
    """Stacked weights of the clocks over time (the largest ones separately, others summed)."""
    w = np.where(np.isfinite(data.weight), data.weight, 0.0)
    mean = w.mean(axis=0)
    order = [int(j) for j in np.argsort(-mean, kind="stable")]
    top = [j for j in order[:WEIGHT_LAYERS] if mean[j] >= WEIGHT_OWN_LAYER]
    rest = [j for j in order if j not in top]
    layers = [w[:, j] for j in top]
    labels = [f"{data.clocks[j]} (mean {mean[j]:.3f})" for j in top]
    if rest:
        layers.append(w[:, rest].sum(axis=1))
        labels.append(f"{len(rest)} other clocks (mean {mean[rest].sum():.3f})")
    fig = new_figure(11.0, 3.8)
    ax = fig.add_subplot(1, 1, 1)
    if layers:
        td, means = bucket_means(data.mjd, np.column_stack(layers))
        dates = style.mjd_to_date_number(td)
        base = np.zeros(td.size)
        for k, label in enumerate(labels):
            top_edge = base + means[:, k]
            colour = "#BBBBBB" if (rest and k == len(labels) - 1) else \
                style.PALETTE[k % len(style.PALETTE)]
            # Hatch lines take the edge colour; the outline is drawn once, along the top only.
            ax.fill_between(dates, base, top_edge, facecolor=colour, alpha=0.85,
                            hatch=_HATCHES[k % len(_HATCHES)], edgecolor="#333333",
                            linewidth=0.0, label=label)
            ax.plot(dates, top_edge, color="#333333", linewidth=0.5)
            base = top_edge
    ax.set_ylim(0.0, 1.0)
    ax.set_ylabel("weight in the scale [1]")
    x0, x1 = x_limits(data)
    ax.set_xlim(x0, x1)
    ticks, labels, offset = date_ticks(x0, x1)
    date_axis(ax, ticks, labels, offset)
    ax.grid(True, color="#dddddd", linewidth=0.5)
    handles, names = ax.get_legend_handles_labels()
    ax.legend(handles[::-1], names[::-1], loc="center left", bbox_to_anchor=(1.01, 0.5),
              fontsize=8, frameon=False)             # top layer first, as stacked
    fig.tight_layout()
    save(fig, path)
    thinning = (" (means over runs of epochs)" if data.mjd.size > 1000 else "")
    others = (f"; the other {len(rest)} summed in grey" if rest else "")
    return (f"Weight of each clock in the scale, stacked (each epoch sums to 1){thinning}: "
            f"the {len(top)} largest on average drawn separately{others}.")


def _next_command_epochs(mjd, rows, interval_d):
    """For each command row, the epoch of the next command row (last: + interval)."""
    at = mjd[rows]
    nxt = np.empty_like(at)
    nxt[:-1] = at[1:]
    if at.size:
        nxt[-1] = at[-1] + interval_d
    return nxt


def plot_steering(data, path) -> str:
    """Phase error with its prediction, commanded changes with the step limit, and the total."""
    from ..steering.output import command_rows, total_corrections

    cols = data.steering
    s = data.steering_settings
    mjd = np.asarray(cols["mjd"], dtype=float)
    error = np.asarray(cols["phase_error"], dtype=float)
    change = np.asarray(cols["frequency_correction"], dtype=float)
    total = total_corrections(cols)
    rows = command_rows(cols)
    fig = new_figure(11.0, 7.0)
    axes = fig.subplots(3, 1, sharex=True, gridspec_kw={"height_ratios": [2.0, 1.2, 1.2]})

    ax = axes[0]
    pred = cols.get("predicted_phase_error")
    pred_sd = cols.get("predicted_phase_error_sd")
    scale_values = [error]
    if pred is not None and rows.size:
        scale_values.append(np.asarray(pred)[rows])
    unit, unit_label = style.time_unit(np.concatenate(scale_values))
    td, ed = envelope(mjd, error)
    ax.plot(style.mjd_to_date_number(td), ed / unit, color=style.LINE, linewidth=0.9,
            label="phase error: steered output \u2212 target")
    if pred is not None and rows.size:
        at = _next_command_epochs(mjd, rows, s.interval_d)
        p = np.asarray(pred, dtype=float)[rows]
        ok = np.isfinite(p)
        ax.plot(style.mjd_to_date_number(at[ok]), p[ok] / unit, linestyle="--",
                color="#D55E00", linewidth=0.9, marker="D", markersize=2.5,
                label="predicted at the next command epoch")
        if pred_sd is not None:
            u = np.asarray(pred_sd, dtype=float)[rows]
            band = ok & np.isfinite(u)
            ax.fill_between(style.mjd_to_date_number(at[band]), (p[band] - 2 * u[band]) / unit,
                            (p[band] + 2 * u[band]) / unit, facecolor="#E69F00", alpha=0.25,
                            hatch="///", edgecolor="#996600", linewidth=0.0,
                            label="prediction \u00b1 2 standard uncertainties")
    ax.axhline(0.0, color="#555555", linewidth=0.6)
    ax.set_ylabel(f"phase error [{unit_label}]")
    ax.legend(loc="best", fontsize=8, frameon=True, framealpha=0.85)

    ax = axes[1]
    f_unit, f_label = style.power_of_ten(np.concatenate([change, [s.max_step]]))
    applied = rows[change[rows] != 0] if rows.size else rows
    clipped = (np.asarray(cols["clipped"])[applied] != 0 if "clipped" in cols
               else np.zeros(applied.size, dtype=bool))
    dates = style.mjd_to_date_number(mjd[applied])
    ax.vlines(dates, 0.0, change[applied] / f_unit, color="#009E73", linewidth=1.0)
    ax.plot(dates[~clipped], change[applied][~clipped] / f_unit, linestyle="none", marker="o",
            markersize=3, color="#009E73", label="commanded change")
    if clipped.any():
        ax.plot(dates[clipped], change[applied][clipped] / f_unit, linestyle="none",
                marker="X", markersize=7, markerfacecolor="#D55E00", markeredgecolor="black",
                label="clipped by a limit")
    for sign in (-1, 1):
        ax.axhline(sign * s.max_step / f_unit, color="#D55E00", linestyle="--", linewidth=0.9,
                   label=f"step limit \u00b1{s.max_step:.3g}" if sign > 0 else None)
    ax.axhline(0.0, color="#555555", linewidth=0.6)
    ax.set_ylabel(f"change [{f_label}]")
    ax.legend(loc="best", fontsize=8, frameon=True, framealpha=0.85)

    ax = axes[2]
    t_unit, t_label = style.power_of_ten(np.concatenate([total, [s.max_total]]))
    td, tot = envelope(mjd, total)
    ax.plot(style.mjd_to_date_number(td), tot / t_unit, color="#CC79A7", linewidth=1.2,
            drawstyle="steps-post", label="total correction")
    for sign in (-1, 1):
        ax.axhline(sign * s.max_total / t_unit, color="#D55E00", linestyle=":", linewidth=1.1,
                   label=f"total limit \u00b1{s.max_total:.3g}" if sign > 0 else None)
    ax.axhline(0.0, color="#555555", linewidth=0.6)
    ax.set_ylabel(f"total [{t_label}]")
    ax.legend(loc="best", fontsize=8, frameon=True, framealpha=0.85)
    x0 = float(style.mjd_to_date_number(mjd[0]))
    x1 = float(style.mjd_to_date_number(mjd[-1])) + data.tau0_s / 86400.0
    ticks, labels, offset = date_ticks(x0, x1)
    for k, ax in enumerate(axes):
        ax.grid(True, color="#dddddd", linewidth=0.5)
        ax.set_xlim(x0, x1)
        date_axis(ax, ticks, labels if k == 2 else None, offset, label=(k == 2))
    fig.tight_layout(h_pad=0.8)
    save(fig, path)
    return ("Steering of the output (advisory): phase error with the prediction made at each "
            "command epoch, the commanded fractional-frequency changes with the step limit, "
            "and the total correction with its limit.")
