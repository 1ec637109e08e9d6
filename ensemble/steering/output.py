"""Steering records as archive columns, the operator's command CSV, the summary and the cautions.

The archive's ``/steering`` table holds one row per epoch (contract columns ``mjd``,
``frequency_correction``, ``phase_error``, plus the extra columns of :data:`STEERING_COLUMNS`).
The command CSV holds the command epochs only, with the change in the synthesizer's units.
"""

from __future__ import annotations

import csv
import datetime as _dt
import json
import math
import operator

import numpy as np

from ..atomic import atomic_output
from ..errors import InputError
from ..units import SECONDS_PER_DAY
from .controller import CLIP_NAMES, REASONS, SteeringRecord
from .settings import SteeringSettings

#: Columns of the ``/steering`` table: name -> (dtype, units, description).
STEERING_COLUMNS = {
    "mjd": ("f8", "d", "epoch of the row, MJD UTC"),
    "frequency_correction": ("f8", "1", "change of the steered output's commanded fractional "
                                        "frequency at this epoch (positive: runs faster); 0 when none"),
    "phase_error": ("f8", "s", "steered output - target, before this epoch's change"),
    "frequency_error": ("f8", "1", "fractional frequency of the steered output relative to the "
                                   "target, before this epoch's change"),
    "drift_error": ("f8", "1/d", "frequency drift of the steered output relative to the target"),
    "total_correction": ("f8", "1", "sum of all applied changes after this epoch's change"),
    "proposed_correction": ("f8", "1", "the policy's change before dead band and limits; NaN "
                                       "when not computed"),
    "predicted_phase_error": ("f8", "s", "phase error expected at the next command epoch after "
                                         "this epoch's change"),
    "predicted_phase_error_sd": ("f8", "s", "standard uncertainty of predicted_phase_error"),
    "command_epoch": ("i1", "1", "1 at a scheduled command epoch, 0 between commands"),
    "clipped": ("i1", "1", "limit that clipped the change (codes attribute)"),
    "reason": ("i1", "1", "why the change is what it is (codes attribute)"),
}
#: ``codes`` attributes (JSON object code -> name) of the coded columns.
COLUMN_CODES = {"clipped": {str(k): v for k, v in CLIP_NAMES.items()},
                "reason": {str(i): name for i, name in enumerate(REASONS)}}
#: Columns the contract requires.
CONTRACT_COLUMNS = ("mjd", "frequency_correction", "phase_error")
#: Units of the command CSV: token -> (column suffix, factor from fractional frequency, label).
UNITS = {"fractional": ("", 1.0, "fractional frequency (dimensionless)"),
         "hz": ("_hz", None, "Hz at the nominal frequency"),
         "ps/s": ("_ps_per_s", 1e12, "ps/s"),
         "ns/day": ("_ns_per_day", 1e9 * SECONDS_PER_DAY, "ns/day")}

CAUTIONS = (
    "These commands are advice for an operator, or for an automated loop the laboratory has "
    "approved; they change nothing by themselves.",
    "Apply each change gradually, within the tolerance of the distribution system and of every "
    "user downstream of the steered output.",
    "Never exceed the configured limits; commands beyond them were clipped and are marked.",
    "Confirm the effect with independent monitoring (a second comparison or an outside link) "
    "before and after each change; on stale or doubtful input hold the present frequency.",
    "Steer the output only: never steer a clock that contributes to the ensemble or to "
    "international time.",
    "The laboratory's procedures and change management, and any applicable regulation, take "
    "precedence over this tool.",
)


def cautions_text(settings: SteeringSettings | None = None) -> str:
    """The cautions as printed by ``ensemble steer`` (with the limits in force)."""
    lines = ["CAUTIONS"]
    for i, text in enumerate(CAUTIONS, 1):
        if i == 3 and settings is not None:
            text += (f" (now: {settings.max_step:.3g} per command, {settings.max_total:.3g} "
                     f"total)")
        lines.append(f"  {i}. {text}")
    return "\n".join(lines)


