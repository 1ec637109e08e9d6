"""N-cornered hat: individual clock variances from the variances of their pair differences.

For independent clocks the variance of a difference is the sum of the clocks' variances,
sigma_ij^2 = sigma_i^2 + sigma_j^2 (variances of independent terms add), for any variance that
is a quadratic form of the phase (Allan, Hadamard, modified ...) and for any quantity that adds
like one (the noise parameters q1, q2, q3, r of the clock model).  Three clocks (Gray & Allan
1974)::

    sigma_1^2 = (sigma_12^2 + sigma_13^2 - sigma_23^2) / 2

N clocks with every pair measured (closed form derived here, equal to least squares over all
pairs; checked in tests/test_hat.py)::

    sigma_i^2 = [ sum_{j != i} sigma_ij^2 - S_tot / (N - 1) ] / (N - 2),
    S_tot = sum_{j<k} sigma_jk^2

With pairs missing or with different weights the estimate is the weighted least-squares solution
of A sigma^2 = s, A[p, i] = 1 for the two clocks of pair p.

Negative estimates occur for a clock much better than the others, short data or correlated clocks
(Gray & Allan 1974).  They are never clipped: they come back flagged, with a message, and a
:class:`NegativeVarianceWarning` is issued.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Hashable, Sequence

import numpy as np

__all__ = ["HatResult", "NegativeVarianceWarning", "n_cornered_hat", "three_cornered_hat",
           "hat_design_matrix", "negative_messages"]


class NegativeVarianceWarning(UserWarning):
    """An N-cornered-hat estimate came out negative (it is returned unchanged and flagged)."""


@dataclass(frozen=True, eq=False)
class HatResult:
    """Individual clock variances separated from pair-difference variances.

    Attributes
    ----------
    clocks : tuple
        Clock labels, in the row order of the arrays.
    variance : ndarray, shape (n_clocks,) or (n_clocks, n_tau)
        Estimated variance of each clock, in the unit of the input (e.g. [1] for an Allan
        variance, [s] for q1).  May be negative (see ``negative``); never clipped.
    std : ndarray, same shape as ``variance``
        Standard uncertainty of each estimate propagated from the pair uncertainties; NaN where
        no pair uncertainty was given.  Same unit as ``variance``.
    negative : ndarray of bool, same shape as ``variance``
        True where the estimate is below zero.
    messages : tuple of str
        One warning text per clock with a negative estimate (empty when there is none).
    """

    clocks: tuple
    variance: np.ndarray
    std: np.ndarray
    negative: np.ndarray
    messages: tuple[str, ...]


def hat_design_matrix(pairs: Sequence[tuple[Hashable, Hashable]],
                      clocks: Sequence[Hashable] | None = None) -> tuple[np.ndarray, tuple]:
    """Incidence matrix of the pair model s_p = sigma_i^2 + sigma_j^2.

    Parameters
    ----------
    pairs : sequence of (label, label)
        The two clocks of each measured difference.
    clocks : sequence of labels, optional
        Clock order of the columns; default: order of first appearance in ``pairs``.

    Returns
    -------
    design : ndarray, shape (n_pairs, n_clocks)
        1 in the two columns of each pair, 0 elsewhere.
    clocks : tuple
        The column labels.
    """
    pairs = [tuple(p) for p in pairs]
    if any(len(p) != 2 for p in pairs):
        raise ValueError("every pair must name exactly two clocks")
    if clocks is None:
        order: list = []
        for a, b in pairs:
            for c in (a, b):
                if c not in order:
                    order.append(c)
        clocks = order
    clocks = tuple(clocks)
    if len(set(clocks)) != len(clocks):
        raise ValueError(f"clock labels must be unique, got {clocks!r}")
    index = {c: k for k, c in enumerate(clocks)}
    design = np.zeros((len(pairs), len(clocks)))
    seen = set()
    for p, (a, b) in enumerate(pairs):
        if a == b:
            raise ValueError(f"pair {p} compares clock {a!r} with itself")
        for c in (a, b):
            if c not in index:
                raise ValueError(f"pair {p} names clock {c!r}, which is not in clocks={clocks!r}")
        key = frozenset((a, b))
        if key in seen:
            raise ValueError(f"pair {p} ({a!r}, {b!r}) appears twice; give each difference once")
        seen.add(key)
        design[p, index[a]] = design[p, index[b]] = 1.0
    return design, clocks


def three_cornered_hat(var_ab, var_ac, var_bc, *, std_ab=None, std_ac=None, std_bc=None,
                       edf_ab=None, edf_ac=None, edf_bc=None,
                       clocks: tuple = ("A", "B", "C"), tau_s=None,
                       correlation: str = "shared-clock") -> HatResult:
    """Three-cornered hat (Gray & Allan 1974): three clocks from their three differences.

    sigma_A^2 = (s_AB + s_AC - s_BC) / 2, and cyclically.  A thin front end of
    :func:`n_cornered_hat` with pairs (A, B), (A, C), (B, C).

    Parameters
    ----------
    var_ab, var_ac, var_bc : float or ndarray, shape (n_tau,)
        Variances of the differences A - B, A - C, B - C (any unit, the same for all three).
    std_ab, std_ac, std_bc : float or ndarray, optional
        Their standard uncertainties (same unit).
    edf_ab, edf_ac, edf_bc : float or ndarray, optional
        Their equivalent degrees of freedom (used for the uncertainty when no std is given).
    clocks : tuple of three labels
    tau_s : ndarray, shape (n_tau,), optional
        Averaging times, only used to label messages. [s]
    correlation : {"shared-clock", "independent"}
        Model of the correlation between pair estimates (see :func:`n_cornered_hat`).

    Returns
    -------
    HatResult
    """
    def stack(a, b, c):
        if a is None and b is None and c is None:
            return None
        if a is None or b is None or c is None:
            raise ValueError("give the uncertainty (std or edf) of all three pairs or of none")
        return np.stack(np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (a, b, c))))

    a, b, c = clocks
    return n_cornered_hat(stack(var_ab, var_ac, var_bc), [(a, b), (a, c), (b, c)],
                          pair_std=stack(std_ab, std_ac, std_bc),
                          pair_edf=stack(edf_ab, edf_ac, edf_bc), clocks=clocks, tau_s=tau_s,
                          correlation=correlation)


def n_cornered_hat(pair_variance, pairs: Sequence[tuple[Hashable, Hashable]], *,
                   pair_std=None, pair_edf=None, weights=None,
                   clocks: Sequence[Hashable] | None = None, tau_s=None,
                   column_labels: Sequence[str] | None = None,
                   correlation: str = "shared-clock", warn: bool = True) -> HatResult:
    """Individual clock variances from pair-difference variances (N-cornered hat).

    Parameters
    ----------
    pair_variance : ndarray, shape (n_pairs,) or (n_pairs, n_tau)
        Variance of each difference clock_i - clock_j (Allan, Hadamard ..., or a noise parameter
        that adds like a variance).  Any unit, the same for all pairs.  NaN marks a pair not
        available at that tau; it is left out of that column.
    pairs : sequence of (label, label), length n_pairs
        The two clocks of each row.
    pair_std : ndarray, same shape as pair_variance, optional
        Standard uncertainty of each pair variance (same unit).  Only used for the propagated
        uncertainty, never for the weights.
    pair_edf : ndarray, same shape as pair_variance, optional
        Equivalent degrees of freedom of each pair variance.  Used as least-squares weights
        (unless ``weights`` is given) and, when ``pair_std`` is absent, for the pair
        uncertainty s sqrt(2 / edf) (chi-square model of a variance estimate).
    weights : ndarray, same shape as pair_variance, optional
        Relative least-squares weights (> 0).  Default: ``pair_edf``, or equal weights.  With
        every pair present and equal weights in a column the closed form of the module
        docstring is used.
    clocks : sequence of labels, optional
        Row order of the result; default: order of first appearance in ``pairs``.
    tau_s : ndarray, shape (n_tau,), optional
        Averaging times, only used to label the messages. [s]
    column_labels : sequence of str, length n_tau, optional
        Labels of the columns in messages (instead of ``tau_s``), e.g. parameter names.
    correlation : {"shared-clock", "independent"}
        How pair estimates are taken to be correlated when propagating uncertainties.
        "independent" treats the pair estimates as uncorrelated.  "shared-clock" (default) uses
        the chi-square model of variance estimates of independent clocks with the same noise
        shape: two pairs sharing clock i are correlated with
        rho = sigma_i^4 / (S_p S_q), S_p = sigma_i^2 + sigma_j^2 of the fitted model
        (negative clock estimates count as 0 here).  Without it the uncertainty of the noisiest
        clock is understated by up to a factor sqrt(2) (its own sampling fluctuation enters
        both of its pairs with the same sign).
    warn : bool
        Issue a :class:`NegativeVarianceWarning` for each clock with a negative estimate.

    Returns
    -------
    HatResult

    Raises
    ------
    ValueError
        If the pairs cannot separate the clocks (every connected group of clocks needs a
        closed loop with an odd number of pairs, e.g. a triangle), or on malformed input.

    Notes
    -----
    Estimate per tau column: sigma^2 = B s with B = (A^T W A)^-1 A^T W (W = diag(weights)); its
    covariance is B C B^T, C the covariance of the pair estimates described above.  Correlated
    clocks (Tavella & Premoli 1994) are outside this model.
    """
    s = np.asarray(pair_variance, dtype=float)
    one_d = s.ndim == 1
    s2 = s[:, None] if one_d else s
    if s2.ndim != 2:
        raise ValueError(f"pair_variance must have shape (n_pairs,) or (n_pairs, n_tau), "
                         f"got {s.shape}")
    design, clocks = hat_design_matrix(pairs, clocks)
    n_pairs, n_clocks = design.shape
    if s2.shape[0] != n_pairs:
        raise ValueError(f"pair_variance has {s2.shape[0]} rows but {n_pairs} pairs were given")
    if n_clocks < 3:
        raise ValueError(f"the hat needs at least 3 clocks, got {n_clocks}")
    if correlation not in ("shared-clock", "independent"):
        raise ValueError(f"correlation must be 'shared-clock' or 'independent', "
                         f"got {correlation!r}")

    edf = _same_shape(pair_edf, s2, "pair_edf", one_d, positive=True)
    std = _same_shape(pair_std, s2, "pair_std", one_d, positive=False)
    w = _same_shape(weights, s2, "weights", one_d, positive=True)
    if w is None:
        w = edf if edf is not None else np.ones_like(s2)
    if std is None and edf is not None:
        # Variance estimate with nu degrees of freedom: Var[s] = 2 sigma^4 / nu (chi-square).
        std = np.abs(s2) * np.sqrt(2.0 / edf)

    n_tau = s2.shape[1]
    labels = _column_labels(n_tau, tau_s, column_labels)
    est = np.full((n_clocks, n_tau), np.nan)
    est_std = np.full((n_clocks, n_tau), np.nan)
    complete = n_pairs == n_clocks * (n_clocks - 1) // 2
    for k in range(n_tau):
        ok = np.isfinite(s2[:, k])
        a = design[ok]
        _check_separable(a, clocks, labels[k])
        wk = w[ok, k]
        if complete and ok.all() and np.all(wk == wk[0]):
            b = _closed_form_operator(n_clocks, design)
        else:
            aw = a * wk[:, None]
            b = np.linalg.solve(a.T @ aw, aw.T)
        est[:, k] = b @ s2[ok, k]
        if std is not None:
            u = std[ok, k]
            cov_pairs = np.outer(u, u) * _pair_correlation(a, est[:, k], correlation)
            est_std[:, k] = np.sqrt(np.maximum(np.einsum("ip,pq,iq->i", b, cov_pairs, b), 0.0))

    negative = est < 0
    messages = negative_messages(clocks, est, est_std, negative, labels)
    if warn:
        for text in messages:
            warnings.warn(text, NegativeVarianceWarning, stacklevel=2)
    if one_d:
        est, est_std, negative = est[:, 0], est_std[:, 0], negative[:, 0]
    return HatResult(clocks=clocks, variance=est, std=est_std, negative=negative,
                     messages=messages)


def _closed_form_operator(n_clocks: int, design: np.ndarray) -> np.ndarray:
    """Rows of the closed form (module docstring) as a linear operator on the pair values.

    sigma_i^2 = [sum_{j != i} s_ij - S_tot / (N - 1)] / (N - 2)
    """
    n = n_clocks
    # design.T[i, p] = 1 if clock i is in pair p: that is sum_{j != i} s_ij.
    return (design.T - 1.0 / (n - 1)) / (n - 2)


def _pair_correlation(a: np.ndarray, clock_var: np.ndarray, model: str) -> np.ndarray:
    """Correlation matrix of the pair estimates (see n_cornered_hat, parameter correlation)."""
    n = a.shape[0]
    if model == "independent":
        return np.eye(n)
    v = np.maximum(clock_var, 0.0)
    total = a @ v                                   # S_p = sigma_i^2 + sigma_j^2
    # Covariance coefficient of two pairs: sum over shared clocks of sigma_i^2 (|sign| = 1).
    shared = (a * v) @ a.T
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = shared ** 2 / np.outer(total, total)
    rho = np.where(np.isfinite(rho), rho, 0.0)
    np.fill_diagonal(rho, 1.0)
    return rho


def _check_separable(a: np.ndarray, clocks: tuple, where: str) -> None:
    if np.linalg.matrix_rank(a) == a.shape[1]:
        return
    lonely = [c for c, n in zip(clocks, a.sum(axis=0)) if n == 0]
    detail = f"clock(s) {', '.join(map(repr, lonely))} appear in no pair; " if lonely else ""
    raise ValueError(
        f"N-cornered hat at {where}: the {a.shape[0]} available pairs cannot separate the "
        f"{a.shape[1]} clocks; {detail}each connected group of clocks needs a closed loop with "
        f"an odd number of pairs (e.g. a triangle)")


def _column_labels(n_tau: int, tau_s, column_labels) -> list[str]:
    if column_labels is not None:
        labels = [str(c) for c in column_labels]
        if len(labels) != n_tau:
            raise ValueError(f"column_labels has {len(labels)} entries for {n_tau} columns")
        return labels
    if tau_s is not None:
        tau = np.asarray(tau_s, dtype=float).ravel()
        if tau.size != n_tau:
            raise ValueError(f"tau_s has {tau.size} entries for {n_tau} columns")
        return [f"tau = {v:.6g} s" for v in tau]
    return [f"column {k}" for k in range(n_tau)]


def negative_messages(clocks, estimate, std, negative, labels, *,
                      subject: str = "N-cornered hat", what: str = "variance estimate",
                      action: str = "returned unchanged, not clipped") -> tuple[str, ...]:
    """One warning text per clock with a negative estimate (used by the hat and its callers).

    Parameters
    ----------
    clocks : sequence of labels, length n_clocks
    estimate, std : ndarray, shape (n_clocks, n_columns)
        Estimates and their standard uncertainties (NaN: unknown).
    negative : ndarray of bool, shape (n_clocks, n_columns)
    labels : sequence of str, length n_columns
        What each column is ("tau = 1000 s", "q1 [s]" ...).
    subject, what, action : str
        Wording: who speaks, what is negative, and what was done with it.

    Returns
    -------
    tuple of str
    """
    out = []
    for i, clock in enumerate(clocks):
        cols = np.flatnonzero(negative[i])
        if cols.size == 0:
            continue
        parts = []
        for k in cols[:3]:
            unc = "" if not np.isfinite(std[i, k]) else f" +/- {std[i, k]:.2e}"
            parts.append(f"{labels[k]}: {estimate[i, k]:.3e}{unc}")
        more = f" and {cols.size - 3} more" if cols.size > 3 else ""
        out.append(
            f"{subject}: clock {clock!r} has a negative {what} at {cols.size} of "
            f"{negative.shape[1]} point(s) ({'; '.join(parts)}{more}); {action}. Likely causes: "
            f"a clock much better than the others, too short data, or correlated clocks "
            f"(Gray & Allan 1974)")
    return tuple(out)


def _same_shape(value, like: np.ndarray, name: str, one_d: bool, positive: bool):
    if value is None:
        return None
    arr = np.asarray(value, dtype=float)
    if one_d and arr.ndim == 1:
        arr = arr[:, None]
    try:
        arr = np.broadcast_to(arr, like.shape).astype(float)
    except ValueError:
        raise ValueError(f"{name} must have the shape of pair_variance {like.shape}, "
                         f"got {np.shape(value)}") from None
    finite = np.isfinite(like)
    bad = finite & ~(np.isfinite(arr) & ((arr > 0) if positive else (arr >= 0)))
    if bad.any():
        p, k = np.argwhere(bad)[0]
        need = "> 0" if positive else ">= 0"
        raise ValueError(f"{name}[{p}, {k}] = {float(arr[p, k])!r}; expected a finite value {need}")
    return arr
