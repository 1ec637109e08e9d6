"""Allan, modified Allan, time and Hadamard deviations of phase or frequency data (internal module).

Definitions (Riley, Handbook of Frequency Stability Analysis, SP 1065, 2008).  The index
conventions below are ours, fixed by reproducing the handbook's validation values (recalled from
memory, not read in the handbook) to every digit in tests/test_deviations.py.
N phase points x_0 .. x_{N-1} [s] sampled every tau0 [s]; averaging factor m, tau = m tau0::

    OAVAR = sum_i (x_{i+2m} - 2 x_{i+m} + x_i)^2 / (2 tau^2 (N - 2m))
    AVAR  = the same sum over i = 0, m, 2m, ... only (non-overlapping, K - 1 terms of the
            K = floor((N-1)/m) block means of frequency)
    MVAR  = sum_j [sum_{i=j}^{j+m-1} (x_{i+2m} - 2 x_{i+m} + x_i)]^2 / (2 m^2 tau^2 (N - 3m + 1))
    TVAR  = tau^2 MVAR / 3                       (TDEV in seconds)
    OHVAR = sum_i (x_{i+3m} - 3 x_{i+2m} + 3 x_{i+m} - x_i)^2 / (6 tau^2 (N - 3m))
    HVAR  = the same sum over i = 0, m, 2m, ... (non-overlapping, K - 2 terms)

Each statistic costs O(N) per averaging factor: the differences are vector slices and the
modified variance's inner sums come from one cumulative sum of the (centred) second differences.

Frequency data y_0 .. y_{M-1} (fractional frequency, dimensionless) become M + 1 phase points
x_k = tau0 * sum_{i<k} (y_i - mean y): the mean frequency cancels in every difference and
removing it keeps the cumulative sum small (precision).

Gaps (NaN) are never interpolated.  A term is skipped when it touches a missing value:

* phase input: a term is used only if every phase point with a non-zero coefficient in it is
  present (a second difference needs its three points; a modified-Allan term needs all 3m
  points of its window);
* frequency input: a term is used only if its whole span of frequency samples is free of gaps
  (the phase is integrated with a running gap count, so the unknown phase offset after a gap
  never enters a used term).

The ``n`` reported with each value is the number of terms actually used, and the variance is
their mean square (divided by 2 tau^2 or 6 tau^2 as above).
"""

from __future__ import annotations

from typing import NamedTuple, Sequence

import numpy as np

from ..errors import InputError

#: Statistic names understood by :func:`deviation` (trade abbreviations).
STATISTICS = ("adev", "oadev", "mdev", "tdev", "hdev", "ohdev", "totdev")

#: Data kinds: phase [s] or fractional frequency [1].
DATA_KINDS = ("phase", "frequency")


class DeviationResult(NamedTuple):
    """Deviations at a set of averaging factors (arrays of equal length).

    Attributes
    ----------
    m : ndarray of int
        Averaging factors.
    tau_s : ndarray
        Averaging times m * tau0. [s]
    deviation : ndarray
        The deviation; NaN where no term could be formed (n == 0).  Dimensionless, except TDEV
        in seconds.
    n : ndarray of int
        Number of terms used (0 where the factor is too large or every term touches a gap).
    """

    m: np.ndarray
    tau_s: np.ndarray
    deviation: np.ndarray
    n: np.ndarray


class OverlappingVariances(NamedTuple):
    """Overlapping Allan and Hadamard variances of one or several phase series.

    Arrays have shape (len(m),) for a 1-D input, (len(m), n_series) for a 2-D input.

    Attributes
    ----------
    m : ndarray of int, shape (n_m,)
        Averaging factors.
    tau_s : ndarray, shape (n_m,)
        Averaging times. [s]
    avar : ndarray
        Overlapping Allan variance; NaN where n_avar == 0. [1]
    n_avar : ndarray of int
        Number of second differences used.
    hvar : ndarray
        Overlapping Hadamard variance; NaN where n_hvar == 0. [1]
    n_hvar : ndarray of int
        Number of third differences used.
    """

    m: np.ndarray
    tau_s: np.ndarray
    avar: np.ndarray
    n_avar: np.ndarray
    hvar: np.ndarray
    n_hvar: np.ndarray


