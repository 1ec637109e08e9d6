"""Internal: stability weights of the time scale (pure functions).

* Inverse-variance weights w_i = (1/sigma_i^2) / sum_j (1/sigma_j^2): the minimum-variance
  combination of independent clocks (Tavella & Thomas 1991, Metrologia 28, 57-63).
* A relative cap w_max = A / N applied by iterative water-filling (our own procedure): weights
  above the cap are set to it and the remaining weight is shared among the others in proportion
  to their uncapped weights, repeated until none exceeds the cap.
* The self-inclusion correction: a clock compared with a scale that contains it shows the
  variance sigma_i^2 (1 - w_i) instead of sigma_i^2 (derived here, for w_i = sigma_E^2 / sigma_i^2);
  estimate sigma_i^2 = eps_i^2 / (1 - w_i) and iterate.
"""

from __future__ import annotations

import numpy as np


def inverse_variance_weights(variance: np.ndarray, eligible: np.ndarray) -> np.ndarray:
    """Normalised 1/variance weights over the eligible clocks.

    Parameters
    ----------
    variance : ndarray, shape (n,)
        Variance of each clock's prediction error (any consistent unit); non-finite or <= 0
        entries are not eligible.
    eligible : ndarray of bool, shape (n,)

    Returns
    -------
    ndarray, shape (n,)
        Weights >= 0 summing to 1 (all zero if no clock is eligible).
    """
    var = np.asarray(variance, dtype=float)
    ok = np.asarray(eligible, dtype=bool) & np.isfinite(var) & (var > 0)
    w = np.zeros(var.shape)
    if ok.any():
        w[ok] = 1.0 / var[ok]
        w /= w.sum()
    return w


def cap_weights(weights: np.ndarray, cap: float) -> np.ndarray:
    """Apply an absolute upper limit to normalised weights by iterative water-filling.

    Parameters
    ----------
    weights : ndarray, shape (n,)
        Non-negative weights summing to 1.
    cap : float
        Upper limit of any weight; if fewer than 1/cap clocks have weight the limit cannot be
        met and the weights are made equal over the clocks with non-zero weight.

    Returns
    -------
    ndarray, shape (n,)
        Weights <= cap (where feasible), summing to 1, proportional to the input among the
        clocks below the cap.
    """
    w = np.asarray(weights, dtype=float).copy()
    pos = w > 0
    n_pos = int(pos.sum())
    if n_pos == 0:
        return w
    if n_pos * cap < 1.0 + 1e-12:
        w[pos] = 1.0 / n_pos
        return w
    capped = np.zeros(w.shape, dtype=bool)
    for _ in range(w.size + 1):
        over = (w > cap * (1 + 1e-12)) & ~capped
        if not over.any():
            break
        capped |= over
        free = pos & ~capped
        w[capped] = cap
        w[free] *= (1.0 - cap * capped.sum()) / w[free].sum()
    return w


def relative_cap_weights(variance: np.ndarray, eligible: np.ndarray, cap_factor: float,
                         self_inclusion_iterations: int = 2) -> np.ndarray:
    """Inverse-variance weights with the relative cap A/N and the self-inclusion correction.

    Parameters
    ----------
    variance : ndarray, shape (n,)
        Variance of each clock's prediction error measured against the scale (which contains
        the clock); the correction divides by (1 - w_i).
    eligible : ndarray of bool, shape (n,)
        Clocks allowed a weight (active, not in probation or excluded).
    cap_factor : float
        A in w_max = A / N, N the number of eligible clocks.
    self_inclusion_iterations : int
        Number of times the weights are recomputed with sigma_i^2 = eps_i^2 / (1 - w_i).

    Returns
    -------
    ndarray, shape (n,)
    """
    eligible = np.asarray(eligible, dtype=bool)
    n_ok = int(eligible.sum())
    if n_ok == 0:
        return np.zeros(len(eligible))
    cap = cap_factor / n_ok
    var = np.asarray(variance, dtype=float)
    w = cap_weights(inverse_variance_weights(var, eligible), cap)
    for _ in range(self_inclusion_iterations):
        corrected = var / np.clip(1.0 - w, 1e-3, None)
        w = cap_weights(inverse_variance_weights(corrected, eligible), cap)
    return w
