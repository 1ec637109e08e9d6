"""External reference for steering: a small CSV reader and the flywheel filter.

An external reference (a link to another laboratory, a predicted or rapid international time
scale, ...) arrives as sparse, irregular points of ``external - local scale`` [s].  Between
points the ensemble carries time: a two-state filter (offset, rate) of ``external - scale``
predicts the difference at any epoch with its uncertainty.

CSV format (one header line; an empty cell is a missing value; rows need not be sorted)::

    mjd,offset,uncertainty
    61005.0,1.234e-08,1.5e-09
    61010.0,1.31e-08,

``mjd``: epoch of the point, MJD UTC [d]; ``offset``: external reference - local scale [s]
(a row with an empty offset is skipped); ``uncertainty`` (optional column): standard
uncertainty [s] (empty: the configured default).
"""

from __future__ import annotations

import csv
import io
import math
import pathlib
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..units import NS_PER_S, SECONDS_PER_DAY, scale_diffusion

_COLUMNS = ("mjd", "offset", "uncertainty")
_REQUIRED = ("mjd", "offset")
#: Plausible MJD labels: 1900-01-01 .. 2100-01-01. [d]
_MJD_RANGE = (15020.0, 88069.0)
#: Largest |offset| and uncertainty accepted; larger values are almost surely in ns, not s. [s]
_MAX_OFFSET_S = 1e-3


@dataclass(frozen=True, eq=False)
class ExternalSeries:
    """Points of ``external reference - local scale``, sorted by epoch.

    Attributes
    ----------
    mjd : ndarray, shape (n,)
        Epochs, MJD UTC, strictly increasing. [d]
    offset_s : ndarray, shape (n,)
        External reference - local scale. [s]
    uncertainty_s : ndarray, shape (n,)
        Standard uncertainty of each point; NaN where not given (the filter's default applies). [s]
    source : str
        File the points came from (for messages).
    """

    mjd: np.ndarray
    offset_s: np.ndarray
    uncertainty_s: np.ndarray
    source: str = ""

    def __len__(self) -> int:
        return int(self.mjd.shape[0])

    @classmethod
    def from_arrays(cls, mjd, offset_s, uncertainty_s=None, source: str = "") -> "ExternalSeries":
        """Build from arrays (sorted here; duplicate epochs raise ValueError)."""
        mjd = np.asarray(mjd, dtype=float).ravel()
        offset = np.asarray(offset_s, dtype=float).ravel()
        unc = (np.full(mjd.shape, np.nan) if uncertainty_s is None
               else np.asarray(uncertainty_s, dtype=float).ravel())
        if not (mjd.shape == offset.shape == unc.shape):
            raise ValueError("mjd, offset_s and uncertainty_s must have the same length")
        order = np.argsort(mjd, kind="stable")
        mjd, offset, unc = mjd[order], offset[order], unc[order]
        if np.any(np.diff(mjd) <= 0):
            raise ValueError("external reference epochs must be distinct")
        return cls(mjd, offset, unc, source)


def read_external(path: str | pathlib.Path) -> ExternalSeries:
    """Read an external-reference CSV file (format in the module docstring).

    Raises
    ------
    InputError
        Naming the file, the line and the column of the first bad value.
    """
    path = str(path)
    try:
        with open(path, encoding="utf-8-sig", newline="") as handle:
            return parse_external(handle, path)
    except OSError as exc:
        raise InputError(f"cannot read the external reference file: {exc.strerror or exc}",
                         path=path) from None
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file; expected CSV with the header mjd,offset"
                         "[,uncertainty]", path=path) from None


