"""The per-tau stability table: deviation, term count, noise type, EDF and confidence interval.

One row per averaging time.  For each factor m the deviation and its number of terms n come
from :mod:`~ensemble.stability.deviations` (or :mod:`~ensemble.stability.total`); the noise
exponent alpha from :mod:`~ensemble.stability.noiseid`; the EDF from
:mod:`~ensemble.stability.edf` for that alpha and n; the interval from the chi-squared
distribution (:mod:`~ensemble.stability.confidence`).

When too few tau-samples exist to identify the noise at m, the estimate at the largest factor
m / 2^k (k = 1, 2, ...) that has one is used ("carried"); a record too short for any estimate
gets white FM (alpha = 0, "default").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import InputError
from .confidence import CONFIDENCE_68, check_confidence, deviation_interval
from .deviations import STATISTICS, max_factor, prepare, resolve_factors, variance_at
from .edf import edf_for
from .noiseid import NOISE_CODES, NOISE_NAMES, alpha_range, identify_prepared

#: Relative tolerance for "tau is a multiple of tau0".
_MULTIPLE_RTOL = 1e-9


@dataclass(frozen=True)
class StabilityRow:
    """One averaging time of a stability table.

    Attributes
    ----------
    tau_s : float
        Averaging time m * tau0. [s]
    deviation : float
        The deviation (dimensionless; TDEV in s).
    n : int
        Number of terms used.
    edf : float
        Equivalent degrees of freedom.
    lo, hi : float
        Confidence interval of the deviation at the table's confidence level (same unit).
    alpha : int
        Power-law exponent used for the EDF (S_y(f) ~ f^alpha).
    noise : str
        Its name ('white PM', 'flicker PM', 'white FM', 'flicker FM', 'random-walk FM',
        'flicker-walk FM', 'random-run FM').
    m : int
        Averaging factor.
    noise_method : str
        How alpha was found: 'lag1', 'lag1+rn', 'b1', 'b1+rn', 'b1+r1', 'carried', 'default'
        or 'given'.
    """

    tau_s: float
    deviation: float
    n: int
    edf: float
    lo: float
    hi: float
    alpha: int
    noise: str
    m: int
    noise_method: str

    @property
    def noise_code(self) -> str:
        """Short code of the noise type (WPM, FPM, WFM, FFM, RWFM, FWFM, RRFM)."""
        return NOISE_CODES[self.alpha]

    def as_dict(self) -> dict:
        """The row as the command's JSON object: tau, deviation, n, edf, lo, hi, alpha, noise."""
        return {"tau": self.tau_s, "deviation": self.deviation, "n": self.n, "edf": self.edf,
                "lo": self.lo, "hi": self.hi, "alpha": self.alpha, "noise": self.noise}


def factors_from_taus(taus_s: Sequence[float], tau0_s: float) -> np.ndarray:
    """Averaging factors of averaging times that must be multiples of tau0.

    Parameters
    ----------
    taus_s : sequence of float
        Averaging times. [s]
    tau0_s : float
        Sampling interval. [s]

    Returns
    -------
    ndarray of int64
        Factors in the given order.

    Raises
    ------
    InputError
        If a tau is not a positive multiple of tau0 (relative tolerance 1e-9).
    """
    out = []
    for tau in taus_s:
        try:
            t = float(tau)
        except (TypeError, ValueError):
            raise InputError(f"averaging time {tau!r} is not a number of seconds") from None
        if not math.isfinite(t) or t <= 0:
            raise InputError(f"averaging time {tau!r} s must be a finite number > 0")
        ratio = t / tau0_s
        k = round(ratio)
        if k < 1 or abs(ratio - k) > _MULTIPLE_RTOL * max(1.0, ratio):
            raise InputError(f"averaging time {t:g} s is not a multiple of tau0 = {tau0_s:g} s; "
                             f"use m * {tau0_s:g} s with a whole number m")
        out.append(int(k))
    return np.asarray(out, dtype=np.int64)


def _noise_at(series, m, tau0, data, statistic, cache):
    """alpha and method at m, stepping down by octaves when m has too few tau-samples."""
    probe, carried = m, False
    while probe >= 1:
        est = cache.get(probe)
        if est is None:
            est = identify_prepared(series, probe, tau0, data, statistic)
            cache[probe] = est
        if est.alpha is not None:
            return est.alpha, ("carried" if carried else est.method)
        probe //= 2
        carried = True
    return 0, "default"