# --------------------------------------------------------------------------------------------
# Input preparation


class _Series:
    """A phase series ready for differencing.

    ``x`` holds N phase points without NaN (missing points filled with 0; they are never used).
    Exactly one of ``bad`` (phase input: True where a phase point is missing) and ``cum_gap``
    (frequency input: cum_gap[k] = number of missing frequency samples among the first k
    intervals) is set when the series has gaps; both are None otherwise.
    """

    __slots__ = ("x", "bad", "cum_gap", "n_points", "cache")

    def __init__(self, x, bad=None, cum_gap=None):
        self.x = x
        self.bad = bad
        self.cum_gap = cum_gap
        self.n_points = int(x.shape[0])
        self.cache = {}          # derived series (the total deviation's reflection)

    @property
    def has_gaps(self) -> bool:
        return self.bad is not None or self.cum_gap is not None


def check_tau0(tau0_s: float) -> float:
    """Validate the sampling interval: a finite number > 0 [s]; returns it as float."""
    try:
        tau0 = float(tau0_s)
    except (TypeError, ValueError):
        raise InputError(f"tau0 must be a number of seconds, got {tau0_s!r}") from None
    if not np.isfinite(tau0) or tau0 <= 0:
        raise InputError(f"tau0 must be a finite number of seconds > 0, got {tau0_s!r}")
    return tau0


def check_data_kind(data: str) -> str:
    """Validate ``data`` ('phase' or 'frequency')."""
    if data not in DATA_KINDS:
        raise InputError(f"data must be 'phase' or 'frequency', got {data!r}")
    return data


def as_series_array(values, *, name: str = "values") -> np.ndarray:
    """1-D float64 copy of ``values``; NaN marks a missing value, infinities are refused."""
    arr = np.array(values, dtype=float)
    if arr.ndim != 1:
        raise InputError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if np.isinf(arr).any():
        k = int(np.flatnonzero(np.isinf(arr))[0])
        raise InputError(f"{name}[{k}] is infinite; use NaN for a missing value")
    return arr


def _phase_series(x: np.ndarray) -> _Series:
    bad = np.isnan(x)
    if bad.any():
        return _Series(np.where(bad, 0.0, x), bad=bad)
    return _Series(x)


def _frequency_series(y: np.ndarray, tau0_s: float) -> _Series:
    gap = np.isnan(y)
    n_valid = y.size - int(gap.sum())
    mean = float(np.mean(y[~gap])) if n_valid else 0.0
    inc = np.where(gap, 0.0, y - mean) * tau0_s
    x = np.empty(y.size + 1)
    x[0] = 0.0
    np.cumsum(inc, out=x[1:])
    if n_valid < y.size:
        cum_gap = np.zeros(y.size + 1, dtype=np.int64)
        np.cumsum(gap, out=cum_gap[1:])
        return _Series(x, cum_gap=cum_gap)
    return _Series(x)


def prepare(values, tau0_s: float, data: str) -> _Series:
    """Internal: phase series (with its gap bookkeeping) from phase [s] or frequency [1] input."""
    tau0 = check_tau0(tau0_s)
    check_data_kind(data)
    arr = as_series_array(values)
    if data == "phase":
        return _phase_series(arr)
    return _frequency_series(arr, tau0)


# --------------------------------------------------------------------------------------------
# Conversions


def phase_to_frequency(phase_s, tau0_s: float) -> np.ndarray:
    """Fractional frequency from phase: y_k = (x_{k+1} - x_k) / tau0.

    Parameters
    ----------
    phase_s : array_like, shape (N,)
        Phase (time deviation), NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]

    Returns
    -------
    ndarray, shape (N - 1,)
        Fractional frequency [1]; NaN where either phase point is missing.
    """
    tau0 = check_tau0(tau0_s)
    x = as_series_array(phase_s, name="phase_s")
    return np.diff(x) / tau0


