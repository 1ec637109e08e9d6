"""Internal: the stability of an ensemble scale, estimated without knowing true time.

The scale E is not observable on its own: the archive holds clock - scale for every clock, and
all that does not depend on E is the clock differences.  We model E, at each averaging time tau,
as a fixed linear combination of the clocks plus an independent remainder:

    Delta E = sum_j w_j(tau) Delta x_j + e,         sum_j w_j = 1,

Delta the second (Allan) or third (Hadamard) difference over tau.  Then for any clock k

    -Delta(offset_k) = Delta E - Delta x_k = sum_{j != k} w_j Delta(x_j - x_k) + e,

a linear regression of an observed series on observed series: the *effective weights*
w_j(tau) come out by least squares, constrained to w_j >= 0 for every clock (the anchor's
1 - sum too); unconstrained, the choice of k would not change the fit; k is the member with
the largest mean weight.  e is the regression's residual.  Under the model, with independent
clocks,

    sigma_E^2(tau) = sum_j w_j(tau)^2 sigma_j^2(tau) + Var(e) / (2 tau^2)   [Allan; 6 tau^2 Hadamard]

with sigma_j^2 each clock's own variance from the N-cornered hat (its working value; see
:mod:`ensemble.assess.ownstability`).

Why not the archive's weights?  /scale/weight are the weights of the phase update at each
epoch.  A Kalman ensemble takes its long-term frequency from filtered frequency estimates, so
at averaging times of days its effective weights differ from the phase weights.  In the seeded
simulation of tests/test_assess_scale.py (2 masers, 3 cesium beams, a rubidium; 60 days,
hourly) sum w_phase^2 sigma_j^2 gave 0.93, 0.98, 1.26, 2.6 and 3.6 times the true Hadamard
deviation of the scale at 1 h, 4 h, 1 d, 2 d and 4 d, the effective weights 0.99, 1.03, 1.00,
1.15 and 1.01.  The remainder e carries what the filter's memory adds; it was about half of the
offset variance at tau >= 1 d in that simulation.

Uncertainty: the propagated hat covariance, c^T Cov c with c_j = w_j^2 (the weights and the
remainder are taken as known).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import nnls

#: Normalisation of the difference variances: 2 tau^2 (Allan), 6 tau^2 (Hadamard).
_NORM = {2: 2.0, 3: 6.0}


@dataclass(frozen=True, eq=False)
class EffectiveWeights:
    """The scale as a combination of clocks at each averaging time.

    Attributes
    ----------
    m : ndarray of int, shape (n_tau,)
    order : int
        2 (Allan) or 3 (Hadamard).
    weights : ndarray, shape (n_tau, N)
        Effective weights w_j(tau) (rows sum to 1; 0 for clocks never weighted). [1]
    remainder_variance : ndarray, shape (n_tau,)
        Var(e) / (2 tau^2) or / (6 tau^2): the part of the scale's variance no clock
        combination explains. [1]
    explained : ndarray, shape (n_tau,)
        Share of the offset variance the combination explains (1 - residual / total). [1]
    n_terms : ndarray of int, shape (n_tau,)
        Differences used.
    """

    m: np.ndarray
    order: int
    weights: np.ndarray
    remainder_variance: np.ndarray
    explained: np.ndarray
    n_terms: np.ndarray


def _difference(x: np.ndarray, m: int, order: int) -> np.ndarray:
    if order == 2:
        return x[2 * m:] - 2.0 * x[m:-m] + x[:-2 * m]
    return x[3 * m:] - 3.0 * x[2 * m:-m] + 3.0 * x[m:-2 * m] - x[:-3 * m]


def effective_weights(offset_s: np.ndarray, tau0_s: float, m, order: int,
                      weighted: np.ndarray, anchor: int) -> EffectiveWeights:
    """Effective weights of the clocks in the scale at each averaging time.

    Parameters
    ----------
    offset_s : ndarray, shape (T, N)
        Clock - scale. [s]
    tau0_s : float
        Sampling interval. [s]
    m : sequence of int
        Averaging factors.
    order : {2, 3}
        Difference order (Allan, Hadamard).
    weighted : ndarray of bool, shape (N,)
        Clocks that ever had weight in the scale (the others get 0).
    anchor : int
        Column of the clock k of the regression (a weighted clock).

    Returns
    -------
    EffectiveWeights
    """
    x = np.asarray(offset_s, dtype=float)
    ms = np.asarray(m, dtype=int)
    n_c = x.shape[1]
    others = [j for j in np.flatnonzero(weighted) if j != anchor]
    w_out = np.zeros((ms.size, n_c))
    rem = np.full(ms.size, np.nan)
    expl = np.full(ms.size, np.nan)
    n_terms = np.zeros(ms.size, dtype=int)
    for k, mk in enumerate(ms):
        mk = int(mk)
        if x.shape[0] <= order * mk:
            continue
        y = -_difference(x[:, anchor], mk, order)
        cols = [_difference(x[:, j] - x[:, anchor], mk, order) for j in others]
        a = np.column_stack(cols) if cols else np.zeros((y.size, 0))
        ok = np.isfinite(y) & np.all(np.isfinite(a), axis=1)
        if ok.sum() < max(4, len(others) + 2):
            continue
        yk, ak = y[ok], a[ok]
        norm = _NORM[order] * (mk * tau0_s) ** 2
        if others:
            scale = np.maximum(np.sqrt(np.mean(ak * ak, axis=0)), 1e-300)
            unit = max(float(np.sqrt(np.mean(yk * yk))), 1e-300)
            a_s, y_s = ak / scale, yk / unit          # unit columns; w = v unit / scale
            v, *_ = np.linalg.lstsq(a_s, y_s, rcond=None)
            to_w = unit / scale
            if not np.all(np.isfinite(v)) or np.any(v < 0) or np.sum(v * to_w) > 1.0:
                v = _simplex_fit(a_s, y_s, to_w)
            wj = v * to_w
            resid = yk - ak @ wj
        else:
            wj = np.zeros(0)
            resid = yk
        w_out[k, others] = np.maximum(wj, 0.0)
        wj = w_out[k, others]
        w_out[k, anchor] = 1.0 - float(np.sum(wj))
        rem[k] = float(np.mean(resid * resid)) / norm
        total = float(np.mean(yk * yk))
        expl[k] = 1.0 - float(np.mean(resid * resid)) / total if total > 0 else np.nan
        n_terms[k] = int(ok.sum())
    return EffectiveWeights(ms, order, w_out, rem, expl, n_terms)


def _simplex_fit(a: np.ndarray, y: np.ndarray, to_w: np.ndarray) -> np.ndarray:
    """Least squares a v = y with every weight w_j = v_j to_w_j >= 0 and sum_j w_j <= 1 (the
    anchor's weight 1 - sum w_j >= 0 too): non-negative least squares with the anchor's weight
    as a slack variable and sum = 1 imposed by a heavily weighted extra row."""
    big = 1e3 * math.sqrt(a.shape[0])
    rows = np.vstack([np.hstack([a, np.zeros((a.shape[0], 1))]),
                      big * np.append(to_w, 1.0)[None, :]])
    sol, _ = nnls(rows, np.append(y, big), maxiter=50 * rows.shape[1])
    v = sol[:-1]
    total = float(np.sum(v * to_w))
    return v / total if total > 1.0 else v


def scale_variance(weights: EffectiveWeights, working: np.ndarray, covariance: np.ndarray):
    """The scale's variance sum_j w_j^2 sigma_j^2 + remainder, and its uncertainty.

    Parameters
    ----------
    weights : EffectiveWeights
    working : ndarray, shape (N, n_tau)
        Each clock's own variance (working values). [1]
    covariance : ndarray, shape (n_tau, N, N)
        Covariance of the hat estimates. [1]

    Returns
    -------
    (variance, std) : ndarrays of shape (n_tau,) [1]
    """
    w2 = weights.weights ** 2                              # (n_tau, N)
    val = np.where(w2 > 0, w2 * working.T, 0.0)
    var = np.sum(val, axis=1) + weights.remainder_variance
    cov = np.where(np.isfinite(covariance), covariance, 0.0)
    std = np.sqrt(np.maximum(np.einsum("ki,kij,kj->k", w2, cov, w2), 0.0))
    bad = ~np.isfinite(var) | np.any((w2 > 0) & ~np.isfinite(working.T), axis=1)
    return np.where(bad, np.nan, var), np.where(bad, np.nan, std)


def difference_std(w_a: EffectiveWeights, w_b: EffectiveWeights, covariance: np.ndarray):
    """Standard uncertainty of scale_variance(b) - scale_variance(a) (same hat), shape (n_tau,)."""
    c = w_b.weights ** 2 - w_a.weights ** 2
    cov = np.where(np.isfinite(covariance), covariance, 0.0)
    return np.sqrt(np.maximum(np.einsum("ki,kij,kj->k", c, cov, c), 0.0))
