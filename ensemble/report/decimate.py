"""Internal: thinning long series for plotting, and runs of standing codes.

A figure a few hundred pixels wide cannot show 87 600 hourly points per clock, and drawing
them all makes the report slow and its images large.  Series are therefore thinned for the
pictures only, never for a statistic:

* **lines** (offsets, phase errors): the series is cut into ``n_buckets`` runs of consecutive
  epochs and each run keeps its smallest and its largest value, in time order (a min/max
  envelope).  Every extreme survives, so a single outlier or a step still shows, and the drawn
  band is what the full series would have covered;  a run with no value at all becomes a NaN,
  so gaps longer than a run still break the line;
* **stacked weights**: each run keeps its mean (weights are fractions of one; the mean keeps
  each clock's share and the sum of one).

Standing spans (probation, excluded ...) are found at full resolution, so even a one-epoch
exclusion is drawn.
"""

from __future__ import annotations

import numpy as np

#: Runs per figure line: about two points per pixel column of a 1000-pixel-wide panel.
DEFAULT_BUCKETS = 1000


def _padded(values: np.ndarray, n_buckets: int):
    """Reshape axis 0 into (n_runs, size, ...) padding the end with NaN.

    Returns the reshaped values and, per run, the indices of its first and last epoch (runs
    made only of padding are dropped).
    """
    t = values.shape[0]
    size = -(-t // n_buckets)
    n_runs = -(-t // size)
    pad = n_runs * size - t
    if pad:
        fill = np.full((pad,) + values.shape[1:], np.nan)
        values = np.concatenate([values, fill])
    first = np.arange(n_runs) * size
    last = np.minimum(first + size, t) - 1
    return values.reshape((n_runs, size) + values.shape[1:]), first, last


def envelope(mjd, values, n_buckets: int = DEFAULT_BUCKETS):
    """Min/max envelope of one or several series for plotting.

    Parameters
    ----------
    mjd : array_like, shape (T,)
        Epochs. [d]
    values : array_like, shape (T,) or (T, K)
        Series (any unit); NaN where missing.
    n_buckets : int
        Number of runs of consecutive epochs; each gives two points.

    Returns
    -------
    (ndarray, ndarray)
        Epochs, shape (M,), and values, shape (M,) or (M, K), M <= 2 n_buckets.  Unchanged
        when T <= 2 n_buckets.  For several series each keeps its own extremes; the epochs
        are the bucket's first and last epoch, the smaller value at the first when it came
        first.
    """
    t = np.asarray(mjd, dtype=float)
    v = np.asarray(values, dtype=float)
    if t.shape[0] <= 2 * n_buckets:
        return t, v
    one = v.ndim == 1
    v2 = v[:, None] if one else v
    vb, first, last = _padded(v2, n_buckets)
    finite = np.isfinite(vb)
    lo_i = np.argmin(np.where(finite, vb, np.inf), axis=1)
    hi_i = np.argmax(np.where(finite, vb, -np.inf), axis=1)
    lo = np.take_along_axis(vb, lo_i[:, None], axis=1)[:, 0]
    hi = np.take_along_axis(vb, hi_i[:, None], axis=1)[:, 0]
    empty = ~finite.any(axis=1)
    lo[empty] = np.nan
    hi[empty] = np.nan
    first_is_lo = lo_i <= hi_i
    a = np.where(first_is_lo, lo, hi)
    b = np.where(first_is_lo, hi, lo)
    out_t = np.column_stack([t[first], t[last]]).ravel()
    out_v = np.stack([a, b], axis=1).reshape(2 * first.size, -1)
    return out_t, (out_v[:, 0] if one else out_v)


def bucket_means(mjd, values, n_buckets: int = DEFAULT_BUCKETS):
    """Means over runs of consecutive epochs (for stacked weights).

    Parameters
    ----------
    mjd : array_like, shape (T,)
        Epochs. [d]
    values : array_like, shape (T, K)
        Series; NaN where missing (left out of the mean; a run with none gives 0).

    Returns
    -------
    (ndarray, ndarray)
        Mid epochs of the runs, shape (M,), and the means, shape (M, K).  Unchanged when
        T <= n_buckets.
    """
    t = np.asarray(mjd, dtype=float)
    v = np.asarray(values, dtype=float)
    if t.shape[0] <= n_buckets:
        return t, np.nan_to_num(v)
    vb, first, last = _padded(v, n_buckets)
    finite = np.isfinite(vb)
    counts = finite.sum(axis=1)
    sums = np.where(finite, vb, 0.0).sum(axis=1)
    means = np.divide(sums, counts, out=np.zeros_like(sums), where=counts > 0)
    mid = 0.5 * (t[first] + t[last])
    return mid, means


def spans(mjd, codes, code: int, step_d: float) -> list[tuple[float, float]]:
    """Runs of consecutive epochs whose code equals ``code``, as (start, end) epochs.

    Parameters
    ----------
    mjd : array_like, shape (T,)
        Epochs. [d]
    codes : array_like, shape (T,)
        Standing codes of one clock.
    code : int
        The standing wanted.
    step_d : float
        Nominal sampling interval; each run extends to its last epoch plus one interval, so
        a single epoch has a visible width. [d]

    Returns
    -------
    list of (float, float)
        Start and end of each run [d].
    """
    t = np.asarray(mjd, dtype=float)
    hit = np.asarray(codes) == code
    if not hit.any():
        return []
    edges = np.diff(np.concatenate([[0], hit.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1) - 1
    return [(float(t[a]), float(t[b]) + step_d) for a, b in zip(starts, stops)]