def parse_external(handle: io.TextIOBase, path: str = "<external>") -> ExternalSeries:
    """Parse external-reference CSV text from an open text handle (see :func:`read_external`)."""
    reader = csv.reader(handle)
    header = None
    for header in reader:
        if any(cell.strip() for cell in header):
            break
    else:
        raise InputError("the file is empty; expected the header mjd,offset[,uncertainty]",
                         path=path)
    line_no = reader.line_num
    names = [cell.strip().lower() for cell in header]
    for name in names:
        if name not in _COLUMNS:
            raise InputError(f"unknown column '{name}' in the header; expected mjd,offset and "
                             f"optionally uncertainty", path=path, row=line_no, column=name)
    for name in _REQUIRED:
        if name not in names:
            raise InputError(f"the header lacks the column '{name}'; expected mjd,offset"
                             f"[,uncertainty]", path=path, row=line_no, column=name)
    if len(set(names)) != len(names):
        raise InputError("a column appears twice in the header", path=path, row=line_no)
    index = {name: names.index(name) for name in names}

    rows_mjd, rows_offset, rows_unc, rows_line = [], [], [], []
    for cells in reader:
        line_no = reader.line_num
        if not any(cell.strip() for cell in cells):
            continue
        if len(cells) != len(names):
            raise InputError(f"expected {len(names)} cells ({','.join(names)}), found "
                             f"{len(cells)}", path=path, row=line_no)
        mjd = _number(cells[index["mjd"]], path, line_no, "mjd", "days (MJD)")
        if mjd is None:
            raise InputError("the epoch is missing; every row needs an MJD", path=path,
                             row=line_no, column="mjd")
        if not _MJD_RANGE[0] <= mjd <= _MJD_RANGE[1]:
            raise InputError(f"MJD {mjd!r} is outside {_MJD_RANGE[0]:g}..{_MJD_RANGE[1]:g} "
                             f"(1900-2100)", path=path, row=line_no, column="mjd", value=mjd)
        offset = _number(cells[index["offset"]], path, line_no, "offset", "seconds")
        if offset is None:
            continue
        if abs(offset) > _MAX_OFFSET_S:
            raise InputError(f"offset {offset!r} s is larger than {_MAX_OFFSET_S:g} s; write "
                             f"seconds (1.2e-08 for 12 ns), not nanoseconds", path=path,
                             row=line_no, column="offset", value=offset)
        unc = math.nan
        if "uncertainty" in index:
            value = _number(cells[index["uncertainty"]], path, line_no, "uncertainty", "seconds")
            if value is not None:
                if not 0.0 < value <= _MAX_OFFSET_S:
                    raise InputError(f"uncertainty {value!r} s must be > 0 and <= "
                                     f"{_MAX_OFFSET_S:g} s (in seconds)", path=path, row=line_no,
                                     column="uncertainty", value=value)
                unc = value
        rows_mjd.append(mjd)
        rows_offset.append(offset)
        rows_unc.append(unc)
        rows_line.append(line_no)
    if not rows_mjd:
        raise InputError("no data rows with an offset; expected lines like 61005.0,1.2e-08",
                         path=path)
    mjd = np.array(rows_mjd)
    order = np.argsort(mjd, kind="stable")
    sorted_mjd = mjd[order]
    dup = np.nonzero(np.diff(sorted_mjd) <= 0)[0]
    if dup.size:
        first, second = sorted(order[dup[0]:dup[0] + 2])
        raise InputError(f"epoch {float(mjd[second])!r} appears twice (also on line "
                         f"{rows_line[first]})", path=path, row=rows_line[second], column="mjd",
                         value=float(mjd[second]))
    return ExternalSeries(sorted_mjd, np.array(rows_offset)[order], np.array(rows_unc)[order],
                          path)


def _number(cell: str, path: str, row: int, column: str, unit: str) -> float | None:
    text = cell.strip()
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{text!r} is not a number; write {unit} with a decimal point"
                         + ("" if column == "mjd" else ", or leave the cell empty"),
                         path=path, row=row, column=column, value=text) from None
    if not math.isfinite(value):
        raise InputError(f"{text!r} is not a finite number", path=path, row=row, column=column,
                         value=text)
    return value