def frequency_to_phase(frequency, tau0_s: float, *, remove_mean: bool = False) -> np.ndarray:
    """Phase from fractional frequency: x_0 = 0, x_k = tau0 * sum_{i<k} y_i.

    Parameters
    ----------
    frequency : array_like, shape (M,)
        Fractional frequency [1]; must be free of NaN (a missing frequency sample leaves the
        phase after it unknown: pass the frequency itself to the statistics with
        ``data="frequency"``, which handle such gaps exactly).
    tau0_s : float
        Sampling interval. [s]
    remove_mean : bool
        Subtract the mean frequency first (the phase then starts and ends at 0; every
        deviation is unchanged).

    Returns
    -------
    ndarray, shape (M + 1,)
        Phase. [s]
    """
    tau0 = check_tau0(tau0_s)
    y = as_series_array(frequency, name="frequency")
    if np.isnan(y).any():
        k = int(np.flatnonzero(np.isnan(y))[0])
        raise InputError(f"frequency[{k}] is missing: the phase after a gap is unknown; compute "
                         "the statistics from the frequency itself (data='frequency')")
    if remove_mean and y.size:
        y = y - y.mean()
    x = np.zeros(y.size + 1)
    np.cumsum(y * tau0, out=x[1:])
    return x


# --------------------------------------------------------------------------------------------
# Averaging factors


