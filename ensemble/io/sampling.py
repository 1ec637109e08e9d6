"""The sampling grid (internal): tau0 from the data, each epoch's slot, exact elapsed time.

Epoch tags are UTC labels (:mod:`ensemble.io.timetags`).  Intervals come from the nominal
grid plus the leap seconds in between, never from float differences of MJD (our own rule,
explained in docs/input.md under "Leap seconds" and "MJD labels"):

    elapsed_s = k * tau0_s + (TAI-UTC(t) - TAI-UTC(t0))

with k the epoch's slot counted in UTC label seconds from the first epoch; a sampler that runs
free in SI seconds across a leap second is recognised too (slots in continuous seconds).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .timetags import FLOAT_SLACK_S, label_mjd, tai_minus_utc_s

log = logging.getLogger(__name__)

_DAY_S = 86400.0


@dataclass(frozen=True)
class Grid:
    """A regular sampling grid fitted to epoch tags (internal).

    Attributes
    ----------
    tau0_s : float
        Nominal sampling interval, a whole number of milliseconds. [s]
    slot : ndarray of int64, shape (n,)
        Grid index k of each epoch, counted from the first epoch (label seconds on the UTC
        grid, continuous seconds on the continuous grid).
    elapsed_s : ndarray of float64, shape (n,)
        Exact time since the first epoch, leap seconds counted. [s]
    tol_s : float
        Largest accepted distance of a tag from its grid slot. [s]
    scale : str
        ``"utc"`` (slots in UTC label seconds, the usual case) or ``"continuous"`` (slots in
        elapsed SI seconds: a free-running sampler across a leap second).
    spacing : str
        How tau0 was found: the ``"most common"`` spacing, an ``"equally common"`` shorter one,
        or the ``"smallest"`` spacing.
    """

    tau0_s: float
    slot: np.ndarray
    elapsed_s: np.ndarray
    tol_s: float
    scale: str
    spacing: str


def grid_tolerance_s(tau0_s: float, resolution_s: float,
                     exact_tags: bool = False) -> float | None:
    """Largest accepted distance of a tag from its grid slot [s], or None if tau0 is unusable.

    * tau0 a whole number of resolution steps, for exact (ISO) tags or MJD steps of whole
      seconds (at most 2 decimals): the tags can hit every slot, so half a step (the rounding
      of the last digit).  This is the only usable case for exact tags.
    * otherwise (MJD text, a decimal-day rounding): one step, since each tag is rounded by up
      to half a step and the grid's origin is itself a rounded tag; usable only when a quarter
      of tau0 spans at least one step (six-decimal MJD: tau0 >= 0.3456 s).

    Plus :data:`FLOAT_SLACK_S`; at most a quarter of tau0, so neighbouring slots stay apart.
    Six-decimal MJD on an hourly grid gives 0.0864 s, ISO times in whole seconds 0.5 s.
    """
    ratio = tau0_s / resolution_s
    whole_s = resolution_s >= 1.0 and abs(resolution_s - round(resolution_s)) < 1e-9
    if (exact_tags or whole_s) and ratio >= 1.0 - 1e-9 and abs(ratio - round(ratio)) < 1e-6:
        return min(0.5 * resolution_s + FLOAT_SLACK_S, 0.25 * tau0_s)
    if exact_tags or tau0_s < 4.0 * resolution_s * (1.0 - 1e-9):
        return None
    return min(resolution_s + FLOAT_SLACK_S, 0.25 * tau0_s)


def digits_needed(tau0_s: float) -> int:
    """Decimals an MJD text needs: its resolution 86 400 s x 10**-d at most tau0 / 4."""
    return max(0, int(np.ceil(np.log10(4.0 * _DAY_S / tau0_s) - 1e-12)))


#: Largest ratio between the most common and the smallest spacing for the smallest one to be
#: tried as the interval, and the least share of filled slots such a grid must have: an odd
#: epoch close to a regular one is a duplicate, not a sign of a finer grid.
_MAX_GAP_RATIO = 100
_MIN_FILL = 0.25
#: Round steps tried for tau0, roundest first [s]; tau0 is always a whole number of ms.
_ROUND_STEPS_S = (3600.0, 60.0, 10.0, 1.0, 0.1, 0.01, 0.001)


@dataclass
class _Fit:
    tau0_s: float
    tol_s: float
    k: np.ndarray           # nearest slot of each epoch
    residual_s: np.ndarray  # distance from it, after removing the median offset [s]
    bad: np.ndarray         # epochs off the grid (or leap tags on a UTC grid of tau0 > 1 s)
    spacing: str

    @property
    def ok(self) -> bool:
        return not self.bad.any()


def _estimates(x: np.ndarray, resolution_s: float) -> list[tuple[str, float]]:
    """Approximate intervals [s]: the most common spacing, then the smallest (1.5 to 100 x less).

    A spacing's weight is the number of spacings within 25 % of it, so that the scatter of
    rounded tags does not split one interval over several bins; ties go to the longer spacing.
    The estimate is the mean of the spacings within 25 %.  Spacings shorter than 1 ms or than
    the tags' resolution are no candidates.
    """
    d = np.sort(np.diff(x))
    d = d[d >= max(0.5e-3, 0.999 * resolution_s)]
    if d.size == 0:
        return []
    values = np.unique(np.round(d, 3))
    weight = np.searchsorted(d, 1.25 * values, "right") - np.searchsorted(d, 0.75 * values, "left")
    best = np.flatnonzero(weight == weight.max())[-1]

    def mean_near(v):
        return float(d[np.abs(d - v) <= 0.25 * v].mean())

    common = mean_near(values[best])
    out = [("most common", common)]
    smallest = mean_near(values[0])
    if 1.5 <= common / smallest <= _MAX_GAP_RATIO:
        out.append(("smallest" if weight[0] < weight[best] else "equally common", smallest))
    return out


def _round_candidates(est: float, delta: float, limit: int = 20) -> list[float]:
    """Round values within est +- delta, roundest step first, nearest first within a step."""
    out: list[float] = []
    for step in _ROUND_STEPS_S:
        lo, hi = np.ceil((est - delta) / step), np.floor((est + delta) / step)
        m = np.round(est / step) + np.arange(-limit, limit + 1)
        m = m[(m >= lo) & (m <= hi)]
        m = m[np.argsort(np.abs(m * step - est), kind="stable")][:limit]
        for v in np.round(m * step, 3):
            if v > 0 and v not in out:
                out.append(float(v))
    if not out:
        out.append(float(np.round(est, 3)))
    return out


def _only_collisions(f: _Fit) -> bool:
    """True if every epoch off this grid shares its slot with an epoch on it (duplicates)."""
    bad = np.flatnonzero(f.bad)
    if bad.size == 0 or np.any(np.abs(f.residual_s[bad]) > 0.25 * f.tau0_s):
        return False
    on_slots = f.k[~f.bad]
    return bool(np.isin(f.k[bad], on_slots).all())


def _fit_scale(x: np.ndarray, resolution_s: float, exact_tags: bool,
               leap_tag: np.ndarray | None, steps: np.ndarray):
    """Best grid for the times ``x`` [s] and the unresolved estimate [s] or None.

    The grid is the first round candidate on which every epoch fits, unless two epochs then
    share a slot and a rounder candidate explained all its misfits as such duplicates (that
    one is returned, to be reported as a collision); failing all, the first misfit (or None).
    The estimate is returned when every candidate was too fine for the tags.
    """
    first = None
    duplicates = None
    unresolved = None
    for spacing, est in _estimates(x, resolution_s if exact_tags else 0.0):
        # the estimate is good to a tag step, or to 0.1 % when stray epochs bias the mean
        for tau0 in _round_candidates(est, max(resolution_s + FLOAT_SLACK_S, 1e-3 * est)):
            tol = grid_tolerance_s(tau0, resolution_s, exact_tags)
            if tol is None:
                unresolved = unresolved or est
                continue
            k = np.rint(x / tau0)
            r = x - k * tau0
            r = r - np.median(r)                      # the first tag is rounded too
            bad = np.abs(r) > tol
            if leap_tag is not None and tau0 > 1.0 + tol:
                bad = bad | leap_tag
            fit = _Fit(tau0, tol, k.astype(np.int64), r, bad, spacing)
            if fit.ok and spacing != "most common" and x.size < _MIN_FILL * (k[-1] + 1):
                continue                              # too empty: not a finer grid
            if fit.ok:
                clash = np.any((np.diff(fit.k) == 0) & (np.diff(steps) == 0))
                return (duplicates if clash and duplicates else fit), None
            if duplicates is None and _only_collisions(fit):
                duplicates = fit
            first = first or fit
    first = duplicates or first
    return first, (None if first else unresolved)


def fit_grid(day: np.ndarray, sod_s: np.ndarray, resolution_s: float, *, exact_tags: bool = False,
             path: str | None = None, rows: np.ndarray | None = None, texts=None,
             column: str = "mjd") -> Grid:
    """Find tau0 and place every epoch on the grid k * tau0 from the first epoch.

    Parameters
    ----------
    day, sod_s : ndarray, shape (n_epochs,)
        UTC day (integer MJD) and seconds of day [s] of distinct epochs, sorted by time.
    resolution_s : float
        Finest step the tags are written with (:class:`ParsedTags`). [s]
    exact_tags : bool
        True for ISO times, False for MJD text (:class:`ParsedTags`).
    path, rows, texts, column : optional
        For messages: the file, the 1-based line of each epoch, its text and the column name.

    Returns
    -------
    Grid

    Raises
    ------
    InputError
        Fewer than two epochs; epochs off the grid, or two distinct tags on one slot (the
        first such epoch in file order is named, with its distance from the grid, or both
        rows of the slot).

    Notes
    -----
    The approximate interval is the mean of the spacings within 25 % of the most common one;
    tau0 is the roundest value within one tag resolution (or 0.1 %) of it (whole hours,
    minutes, 10 s, seconds, ... milliseconds) on which every epoch lies within
    :func:`grid_tolerance_s` (after removing the median offset of the tags from the grid).  If
    the most common spacing fits no grid, the smallest is tried (at most 100 times shorter, and
    a quarter of the slots of its grid filled).  Slots are counted in UTC label seconds and the
    leap seconds in between are added (``elapsed = k tau0 + dTAI-UTC``); when the epochs span
    a leap second, a grid in continuous seconds (a free-running sampler) is
    fitted too and wins if its largest residual is smaller.
    """
    day = np.asarray(day, dtype=np.int64)
    sod = np.asarray(sod_s, dtype=np.float64)
    rows = np.arange(1, day.size + 1) if rows is None else np.asarray(rows)
    texts = [str(m) for m in label_mjd(day, sod)] if texts is None else texts
    if day.size < 2:
        raise InputError(f"only one epoch ({texts[0]!r}); at least two are needed to find the "
                         f"sampling interval", path=path, row=int(rows[0]) if rows.size else None,
                         column=column)
    leaps = (tai_minus_utc_s(day) - tai_minus_utc_s(day[0])).astype(np.float64)
    u = (day - day[0]) * _DAY_S + (sod - sod[0])
    fits = {"utc": _fit_scale(u, resolution_s, exact_tags, sod >= _DAY_S, leaps)}
    if leaps.any():
        fits["continuous"] = _fit_scale(u + leaps, resolution_s, exact_tags, None,
                                        np.zeros_like(leaps))
    unresolved = fits["utc"][1]
    fits = {name: f for name, (f, _) in fits.items()}
    good = [(float(np.max(np.abs(f.residual_s))), i, name, f)
            for i, (name, f) in enumerate(fits.items()) if f is not None and f.ok]
    steps_of = {"utc": leaps, "continuous": np.zeros_like(leaps)}
    if good:
        _, _, scale, f = min(good)
        steps = steps_of[scale]
        clash = _collision(f, steps, path, rows, texts, column)
        if clash is not None:
            raise clash
        log.debug("%s: tau0 = %g s on the %s grid (tolerance %g s)", path, f.tau0_s, scale,
                  f.tol_s)
        return Grid(f.tau0_s, f.k, (f.k * f.tau0_s + steps).astype(np.float64), f.tol_s, scale,
                    f.spacing)
    f = fits["utc"]
    if f is None:
        row = int(max(rows[0], rows[1]))
        if unresolved is None:
            raise InputError(f"epochs {texts[0]!r} and {texts[1]!r} are less than 1 ms apart; "
                             f"cannot find a sampling interval", path=path, row=row, column=column)
        raise InputError(f"the epochs are about {unresolved:.4g} s apart, but the tags resolve "
                         f"only {resolution_s:.3g} s (a quarter of the interval is needed): "
                         f"{_finer_hint(column, unresolved)}", path=path, row=row, column=column)
    off = _misfit_error(f, sod >= _DAY_S, resolution_s, path, rows, texts, column)
    clash = _collision(f, leaps, path, rows, texts, column)
    raise off if clash is None or off.row < clash.row else clash


def _misfit_error(f: _Fit, leap_tag, resolution_s, path, rows, texts, column) -> InputError:
    bad = np.flatnonzero(f.bad)
    i = int(bad[np.argmin(rows[bad])])
    if leap_tag[i] and abs(f.residual_s[i]) <= f.tol_s:
        msg = (f"epoch {texts[i]!r} is inside a leap second, which is a slot of a UTC grid only "
               f"for tau0 <= 1 s (here {f.tau0_s:g} s)")
    else:
        msg = (f"epoch {texts[i]!r} lies {f.residual_s[i]:+.4g} s from the {f.tau0_s:g} s "
               f"sampling grid of the other epochs (first epoch {texts[0]!r}, row "
               f"{int(rows[0])}; tolerance {f.tol_s:.3g} s{_step_note(column)}); sampling must "
               f"be regular (whole epochs may be missing)")
    if resolution_s > 0.25 * f.tau0_s:
        msg += f"; the tags resolve only {resolution_s:.3g} s: {_finer_hint(column, f.tau0_s)}"
    return InputError(msg, path=path, row=int(rows[i]), column=column)


def _step_note(column: str) -> str:
    return ", from the finest decimal written" if column.lower() == "mjd" else ""


def _finer_hint(column: str, tau0_s: float) -> str:
    if column.lower() == "mjd":
        return (f"write the mjd with at least {digits_needed(tau0_s)} decimals, or ISO times in a "
                f"'time' column")
    return "write fractional seconds finer than a quarter of the sampling interval"


def _collision(f: _Fit, steps, path, rows, texts, column) -> InputError | None:
    """Two distinct tags nearest to one grid slot: name both rows (report the later one).

    A pair counts when both lie within a quarter interval of the slot and at least one is on
    the grid (within the tolerance).
    """
    near = np.abs(f.residual_s) <= 0.25 * f.tau0_s
    on = ~f.bad
    same = ((np.diff(f.k) == 0) & (np.diff(steps) == 0) & near[1:] & near[:-1]
            & (on[1:] | on[:-1]))
    if not same.any():
        return None
    i = np.flatnonzero(same)
    later = np.maximum(rows[i], rows[i + 1])
    j = int(i[np.argmin(later)])
    a, b = sorted((j, j + 1), key=lambda q: rows[q])
    return InputError(f"epochs {texts[b]!r} and {texts[a]!r} (row {int(rows[a])}) fall on the "
                      f"same slot of the {f.tau0_s:g} s sampling grid; keep one of them",
                      path=path, row=int(rows[b]), column=column)


def place_on_grid(day: np.ndarray, sod_s: np.ndarray, resolution_s: float, *, tau0_s: float,
                  anchor_mjd: float, exact_tags: bool = False, path: str | None = None,
                  rows: np.ndarray | None = None, texts=None, column: str = "mjd") -> Grid:
    """Place epochs on a known grid that continues after an anchor epoch (an archive's last).

    Used when new measurements are appended to an archive: the sampling interval is the
    archive's, so even a file of one epoch can be read, and every epoch must lie on the grid
    k * tau0 after the anchor (k >= 1), leap seconds counted.

    Parameters
    ----------
    day, sod_s : ndarray, shape (n_epochs,)
        UTC day (integer MJD) and seconds of day [s] of distinct epochs, sorted by time.
    resolution_s : float
        Finest step the tags are written with. [s]
    tau0_s : float
        Sampling interval of the grid. [s]
    anchor_mjd : float
        MJD label (UTC) of the anchor epoch, the grid's slot 0.
    exact_tags, path, rows, texts, column
        As for :func:`fit_grid`.

    Returns
    -------
    Grid
        ``slot`` and ``elapsed_s`` counted from the anchor.

    Raises
    ------
    InputError
        An epoch at or before the anchor (the data overlap or go back in time), off the grid,
        or two epochs on one slot.
    """
    day = np.asarray(day, dtype=np.int64)
    sod = np.asarray(sod_s, dtype=np.float64)
    rows = np.arange(1, day.size + 1) if rows is None else np.asarray(rows)
    texts = [str(m) for m in label_mjd(day, sod)] if texts is None else texts
    a_day = int(np.floor(anchor_mjd))
    a_sod = (anchor_mjd - a_day) * _DAY_S
    u = (day - a_day) * _DAY_S + (sod - a_sod)
    leaps = (tai_minus_utc_s(day) - tai_minus_utc_s(np.array([a_day]))[0]).astype(np.float64)
    tol = grid_tolerance_s(tau0_s, resolution_s, exact_tags)
    if tol is None:
        tol = 0.25 * tau0_s
    k = np.rint(u / tau0_s).astype(np.int64)
    resid = u - k * tau0_s
    early = np.flatnonzero(k < 1)
    if early.size:
        i = int(early[np.argmin(rows[early])])
        raise InputError(f"epoch {texts[i]!r} is not after the archive's last epoch MJD "
                         f"{anchor_mjd:.6f}: new data must continue the archive (no overlap, "
                         f"time must not go back)", path=path, row=int(rows[i]), column=column)
    bad = np.flatnonzero(np.abs(resid) > tol)
    if bad.size:
        i = int(bad[np.argmin(rows[bad])])
        raise InputError(f"epoch {texts[i]!r} lies {resid[i]:+.4g} s from the archive's "
                         f"{tau0_s:g} s sampling grid (tolerance {tol:.3g} s); sampling must be "
                         f"regular", path=path, row=int(rows[i]), column=column)
    same = np.flatnonzero(np.diff(k) == 0)
    if same.size:
        i = int(same[0])
        raise InputError(f"epochs {texts[i + 1]!r} and {texts[i]!r} fall on the same slot of the "
                         f"{tau0_s:g} s sampling grid; keep one of them", path=path,
                         row=int(max(rows[i], rows[i + 1])), column=column)
    return Grid(float(tau0_s), k, (k * tau0_s + leaps).astype(np.float64), float(tol), "utc",
                "given")
