"""Rows on the regular sampling grid, for the statistics that index time by row.

The deviations of :mod:`ensemble.stability.deviations` take row k as the epoch k tau0.  The
measurements and the archive keep only the epochs that exist, so an epoch missing altogether (a
comparator restart leaves no row) must become a row of NaN before a statistic is computed:
a difference across the gap would otherwise span a longer time than its averaging time says.
"""

from __future__ import annotations

import numpy as np


def on_grid(elapsed_s: np.ndarray, tau0_s: float, *arrays: np.ndarray):
    """Rows placed on the regular sampling grid, NaN rows where an epoch is missing.

    The stability statistics index time by row, so an epoch missing from the archive (a
    comparator restart leaves no row at all) must become a row of NaN: a difference across the
    gap would otherwise span a longer time than its averaging time says.

    Parameters
    ----------
    elapsed_s : ndarray, shape (T,)
        Epochs on the continuous time axis. [s]
    tau0_s : float
        Nominal sampling interval. [s]
    arrays : ndarray, shape (T, ...) each
        Per-epoch arrays to place.

    Returns
    -------
    slot : ndarray of int, shape (T,)
        Grid slot of each row (slot k is elapsed_s[0] + k tau0).
    misfit : float
        Largest distance of an epoch from its slot, in sampling intervals.
    placed : list of ndarray, shape (K, ...) each
        The arrays on the grid, K = slot[-1] + 1 (float; NaN in empty slots).
    """
    e = np.asarray(elapsed_s, dtype=float)
    pos = (e - e[0]) / float(tau0_s)
    slot = np.rint(pos).astype(np.int64)
    misfit = float(np.max(np.abs(pos - slot))) if e.size else 0.0
    n_k = int(slot[-1]) + 1 if e.size else 0
    placed = []
    for a in arrays:
        a = np.asarray(a, dtype=float)
        out = np.full((n_k,) + a.shape[1:], np.nan)
        out[slot[::-1]] = a[::-1]          # on a repeated slot the first row wins
        placed.append(out)
    return slot, misfit, placed