def max_factor(statistic: str, n_points: int) -> int:
    """Largest averaging factor m for which ``statistic`` has at least one term.

    Parameters
    ----------
    statistic : str
        One of :data:`STATISTICS`.
    n_points : int
        Number of phase points N (frequency input: number of values + 1).
    """
    n = int(n_points)
    if statistic in ("adev", "oadev", "totdev"):
        return max((n - 1) // 2, 0)       # N - 2m >= 1 (and K = floor((N-1)/m) >= 2)
    if statistic in ("mdev", "tdev"):
        return max(n // 3, 0)             # N - 3m + 1 >= 1
    if statistic in ("hdev", "ohdev"):
        return max((n - 1) // 3, 0)       # N - 3m >= 1 (and K >= 3)
    raise InputError(f"unknown statistic {statistic!r}; choose one of {', '.join(STATISTICS)}")


def averaging_factors(n_points: int, statistic: str, spacing: str = "octave") -> np.ndarray:
    """Averaging factors m of a spacing rule, up to :func:`max_factor`.

    Parameters
    ----------
    n_points : int
        Number of phase points N.
    statistic : str
        One of :data:`STATISTICS` (sets the largest m).
    spacing : {'octave', 'decade', 'all'}
        ``octave``: 1, 2, 4, 8, ...; ``decade``: 1, 2, 5, 10, 20, 50, ... (three per decade,
        the 1-2-5 series); ``all``: every m (O(N^2) work in total: for short series).

    Returns
    -------
    ndarray of int64
        Increasing factors (empty if the series is too short).
    """
    mmax = max_factor(statistic, n_points)
    if mmax < 1:
        return np.zeros(0, dtype=np.int64)
    if spacing == "octave":
        out = [1 << k for k in range(64) if (1 << k) <= mmax]
    elif spacing == "decade":
        out, decade = [], 1
        while decade <= mmax:
            out.extend(f * decade for f in (1, 2, 5) if f * decade <= mmax)
            decade *= 10
    elif spacing == "all":
        return np.arange(1, mmax + 1, dtype=np.int64)
    else:
        raise InputError(f"unknown spacing {spacing!r}; choose octave, decade or all")
    return np.asarray(out, dtype=np.int64)


def resolve_factors(m, n_points: int, statistic: str) -> np.ndarray:
    """Averaging factors from an int, a sequence of ints or a spacing name (internal)."""
    if isinstance(m, str):
        return averaging_factors(n_points, statistic, m)
    arr = np.atleast_1d(np.asarray(m))
    if arr.ndim != 1:
        raise InputError(f"averaging factors must be a flat list of positive integers, got {m!r}")
    if arr.size == 0:
        return np.zeros(0, dtype=np.int64)
    if not np.issubdtype(arr.dtype, np.integer):
        ok = (np.issubdtype(arr.dtype, np.floating) and bool(np.all(np.isfinite(arr)))
              and bool(np.all(arr == np.round(arr))))
        if not ok:
            raise InputError(f"averaging factors must be positive integers, got {m!r}")
    arr = arr.astype(np.int64)
    if arr.min() < 1:
        raise InputError(f"averaging factors must be positive integers, got {m!r}")
    return arr


# --------------------------------------------------------------------------------------------
# Differences with gap bookkeeping

def _difference_terms(x: np.ndarray, order: int, m: int, n_terms: int) -> np.ndarray:
    """terms[i] = sum_k c_k x[i + k m], i < n_terms, for order 2 or 3 (few temporaries).

    The same arithmetic for 1-D and 2-D (time on axis 0) arrays.
    """
    if order == 2:                                   # x_{i+2m} - 2 x_{i+m} + x_i
        t = np.add(x[2 * m:2 * m + n_terms], x[:n_terms])
        mid = np.multiply(x[m:m + n_terms], 2.0)
        t -= mid
        return t
    t = np.subtract(x[3 * m:3 * m + n_terms], x[:n_terms])   # x_{i+3m} - 3 x_{i+2m} ...
    mid = np.subtract(x[m:m + n_terms], x[2 * m:2 * m + n_terms])
    mid *= 3.0
    t += mid
    return t


def _differences(series: _Series, order: int, m: int):
    """All d-th differences of the phase at lag m, with their validity.

    Returns ``(terms, valid)``: terms[i] = sum_k c_k x_{i+km} for i = 0 .. N-1-order*m (0 where
    invalid), ``valid`` a boolean array or None when every term is valid.
    """
    n_terms = series.n_points - order * m
    terms = _difference_terms(series.x, order, m, n_terms)
    if series.bad is not None:
        bad = series.bad
        invalid = bad[:n_terms].copy()
        for k in range(1, order + 1):
            invalid |= bad[k * m:k * m + n_terms]
    elif series.cum_gap is not None:
        cg = series.cum_gap
        invalid = cg[order * m:order * m + n_terms] != cg[:n_terms]
    else:
        return terms, None
    terms[invalid] = 0.0
    return terms, ~invalid


def _sum_squares(terms, valid):
    n = int(terms.size) if valid is None else int(np.count_nonzero(valid))
    return float(np.dot(terms, terms)), n


def _window_sums(terms, valid, m: int):
    """Sums of m consecutive terms (j = 0 .. len-m), with validity of the whole window.

    The sum comes from one cumulative sum of the terms minus their mean (so that the running
    sum stays small for drifting data), hence O(len) per m.
    """
    n_out = terms.size - m + 1
    if valid is None:
        centre = float(terms.mean())
        terms -= centre                      # in place: the caller's terms are not reused
    else:
        nv = int(np.count_nonzero(valid))
        centre = float(terms[valid].sum() / nv) if nv else 0.0
        terms -= centre
        terms[~valid] = 0.0
    c = np.empty(terms.size + 1)
    c[0] = 0.0
    np.cumsum(terms, out=c[1:])
    sums = np.subtract(c[m:], c[:n_out])
    sums += m * centre
    if valid is None:
        return sums, None
    cinv = np.zeros(terms.size + 1, dtype=np.int64)
    np.cumsum(~valid, out=cinv[1:])
    win_valid = cinv[m:] == cinv[:n_out]
    sums[~win_valid] = 0.0
    return sums, win_valid


# --------------------------------------------------------------------------------------------
# Variances at one factor: (variance, n) with variance NaN when n == 0


def _var_allan(series, m, tau_s, overlapping):
    terms, valid = _differences(series, 2, m)
    if not overlapping:
        terms = terms[::m]
        valid = None if valid is None else valid[::m]
    ss, n = _sum_squares(terms, valid)
    return (ss / (2.0 * tau_s * tau_s * n) if n else np.nan), n


def _var_hadamard(series, m, tau_s, overlapping):
    terms, valid = _differences(series, 3, m)
    if not overlapping:
        terms = terms[::m]
        valid = None if valid is None else valid[::m]
    ss, n = _sum_squares(terms, valid)
    return (ss / (6.0 * tau_s * tau_s * n) if n else np.nan), n


def _var_modified(series, m, tau_s):
    terms, valid = _differences(series, 2, m)
    sums, win_valid = _window_sums(terms, valid, m)
    ss, n = _sum_squares(sums, win_valid)
    return (ss / (2.0 * m * m * tau_s * tau_s * n) if n else np.nan), n


def variance_at(series: _Series, statistic: str, m: int, tau0_s: float):
    """Internal: (variance, n) of one statistic at one factor of a prepared series.

    The 'variance' of tdev is TVAR [s^2]; of the others the dimensionless variance.
    """
    m = int(m)
    if m < 1 or m > max_factor(statistic, series.n_points):
        return np.nan, 0
    tau_s = m * tau0_s
    if statistic == "oadev":
        return _var_allan(series, m, tau_s, True)
    if statistic == "adev":
        return _var_allan(series, m, tau_s, False)
    if statistic == "ohdev":
        return _var_hadamard(series, m, tau_s, True)
    if statistic == "hdev":
        return _var_hadamard(series, m, tau_s, False)
    if statistic == "mdev":
        return _var_modified(series, m, tau_s)
    if statistic == "tdev":
        var, n = _var_modified(series, m, tau_s)
        return var * tau_s * tau_s / 3.0, n      # TVAR = tau^2 MVAR / 3
    if statistic == "totdev":
        from .total import totvar_at
        return totvar_at(series, m, tau0_s)
    raise InputError(f"unknown statistic {statistic!r}; choose one of {', '.join(STATISTICS)}")


# --------------------------------------------------------------------------------------------
# Public functions


def deviation(statistic: str, values, tau0_s: float, m="octave", *,
              data: str = "phase") -> DeviationResult:
    """One stability deviation at several averaging factors.

    Parameters
    ----------
    statistic : {'adev', 'oadev', 'mdev', 'tdev', 'hdev', 'ohdev', 'totdev'}
        Allan (non-overlapping, overlapping), modified Allan, time, Hadamard (non-overlapping,
        overlapping) or total deviation.
    values : array_like, shape (n,)
        Phase [s] or fractional frequency [1], equally spaced; NaN marks a missing value.
    tau0_s : float
        Sampling interval. [s]
    m : int, sequence of int, or {'octave', 'decade', 'all'}
        Averaging factors (tau = m * tau0).  Factors beyond the record give n = 0, NaN.
    data : {'phase', 'frequency'}
        What ``values`` holds.

    Returns
    -------
    DeviationResult
        m, tau [s], deviation (dimensionless; TDEV in s), number of terms n.

    Examples
    --------
    >>> y = [892, 809, 823, 798, 671, 644, 883, 903, 677]   # SP 1065 small data set
    >>> r = deviation("oadev", y, 1.0, [1, 2], data="frequency")
    >>> [round(float(v), 5) for v in r.deviation]
    [91.22945, 85.95287]
    """
    series = prepare(values, tau0_s, data)
    tau0 = float(tau0_s)
    factors = resolve_factors(m, series.n_points, statistic)
    dev = np.full(factors.size, np.nan)
    nterms = np.zeros(factors.size, dtype=np.int64)
    for k, mk in enumerate(factors):
        var, n = variance_at(series, statistic, int(mk), tau0)
        nterms[k] = n
        if n:
            dev[k] = np.sqrt(var)
    return DeviationResult(factors, factors * tau0, dev, nterms)


def adev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Non-overlapping Allan deviation (see :func:`deviation`)."""
    return deviation("adev", values, tau0_s, m, data=data)


def oadev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Overlapping Allan deviation (see :func:`deviation`)."""
    return deviation("oadev", values, tau0_s, m, data=data)


def mdev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Modified Allan deviation (see :func:`deviation`)."""
    return deviation("mdev", values, tau0_s, m, data=data)


def tdev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Time deviation TDEV = tau * MDEV / sqrt(3) [s] (see :func:`deviation`)."""
    return deviation("tdev", values, tau0_s, m, data=data)


def hdev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Non-overlapping Hadamard deviation (see :func:`deviation`)."""
    return deviation("hdev", values, tau0_s, m, data=data)


def ohdev(values, tau0_s: float, m="octave", *, data: str = "phase") -> DeviationResult:
    """Overlapping Hadamard deviation (see :func:`deviation`)."""
    return deviation("ohdev", values, tau0_s, m, data=data)


def overlapping_avar_hvar(phase_s, tau0_s: float, m: int | Sequence[int]) -> OverlappingVariances:
    """Overlapping Allan and Hadamard variances of phase series, fast, with term counts.

    Meant for many series at once (for example every pairwise clock difference of an
    ensemble): columns are independent series sharing the time axis.

    Parameters
    ----------
    phase_s : array_like, shape (N,) or (N, n_series)
        Phase on a regular grid, time on axis 0; NaN where missing. [s]
    tau0_s : float
        Sampling interval. [s]
    m : int or sequence of int
        Averaging factors (>= 1).

    Returns
    -------
    OverlappingVariances
        ``avar`` = sum (x_{i+2m} - 2x_{i+m} + x_i)^2 / (2 tau^2 n_avar) and ``hvar`` =
        sum (x_{i+3m} - 3x_{i+2m} + 3x_{i+m} - x_i)^2 / (6 tau^2 n_hvar), each over the terms
        whose phase points are all present; NaN where a count is 0.  Shapes (n_m,) for 1-D
        input, (n_m, n_series) for 2-D input.

    Notes
    -----
    Cost O(N * n_series) per factor.  Without gaps the values equal :func:`oadev` and
    :func:`ohdev` squared.
    """
    tau0 = check_tau0(tau0_s)
    x = np.array(phase_s, dtype=float)
    if x.ndim not in (1, 2):
        raise InputError(f"phase_s must be 1-D or 2-D (time on axis 0), got shape {x.shape}")
    one_d = x.ndim == 1
    x = x[:, None] if one_d else x
    if np.isinf(x).any():
        raise InputError("phase_s holds an infinite value; use NaN for a missing value")
    factors = resolve_factors(m, x.shape[0], "oadev")
    bad = np.isnan(x)
    gaps = bool(bad.any())
    if gaps:
        x = np.where(bad, 0.0, x)
    n_pts, n_ser = x.shape
    shape = (factors.size, n_ser)
    avar, hvar = np.full(shape, np.nan), np.full(shape, np.nan)
    n_a, n_h = np.zeros(shape, dtype=np.int64), np.zeros(shape, dtype=np.int64)
    for k, mk in enumerate(factors):
        mk = int(mk)
        tau2 = (mk * tau0) ** 2
        for order, out, counts, norm in ((2, avar, n_a, 2.0), (3, hvar, n_h, 6.0)):
            nt = n_pts - order * mk
            if nt < 1:
                continue
            t = _difference_terms(x, order, mk, nt)
            if gaps:
                inv = bad[:nt].copy()
                for j in range(1, order + 1):
                    inv |= bad[j * mk:j * mk + nt]
                t[inv] = 0.0
                cnt = nt - inv.sum(axis=0)
            else:
                cnt = np.full(n_ser, nt)
            counts[k] = cnt
            out[k] = np.where(cnt > 0, np.einsum("ij,ij->j", t, t)
                              / (norm * tau2 * np.maximum(cnt, 1)), np.nan)
    if one_d:
        avar, hvar, n_a, n_h = avar[:, 0], hvar[:, 0], n_a[:, 0], n_h[:, 0]
    return OverlappingVariances(factors, factors * tau0, avar, n_a, hvar, n_h)