def records_to_columns(records: list[SteeringRecord]) -> dict[str, np.ndarray]:
    """Controller records -> the ``/steering`` table's columns (dtypes of STEERING_COLUMNS)."""
    reason_code = {name: i for i, name in enumerate(REASONS)}
    fields = ("mjd", "frequency_correction", "phase_error_s", "frequency_error",
              "drift_error_per_s", "total_correction", "proposed_correction",
              "predicted_phase_error_s", "predicted_sd_s", "command_epoch", "clipped", "reason")
    rows = list(map(operator.attrgetter(*fields), records))        # one pass over the records
    cols = dict(zip(fields, zip(*rows))) if rows else {name: () for name in fields}
    return {
        "mjd": np.array(cols["mjd"], dtype="f8"),
        "frequency_correction": np.array(cols["frequency_correction"], dtype="f8"),
        "phase_error": np.array(cols["phase_error_s"], dtype="f8"),
        "frequency_error": np.array(cols["frequency_error"], dtype="f8"),
        "drift_error": np.array(cols["drift_error_per_s"], dtype="f8") * SECONDS_PER_DAY,
        "total_correction": np.array(cols["total_correction"], dtype="f8"),
        "proposed_correction": np.array(cols["proposed_correction"], dtype="f8"),
        "predicted_phase_error": np.array(cols["predicted_phase_error_s"], dtype="f8"),
        "predicted_phase_error_sd": np.array(cols["predicted_sd_s"], dtype="f8"),
        "command_epoch": np.array(cols["command_epoch"], dtype="i1"),
        "clipped": np.array(cols["clipped"], dtype="i1"),
        "reason": np.array([reason_code[r] for r in cols["reason"]], dtype="i1"),
    }


def write_steering_group(group, columns: dict[str, np.ndarray]) -> None:
    """Write the columns as datasets of an open h5py group, with units, description, codes."""
    for name, values in columns.items():
        dtype, units, description = STEERING_COLUMNS.get(name, (values.dtype.str, "", ""))
        ds = group.create_dataset(name, data=np.asarray(values, dtype=dtype))
        ds.attrs["units"] = units
        ds.attrs["description"] = description
        if name in COLUMN_CODES:
            ds.attrs["codes"] = json.dumps(COLUMN_CODES[name])


def read_steering_table(path: str) -> tuple[dict[str, np.ndarray], dict]:
    """Read ``/steering`` from an archive (a group of column datasets or a compound dataset).

    Returns
    -------
    columns : dict of ndarray
    attrs : dict
        The archive's root attributes (``config_toml`` among them, when present).

    Raises
    ------
    InputError
        Not an HDF5 file, no ``/steering`` table, or a contract column missing.
    """
    import h5py

    try:
        handle = h5py.File(path, "r")
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot open as an HDF5 archive ({exc})", path=path) from None
    with handle:
        attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in handle.attrs.items()}
        if "steering" not in handle:
            raise InputError("the archive has no /steering table; write it with 'ensemble run'",
                             path=path, column="/steering")
        node = handle["steering"]
        if isinstance(node, h5py.Group):
            columns = {name: node[name][()] for name in node if isinstance(node[name], h5py.Dataset)}
        elif node.dtype.names:
            data = node[()]
            columns = {name: data[name] for name in node.dtype.names}
        else:
            raise InputError("/steering is neither a group of columns nor a table", path=path,
                             column="/steering")
    for name in CONTRACT_COLUMNS:
        if name not in columns:
            raise InputError(f"the /steering table lacks the column '{name}'", path=path,
                             column=f"/steering/{name}")
    columns = {k: np.asarray(v) for k, v in columns.items()}
    n = columns["mjd"].shape[0]
    for name, values in columns.items():
        if values.ndim != 1 or values.shape[0] != n:
            raise InputError(f"column has shape {values.shape}, expected ({n},) like mjd",
                             path=path, column=f"/steering/{name}")
    return columns, attrs


def command_rows(columns: dict[str, np.ndarray]) -> np.ndarray:
    """Indices of the command epochs (every scheduled one; without a ``command_epoch`` column,
    the rows with a nonzero change)."""
    if "command_epoch" in columns:
        return np.nonzero(columns["command_epoch"] != 0)[0]
    return np.nonzero(columns["frequency_correction"] != 0)[0]


def total_corrections(columns: dict[str, np.ndarray]) -> np.ndarray:
    """The total correction column, or the running sum of the changes when it is absent. [1]"""
    if "total_correction" in columns:
        return np.asarray(columns["total_correction"], dtype=float)
    return np.cumsum(columns["frequency_correction"])


def unit_factor(units: str, nominal_hz: float | None) -> float:
    """Factor turning a fractional frequency into ``units`` (Hz needs the nominal frequency)."""
    if units not in UNITS:
        raise ValueError(f"unknown units {units!r}; known: {', '.join(UNITS)}")
    if units == "hz":
        if nominal_hz is None or not nominal_hz > 0:
            raise ValueError("Hz needs the nominal output frequency (e.g. 5e6 or 1e7)")
        return float(nominal_hz)
    return UNITS[units][1]