class ExternalFlywheel:
    """Two-state Kalman filter of ``external - scale`` (offset, rate) between sparse points.

    Model (the two-state clock model, :mod:`ensemble.model.clockmodel`, applied to the
    difference): offset e and rate r with white-FM q1 and random-walk-FM q2; a point measures e
    with its own variance.  The filter runs in scaled units (ns, ns/d, days; ensemble/units.py).
    Queries are causal: an estimate at epoch t uses the points with mjd <= t only.

    Parameters
    ----------
    series : ExternalSeries
        The points (may grow between incremental runs; the filter resumes after its last point).
    q1_s : float
        White-FM diffusion coefficient of the difference. [s]
    q2_per_s : float
        Random-walk-FM diffusion coefficient of the difference. [1/s]
    default_uncertainty_s : float
        Uncertainty of a point without one. [s]
    rate_sd : float
        Prior standard deviation of the rate at the first point. [1]
    """

    def __init__(self, series: ExternalSeries, *, q1_s: float, q2_per_s: float,
                 default_uncertainty_s: float, rate_sd: float):
        self.series = series
        self._q1 = float(scale_diffusion(q1_s, 1))        # [ns^2/d]
        self._q2 = float(scale_diffusion(q2_per_s, 2))    # [ns^2/d^3]
        self._r_default = (default_uncertainty_s * NS_PER_S) ** 2   # [ns^2]
        self._rate_var0 = (rate_sd * NS_PER_S * SECONDS_PER_DAY) ** 2  # [(ns/d)^2]
        self._mjd_list = series.mjd.tolist()
        self._offset_ns = (series.offset_s * NS_PER_S).tolist()
        unc = series.uncertainty_s * NS_PER_S
        self._r_ns2 = np.where(np.isfinite(unc), unc * unc, self._r_default).tolist()
        # Filter state at epoch self.mjd (the last absorbed point), scaled units.
        self.mjd: float | None = None
        self.n_used = 0
        self._x = [0.0, 0.0]                 # offset [ns], rate [ns/d]
        self._p = [0.0, 0.0, 0.0]            # p11 [ns^2], p12 [ns^2/d], p22 [(ns/d)^2]

    # -- filter -----------------------------------------------------------------------------
    def _predict(self, dt_d: float):
        """State and covariance propagated by dt_d days from the last point (not stored)."""
        x0, x1 = self._x
        p11, p12, p22 = self._p
        q1, q2 = self._q1, self._q2
        # Phi = [[1, dt], [0, 1]];  Q = [[q1 dt + q2 dt^3/3, q2 dt^2/2], [., q2 dt]] (clockmodel.py)
        n11 = p11 + 2.0 * dt_d * p12 + dt_d * dt_d * p22 + q1 * dt_d + q2 * dt_d ** 3 / 3.0
        n12 = p12 + dt_d * p22 + 0.5 * q2 * dt_d * dt_d
        n22 = p22 + q2 * dt_d
        return x0 + dt_d * x1, x1, n11, n12, n22

    def _absorb(self, i: int) -> None:
        z, r = self._offset_ns[i], self._r_ns2[i]
        if self.mjd is None:
            self._x = [z, 0.0]
            self._p = [r, 0.0, self._rate_var0]
        else:
            x0, x1, p11, p12, p22 = self._predict(self._mjd_list[i] - self.mjd)
            s = p11 + r
            k0, k1 = p11 / s, p12 / s
            innovation = z - x0
            self._x = [x0 + k0 * innovation, x1 + k1 * innovation]
            # P+ = P - K S K^T (symmetric by construction).
            self._p = [p11 - k0 * p11, p12 - k0 * p12, p22 - k1 * p12]
        self.mjd = self._mjd_list[i]
        self.n_used = i + 1

    def advance(self, mjd: float) -> None:
        """Absorb every point with epoch <= mjd (epochs never go back)."""
        limit = mjd + 1e-9
        while self.n_used < len(self._mjd_list) and self._mjd_list[self.n_used] <= limit:
            self._absorb(self.n_used)

    def estimate(self, mjd: float):
        """Estimate of ``external - scale`` at epoch ``mjd`` from the points up to it.

        Returns
        -------
        None when no point is available yet, else a tuple
        (offset [s], rate [1], var_offset [s^2], cov_offset_rate [s], var_rate [1],
        age of the newest point used [d]).
        """
        self.advance(mjd)
        if self.mjd is None:
            return None
        dt_d = mjd - self.mjd
        x0, x1, p11, p12, p22 = self._predict(dt_d)
        to_s = 1.0 / NS_PER_S
        rate_to_1 = 1.0 / (NS_PER_S * SECONDS_PER_DAY)
        return (x0 * to_s, x1 * rate_to_1, p11 * to_s * to_s, p12 * to_s * rate_to_1,
                p22 * rate_to_1 * rate_to_1, dt_d)

    def predict_offset(self, mjd: float) -> tuple[float, float]:
        """(offset [s], variance [s^2]) of ``external - scale`` at a later epoch ``mjd``
        from the points absorbed so far (no new point is absorbed)."""
        if self.mjd is None:
            return math.nan, math.nan
        x0, _, p11, _, _ = self._predict(mjd - self.mjd)
        return x0 / NS_PER_S, p11 / NS_PER_S ** 2

    # -- state ------------------------------------------------------------------------------
    def state_dict(self) -> dict:
        """Filter state as plain numbers (scaled units, names carry them)."""
        return {"mjd": self.mjd, "n_used": self.n_used,
                "offset_ns": self._x[0], "rate_ns_per_d": self._x[1],
                "cov_ns": list(self._p)}

    def load_state(self, state: dict) -> None:
        """Restore :meth:`state_dict`; later points in a grown series are absorbed on demand."""
        self.mjd = None if state["mjd"] is None else float(state["mjd"])
        self._x = [float(state["offset_ns"]), float(state["rate_ns_per_d"])]
        self._p = [float(v) for v in state["cov_ns"]]
        # Resume after the last absorbed epoch (the file may have grown or been re-sorted).
        if self.mjd is None:
            self.n_used = 0
        else:
            self.n_used = int(np.searchsorted(self.series.mjd, self.mjd + 1e-9, side="left"))
