"""Total deviation TOTDEV (internal module).

Definition (Howe's total variance; Riley, Handbook of Frequency Stability Analysis, SP 1065,
2008; the reflection convention fixed by reproducing the handbook's validation values, recalled
from memory, in tests/test_deviations.py).  N phase points x_1 .. x_N, extended at both ends by
**odd reflection** for j = 1 .. N-2::

    x*_{1-j} = 2 x_1 - x_{1+j}          x*_{N+j} = 2 x_N - x_{N-j}

    TOTVAR(tau) = sum_{i=2}^{N-1} (x*_{i-m} - 2 x*_i + x*_{i+m})^2 / (2 tau^2 (N - 2))

It equals OAVAR at m = 1 and is published without bias correction.  For frequency input the
odd reflection of the phase is the even (mirror) reflection of the frequency samples,
y*_{-j} = y_{j-1}; the reflected frequency is integrated with the same gap count as the
original, so a term is used only if its span of (original or reflected) frequency samples is
gap-free.  For phase input a reflected point is missing when x_1 (or x_N) or its mirror point
is missing, and a term is used only when its three points are present.  ``n`` counts the terms
used (N - 2 without gaps).  Cost O(N) per averaging factor.
"""

from __future__ import annotations

import numpy as np

from .deviations import _Series


def _extended(series: _Series):
    """The reflected series (3N - 4 points) and the index of x_1 in it, cached on ``series``."""
    ext = series.cache.get("totdev")
    if ext is not None:
        return ext
    n = series.n_points
    x = series.x
    mirror = slice(n - 2, 0, -1)                  # x_{N-2}, ..., x_1 (0-based indices)
    if series.cum_gap is not None:
        # frequency input: mirror the increments (and their gap flags), then integrate
        inc = np.diff(x)
        gap = np.diff(series.cum_gap) > 0
        left = slice(n - 3, None, -1) if n >= 3 else slice(0, 0)
        inc_ext = np.concatenate([inc[left], inc, inc[mirror]])
        gap_ext = np.concatenate([gap[left], gap, gap[mirror]])
        xe = np.zeros(inc_ext.size + 1)
        np.cumsum(inc_ext, out=xe[1:])
        cg = np.zeros(inc_ext.size + 1, dtype=np.int64)
        np.cumsum(gap_ext, out=cg[1:])
        ext = (_Series(xe, cum_gap=cg), n - 2)
    else:
        xe = np.concatenate([2.0 * x[0] - x[mirror], x, 2.0 * x[-1] - x[mirror]])
        if series.bad is not None:
            b = series.bad
            be = np.concatenate([b[0] | b[mirror], b, b[-1] | b[mirror]])
            ext = (_Series(np.where(be, 0.0, xe), bad=be), n - 2)
        else:
            ext = (_Series(xe), n - 2)
    series.cache["totdev"] = ext
    return ext


def totvar_at(series: _Series, m: int, tau0_s: float):
    """Total variance at factor m: (TOTVAR [1] or NaN, number of terms used)."""
    n = series.n_points
    if m < 1 or n < 3:
        return np.nan, 0
    ext, off = _extended(series)
    xe = ext.x
    lo, hi = off + 1, off + n - 1                 # centres i = 2 .. N-1 (1-based)
    terms = xe[lo - m:hi - m] - 2.0 * xe[lo:hi] + xe[lo + m:hi + m]
    if ext.bad is not None:
        b = ext.bad
        valid = ~(b[lo - m:hi - m] | b[lo:hi] | b[lo + m:hi + m])
        count = int(np.count_nonzero(valid))
        terms = terms[valid]
    elif ext.cum_gap is not None:
        cg = ext.cum_gap
        valid = cg[lo + m:hi + m] == cg[lo - m:hi - m]
        count = int(np.count_nonzero(valid))
        terms = terms[valid]
    else:
        count = terms.size
    if count == 0:
        return np.nan, 0
    tau_s = m * tau0_s
    return float(np.dot(terms, terms)) / (2.0 * tau_s * tau_s * count), count


def totdev(values, tau0_s: float, m="octave", *, data: str = "phase"):
    """Total deviation (odd reflection at both ends, not bias-corrected).

    Parameters
    ----------
    values : array_like, shape (n,)
        Phase [s] or fractional frequency [1]; NaN marks a missing value.
    tau0_s : float
        Sampling interval. [s]
    m : int, sequence of int, or {'octave', 'decade', 'all'}
        Averaging factors (up to (N - 1) // 2 for N phase points).
    data : {'phase', 'frequency'}
        What ``values`` holds.

    Returns
    -------
    DeviationResult
        m, tau [s], deviation [1], number of terms n (N - 2 without gaps).

    Examples
    --------
    >>> y = [892, 809, 823, 798, 671, 644, 883, 903, 677]   # SP 1065 small data set
    >>> round(float(totdev(y, 1.0, 2, data="frequency").deviation[0]), 5)
    93.90379
    """
    from .deviations import deviation
    return deviation("totdev", values, tau0_s, m, data=data)