def mjd_to_iso(mjd: float) -> str:
    """MJD (UTC) label -> ``YYYY-MM-DDTHH:MM:SSZ`` (to the nearest second; days of 86 400 s)."""
    base = _dt.datetime(1858, 11, 17, tzinfo=_dt.timezone.utc)
    return (base + _dt.timedelta(seconds=round(mjd * SECONDS_PER_DAY))).strftime(
        "%Y-%m-%dT%H:%M:%SZ")


def _code_name(columns, name, i, names) -> str:
    if name not in columns:
        return ""
    code = int(columns[name][i])
    return names.get(code, str(code)) if isinstance(names, dict) else (
        names[code] if 0 <= code < len(names) else str(code))


def write_commands_csv(path: str, columns: dict[str, np.ndarray], *, units: str = "fractional",
                       nominal_hz: float | None = None) -> int:
    """Write the command epochs as CSV for a control script (atomic); returns the row count.

    Columns: ``mjd``, ``time_utc``, ``change`` and ``total`` (fractional frequency; positive:
    the output runs faster), the same two in ``units`` when that is not fractional
    (``change_hz``/``total_hz``, ``change_ps_per_s``/..., ``change_ns_per_day``/...),
    ``phase_error_ns`` (output - target before the change), ``predicted_phase_error_ns``,
    ``predicted_uncertainty_ns`` (at the next command epoch), ``clipped`` and ``reason``.
    """
    factor = unit_factor(units, nominal_hz)
    suffix = UNITS[units][0]
    rows = command_rows(columns)
    totals = total_corrections(columns)
    header = ["mjd", "time_utc", "change", "total"]
    if suffix:
        header += [f"change{suffix}", f"total{suffix}"]
    header += ["phase_error_ns", "predicted_phase_error_ns", "predicted_uncertainty_ns",
               "clipped", "reason"]

    def ns(name, i):
        if name not in columns:
            return ""
        v = float(columns[name][i])
        return "" if not math.isfinite(v) else f"{v * 1e9:.4f}"

    with atomic_output(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as handle:
            out = csv.writer(handle, lineterminator="\n")
            out.writerow(header)
            for i in rows:
                change = float(columns["frequency_correction"][i])
                total = float(totals[i])
                row = [f"{float(columns['mjd'][i]):.6f}", mjd_to_iso(float(columns["mjd"][i])),
                       f"{change:.6e}", f"{total:.6e}"]
                if suffix:
                    row += [f"{change * factor:.6e}", f"{total * factor:.6e}"]
                row += [ns("phase_error", i), ns("predicted_phase_error", i),
                        ns("predicted_phase_error_sd", i),
                        _code_name(columns, "clipped", i, CLIP_NAMES),
                        _code_name(columns, "reason", i, REASONS)]
                out.writerow(row)
    return len(rows)


def format_change(value: float, units: str, nominal_hz: float | None) -> str:
    """A fractional change with its value in ``units`` too, e.g. ``-8.1e-16 (-70.0 ps/day)``."""
    text = f"{value:+.3e}"
    if units != "fractional":
        label = f"Hz at {nominal_hz:g} Hz" if units == "hz" else units
        text += f" ({value * unit_factor(units, nominal_hz):+.4g} {label})"
    return text


def _first_time_below(mjd, error, threshold_s):
    """First epoch after which |error| stays below threshold (None if it never settles)."""
    bad = ~(np.abs(error) < threshold_s)
    if bad[-1]:
        return None
    idx = np.nonzero(bad)[0]
    return float(mjd[0] if idx.size == 0 else mjd[idx[-1] + 1])


def summarize(columns: dict[str, np.ndarray], settings: SteeringSettings, *,
              threshold_s: float = 1e-9, units: str = "fractional",
              nominal_hz: float | None = None, horizon_d: float = 365.0) -> list[str]:
    """Dry-run summary lines: commands, largest change, clipping, settling and projection.

    Parameters
    ----------
    columns : dict of ndarray
        The ``/steering`` table (at least the contract columns).
    settings : SteeringSettings
        Policy and limits for the projection and the limits shown.
    threshold_s : float
        Phase-error threshold of "settled". [s]
    units, nominal_hz
        Units of the changes shown besides the fractional value.
    horizon_d : float
        Longest projection. [d]
    """
    from .closedloop import project_phase_error

    mjd = np.asarray(columns["mjd"], dtype=float)
    change = np.asarray(columns["frequency_correction"], dtype=float)
    error = np.asarray(columns["phase_error"], dtype=float)
    rows = command_rows(columns)
    totals = total_corrections(columns)
    lines = []
    if mjd.size == 0:
        return ["the /steering table is empty: no epochs, no commands"]
    applied = rows[change[rows] != 0] if rows.size else rows
    lines.append(f"epochs: {mjd.size} from MJD {mjd[0]:.4f} to {mjd[-1]:.4f}; command epochs: "
                 f"{rows.size}, changes applied: {applied.size}")
    if "reason" in columns and rows.size:
        reasons = columns["reason"][rows]
        held = {REASONS[c]: int(np.sum(reasons == c)) for c in np.unique(reasons)
                if 0 <= c < len(REASONS) and REASONS[c] != "command"}
        if held:
            lines.append("held: " + ", ".join(f"{n} {name}" for name, n in sorted(held.items())))
    if applied.size:
        i = applied[np.argmax(np.abs(change[applied]))]
        lines.append(f"largest change: {format_change(change[i], units, nominal_hz)} at MJD "
                     f"{mjd[i]:.4f}")
    else:
        lines.append("largest change: none (no change applied)")
    lines.append(f"total correction now: {format_change(totals[-1], units, nominal_hz)} "
                 f"(limit +-{settings.max_total:.3g}; step limit {settings.max_step:.3g})")
    if "clipped" in columns:
        clipped = np.nonzero(columns["clipped"] != 0)[0]
        if clipped.size and "proposed_correction" in columns:
            excess = np.abs(columns["proposed_correction"][clipped] - change[clipped])
            j = clipped[np.argmax(excess)]
            kinds = sorted({CLIP_NAMES.get(int(c), str(c)) for c in columns["clipped"][clipped]})
            lines.append(f"clipped: {clipped.size} commands ({', '.join(kinds)}); largest clip "
                         f"{np.max(excess):.3e} at MJD {mjd[j]:.4f}")
        elif clipped.size:
            lines.append(f"clipped: {clipped.size} commands")
        else:
            lines.append("clipped: none")
    known = np.isfinite(error)
    if known.any():
        last = np.nonzero(known)[0][-1]
        since = _first_time_below(mjd[known], error[known], threshold_s)
        state = (f"under {threshold_s * 1e9:g} ns since MJD {since:.4f}" if since is not None
                 else f"not under {threshold_s * 1e9:g} ns at the end")
        lines.append(f"phase error (output - target) now: {error[last] * 1e9:+.3f} ns; {state}")
    else:
        lines.append("phase error: unknown at every epoch")
    lines.append(_projection_line(columns, settings, threshold_s, horizon_d, project_phase_error))
    return lines


def _projection_line(columns, settings, threshold_s, horizon_d, project) -> str:
    if "frequency_error" not in columns:
        return "projection: not available (the /steering table has no frequency_error column)"
    mjd = np.asarray(columns["mjd"], dtype=float)
    i = mjd.size - 1
    x = float(columns["phase_error"][i])
    y = float(columns["frequency_error"][i])
    d = float(columns["drift_error"][i]) / SECONDS_PER_DAY if "drift_error" in columns else 0.0
    if not all(math.isfinite(v) for v in (x, y, d)):
        return "projection: not available (no estimate at the last epoch)"
    u = float(columns["frequency_correction"][i])
    total = float(total_corrections(columns)[i])
    rows = command_rows(columns)
    last_cmd = float(mjd[rows[-1]]) if rows.size else float(mjd[i])
    start = last_cmd + settings.interval_d
    while start <= mjd[i]:
        start += settings.interval_d
    h = (start - mjd[i]) * SECONDS_PER_DAY
    x, y = x + h * (y + u) + 0.5 * h * h * d, y + u + h * d
    plan = project(settings, start, x, y, d, total, horizon_d)
    below = np.abs(plan["phase_error_s"]) < threshold_s
    n_clip = int(np.sum(plan["clipped"] != 0))
    clip_text = f"; {n_clip} of its commands clipped" if n_clip else ""
    if below.all():
        return (f"projection (noise-free, configured policy and limits): stays under "
                f"{threshold_s * 1e9:g} ns{clip_text}")
    after = np.nonzero(~below)[0][-1] + 1
    if after >= below.size:
        return (f"projection (noise-free, configured policy and limits): not under "
                f"{threshold_s * 1e9:g} ns within {horizon_d:g} days{clip_text}")
    return (f"projection (noise-free, configured policy and limits): under "
            f"{threshold_s * 1e9:g} ns from MJD {plan['mjd'][after]:.4f}, "
            f"{plan['mjd'][after] - mjd[i]:.1f} days after the last epoch{clip_text}")