def stability_table(values, tau0_s: float, statistic: str, *, data: str = "phase",
                    taus="octave", confidence: float = CONFIDENCE_68,
                    alpha: int | None = None) -> list[StabilityRow]:
    """Stability table of one statistic: deviation, n, EDF, confidence interval, noise type.

    Parameters
    ----------
    values : array_like, shape (n,)
        Phase [s] or fractional frequency [1], equally spaced; NaN marks a missing value.
    tau0_s : float
        Sampling interval. [s]
    statistic : {'adev', 'oadev', 'mdev', 'tdev', 'hdev', 'ohdev', 'totdev'}
        The deviation.
    data : {'phase', 'frequency'}
        What ``values`` holds.
    taus : {'octave', 'decade', 'all'} or sequence of float
        Averaging times: a spacing rule of the factors m (1, 2, 4, ...; 1, 2, 5, 10, ...; every
        m) whose rows without any usable term are left out, or explicit averaging times in
        seconds (multiples of tau0), each of which must have at least one term.
    confidence : float
        Two-sided probability of the interval (default 0.6826894921, the 68.3 % interval).
    alpha : int, optional
        Use this power-law exponent (S_y(f) ~ f^alpha) at every tau instead of identifying the
        noise ('given' in the rows); -2 .. 2, or -4 .. 2 for hdev and ohdev.

    Returns
    -------
    list of StabilityRow
        Rows in increasing tau (explicit taus: sorted, duplicates removed).

    Raises
    ------
    InputError
        Unknown statistic, tau0 <= 0, a tau that is not a multiple of tau0 or has too few
        points (or only gap-touching terms), or a record too short for any tau.

    Examples
    --------
    >>> y = [892, 809, 823, 798, 671, 644, 883, 903, 677]   # SP 1065 small data set
    >>> rows = stability_table(y, 1.0, "oadev", data="frequency")
    >>> [(r.tau_s, round(r.deviation, 5), r.n) for r in rows]
    [(1.0, 91.22945, 8), (2.0, 85.95287, 6), (4.0, 27.63518, 2)]
    """
    if statistic not in STATISTICS:
        raise InputError(f"unknown statistic {statistic!r}; choose one of "
                         f"{', '.join(STATISTICS)}")
    conf = check_confidence(confidence)
    if alpha is not None:
        lo_a, hi_a = alpha_range(statistic)
        if not isinstance(alpha, (int, np.integer)) or not lo_a <= alpha <= hi_a:
            raise InputError(f"noise exponent alpha must be an integer from {lo_a} to {hi_a} "
                             f"for {statistic}, got {alpha!r}")
        alpha = int(alpha)
    series = prepare(values, tau0_s, data)
    tau0 = float(tau0_s)
    n_points = series.n_points
    explicit = not isinstance(taus, str)
    if explicit:
        factors = np.unique(factors_from_taus(taus, tau0))
        if factors.size == 0:
            raise InputError("no averaging times given")
        mmax = max_factor(statistic, n_points)
        too_long = factors[factors > mmax]
        if too_long.size:
            k = int(too_long[0])
            need = _points_needed(statistic, k)
            raise InputError(f"averaging time {k * tau0:g} s (m = {k}) needs at least "
                             f"{_count(need, data)} for {statistic}; the record has "
                             f"{_count(n_points, data)}")
    else:
        factors = resolve_factors(taus, n_points, statistic)
    rows: list[StabilityRow] = []
    noise_cache: dict = {}
    for mk in factors:
        m = int(mk)
        var, n = variance_at(series, statistic, m, tau0)
        if n == 0:
            if explicit:
                raise InputError(f"averaging time {m * tau0:g} s: every {statistic} term "
                                 "touches a missing value")
            continue
        if alpha is None:
            a, method = _noise_at(series, m, tau0, data, statistic, noise_cache)
        else:
            a, method = alpha, "given"
        edf = edf_for(statistic, a, m, n, n_points)
        dev = math.sqrt(var)
        lo, hi = deviation_interval(dev, edf, conf)
        rows.append(StabilityRow(tau_s=m * tau0, deviation=dev, n=int(n), edf=float(edf),
                                 lo=float(lo), hi=float(hi), alpha=int(a),
                                 noise=NOISE_NAMES[a], m=m, noise_method=method))
    if not rows:
        raise InputError(f"too few values for {statistic}: the record has "
                         f"{_count(n_points, data)}; it needs at least "
                         f"{_count(_points_needed(statistic, 1), data)}")
    return rows


def _points_needed(statistic: str, m: int) -> int:
    """Fewest phase points for one term of ``statistic`` at factor m."""
    if statistic in ("adev", "oadev", "totdev"):
        return 2 * m + 1
    if statistic in ("mdev", "tdev"):
        return 3 * m
    return 3 * m + 1


def _count(n_points: int, data: str) -> str:
    n = n_points if data == "phase" else n_points - 1
    return f"{n} {_unit(data, n)}"


def _unit(data: str, n: int = 2) -> str:
    word = "phase value" if data == "phase" else "frequency value"
    return word if n == 1 else word + "s"
