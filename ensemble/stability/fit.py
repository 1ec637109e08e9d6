"""Clock-model noise parameters fitted to a measured Hadamard or Allan variance curve.

Model curves (derived in :mod:`ensemble.model.clockmodel`, plus a flicker-FM floor with the
constants of :mod:`ensemble.model.presets`), tau the averaging time [s]::

    Hadamard:  H sigma^2(tau) = (10/3) r tau^-2 + q1 tau^-1 + q2 tau / 6 + (11/120) q3 tau^3
                                + 1.124670 h_-1
    Allan:       sigma^2(tau) = 3 r tau^-2 + q1 tau^-1 + q2 tau / 3 + 2 ln2 h_-1

(r [s^2] white PM per phase sample, q1 [s] white FM, q2 [1/s] random-walk FM, q3 [1/s^3]
random-run FM, h_-1 [1] the flicker-FM level of S_y(f) = h_-1 / f; the flicker constants are
2 ln 2 for the AVAR and 4 ln 2 - (3/2) ln 3 for the HVAR.)  The Allan form assumes no drift and
no random-run FM (random-run FM has no stationary Allan variance: fit q3 with the HVAR).

The parameters are found by non-negative weighted least squares in variance
(:func:`scipy.optimize.nnls`), weights EDF / (2 sigma^4) with sigma^2 from the current fit
(a variance estimate with nu degrees of freedom has Var = 2 sigma^4 / nu), iterated until the
fitted curve stops changing.  Rows and columns are scaled to order one before each solve, so
variances of 1e-26...1e-34 and parameters spanning 40 decades stay well conditioned.

:func:`separate_clock_noise` fits every pair difference and separates the pair parameters per
clock with the N-cornered hat of :mod:`ensemble.stability.hat` (the parameters of independent
clocks add like variances).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Hashable, Sequence

import numpy as np
from scipy.optimize import nnls

from ..model.clockmodel import ClockNoise, process_noise
from .hat import NegativeVarianceWarning, n_cornered_hat, negative_messages

__all__ = ["NoiseFit", "ClockNoiseSeparation", "fit_noise", "model_variance",
           "separate_clock_noise", "simulate_variance_points", "FLICKER_AVAR", "FLICKER_HVAR",
           "TERM_NAMES"]

#: AVAR of flicker FM per unit h_-1: 2 ln 2 = 1.386294 (IEEE Std 1139-2008; recalled,
#: reproduced here).
FLICKER_AVAR = 2.0 * math.log(2.0)
#: HVAR of flicker FM per unit h_-1: 4 ln 2 - (3/2) ln 3 = 1.124670 (value recalled from memory;
#: closed form identified numerically here).
FLICKER_HVAR = 4.0 * math.log(2.0) - 1.5 * math.log(3.0)
#: Names of the fit terms, in the order used by every array of this module.
TERM_NAMES = ("r", "q1", "q2", "q3", "flicker")
_UNITS = {"r": "s^2", "q1": "s", "q2": "1/s", "q3": "1/s^3", "flicker": "1"}
_KINDS = ("hadamard", "allan")


@dataclass(frozen=True, eq=False)
class NoiseFit:
    """Result of :func:`fit_noise`.

    Attributes
    ----------
    kind : str
        "hadamard" or "allan": which variance was fitted.
    terms : tuple of str
        Fitted terms, a subset of ("r", "q1", "q2", "q3", "flicker").
    noise : ClockNoise
        Fitted q1 [s], q2 [1/s], q3 [1/s^3], r [s^2]; terms not fitted are 0.
    flicker_h_minus1 : float
        Flicker-FM level h_-1 of S_y(f) = h_-1 / f; 0 when not fitted. [1]
    flicker_adev : float
        The flicker floor as an Allan deviation, sqrt(2 ln2 h_-1). [1]
    r_std_s2, q1_std_s, q2_std_per_s, q3_std_per_s3, flicker_h_minus1_std : float
        Standard uncertainties from the weighted normal equations at the final weights; NaN for
        a term not fitted.  For a term at the bound 0 the value is the linearised uncertainty of
        the unconstrained estimate (how large a value the data cannot exclude).
    at_bound : tuple of str
        Fitted terms that came out exactly 0 (the non-negativity bound is active).
    covariance : ndarray, shape (n_terms, n_terms)
        Covariance of the fitted terms in the order of ``terms`` (SI units of each term).
    tau_s : ndarray, shape (n_points,)
        Averaging times used (NaN input points removed). [s]
    measured : ndarray, shape (n_points,)
        Measured variance at ``tau_s``. [1]
    fitted : ndarray, shape (n_points,)
        Model variance of the fit at ``tau_s``. [1]
    edf : ndarray, shape (n_points,)
        Equivalent degrees of freedom used for the weights.
    chi2 : float
        sum of weight * (measured - fitted)^2 with the final weights.  Treats the points as
        independent (nearly true for octave-spaced tau; Schlossberger & Howe 2019).
    dof : int
        n_points - number of fitted terms not at the bound.
    n_iterations : int
        Reweighting iterations done.
    converged : bool
        True if the fitted curve changed by less than ``rtol`` in the last iteration.
    """

    kind: str
    terms: tuple[str, ...]
    noise: ClockNoise
    flicker_h_minus1: float
    flicker_adev: float
    r_std_s2: float
    q1_std_s: float
    q2_std_per_s: float
    q3_std_per_s3: float
    flicker_h_minus1_std: float
    at_bound: tuple[str, ...]
    covariance: np.ndarray
    tau_s: np.ndarray
    measured: np.ndarray
    fitted: np.ndarray
    edf: np.ndarray
    chi2: float
    dof: int
    n_iterations: int
    converged: bool

    def value(self, term: str) -> float:
        """Fitted value of one term ("r", "q1", "q2", "q3" or "flicker") in SI units."""
        return float(_values_of(self)[_term_index(term)])

    def std(self, term: str) -> float:
        """Standard uncertainty of one term in SI units (NaN if the term was not fitted)."""
        return float(_stds_of(self)[_term_index(term)])


@dataclass(frozen=True, eq=False)
class ClockNoiseSeparation:
    """Result of :func:`separate_clock_noise`: per-clock noise parameters from pair fits.

    Attributes
    ----------
    clocks : tuple
        Clock labels, in row order.
    noise : tuple of ClockNoise
        Per clock; a negative hat estimate is set to 0 here (and flagged in ``negative``).
    flicker_h_minus1 : ndarray, shape (n_clocks,)
        Per-clock flicker-FM level, negative estimates set to 0. [1]
    estimates : ndarray, shape (n_clocks, 5)
        Raw hat estimates of (r [s^2], q1 [s], q2 [1/s], q3 [1/s^3], h_-1 [1]), columns in
        the order of ``TERM_NAMES``; may be negative; 0 for a term not fitted.
    std : ndarray, shape (n_clocks, 5)
        Their standard uncertainties propagated from the pair fits; NaN for a term not fitted.
    negative : ndarray of bool, shape (n_clocks, 5)
        True where the raw estimate is negative (replaced by 0 in ``noise``).
    pair_fits : tuple of NoiseFit
        The fit of each pair, in the order of the ``pairs`` argument.
    messages : tuple of str
        Warning texts of negative estimates.
    """

    clocks: tuple
    noise: tuple[ClockNoise, ...]
    flicker_h_minus1: np.ndarray
    estimates: np.ndarray
    std: np.ndarray
    negative: np.ndarray
    pair_fits: tuple[NoiseFit, ...]
    messages: tuple[str, ...]


def model_variance(tau_s, noise: ClockNoise, flicker_h_minus1: float = 0.0,
                   kind: str = "hadamard") -> np.ndarray:
    """Hadamard or Allan variance of the clock model plus a flicker-FM floor.

    Parameters
    ----------
    tau_s : float or ndarray
        Averaging time. [s]
    noise : ClockNoise
        q1 [s], q2 [1/s], q3 [1/s^3] (Hadamard only), r [s^2].
    flicker_h_minus1 : float
        Flicker-FM level h_-1. [1]
    kind : {"hadamard", "allan"}

    Returns
    -------
    ndarray
        Variance at each tau. [1]
    """
    tau = np.asarray(tau_s, dtype=float)
    if kind == "allan" and noise.q3_per_s3 > 0:
        raise ValueError("random-run FM (q3 > 0) has no stationary Allan variance; "
                         "use kind='hadamard'")
    values = np.array([noise.r_s2, noise.q1_s, noise.q2_per_s, noise.q3_per_s3, flicker_h_minus1])
    cols = _design(tau.ravel(), kind, TERM_NAMES if kind == "hadamard" else
                   ("r", "q1", "q2", "flicker"))
    if kind == "allan":
        values = values[[0, 1, 2, 4]]
    return (cols @ values).reshape(tau.shape)


def fit_noise(tau_s, variance, edf, *, kind: str = "hadamard",
              terms: Sequence[str] | None = None, flicker: bool = False,
              point_covariance=None, max_iterations: int = 100,
              rtol: float = 1e-10) -> NoiseFit:
    """Fit clock-model noise parameters to a measured Hadamard or Allan variance curve.

    Parameters
    ----------
    tau_s : ndarray, shape (n_points,)
        Averaging times, > 0 (octave spacing recommended). [s]
    variance : ndarray, shape (n_points,)
        Measured variance at each tau (HVAR or AVAR, not the deviation); NaN points are
        dropped. [1]
    edf : float or ndarray, shape (n_points,)
        Equivalent degrees of freedom of each measured point (> 0).
    kind : {"hadamard", "allan"}
        Which variance ``variance`` is.  The Allan form assumes no drift.
    terms : sequence of str, optional
        Terms to fit, from ("r", "q1", "q2", "q3", "flicker").  Default: ("r", "q1", "q2",
        "q3") for Hadamard, ("r", "q1", "q2") for Allan, plus "flicker" if ``flicker``.
    flicker : bool
        Add the flicker-FM floor term to the default terms.
    point_covariance : ndarray, shape (n_points, n_points), optional
        Covariance of the measured variances (same order as ``tau_s``; rows and columns of
        NaN points are dropped), e.g. from :func:`simulate_variance_points`.  When given, the
        parameter covariance is the sandwich B C B^T of the weighted estimator B; the fit
        itself does not change. [1]
    max_iterations : int
        Upper limit of reweighting iterations.
    rtol : float
        Convergence: largest relative change of the fitted curve between iterations.

    Returns
    -------
    NoiseFit

    Notes
    -----
    Weighted least squares in variance: minimise sum_k w_k (s_k - A_k p)^2 subject to p >= 0,
    with w_k = nu_k / (2 m_k^2) and m_k the model at the previous iterate (first iterate:
    m_k = s_k).  Reweighting with the model rather than the data avoids the downward bias of
    data-based weights (small measured values would otherwise get large weights).

    Without ``point_covariance`` the parameter covariance is (A^T W A)^-1 over all fitted
    terms, without scaling by chi2 / dof (the weights are absolute, from the EDF).  It treats
    the points as independent; octave-spaced overlapping variances of one record are not quite
    (neighbour correlations of 0.2-0.45 in a seeded white PM + white FM + RW FM simulation), and
    there it understated the spread of q1 by 10-16 % and of q2 by 24-31 %.  Pass a
    ``point_covariance`` for honest uncertainties.
    """
    if kind not in _KINDS:
        raise ValueError(f"kind must be one of {_KINDS}, got {kind!r}")
    terms = _resolve_terms(kind, terms, flicker)
    tau = np.asarray(tau_s, dtype=float).ravel()
    s = np.asarray(variance, dtype=float).ravel()
    if tau.shape != s.shape:
        raise ValueError(f"tau_s and variance must have the same length, got {tau.size} "
                         f"and {s.size}")
    nu = np.broadcast_to(np.asarray(edf, dtype=float), s.shape).astype(float)
    _validate_points(tau, s, nu)
    keep = ~np.isnan(s)
    tau, s, nu = tau[keep], s[keep], nu[keep]
    cov_points = _point_covariance(point_covariance, keep)
    if tau.size < len(terms):
        raise ValueError(f"{tau.size} usable points cannot determine {len(terms)} terms "
                         f"{terms}; give more tau values or fewer terms")

    a = _design(tau, kind, terms)
    model = s.copy()
    params = np.zeros(len(terms))
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iterations + 1):
        weights = _weights(nu, model, s)
        params = _weighted_nnls(a, s, weights)
        new_model = a @ params
        change = np.max(np.abs(new_model - model) / np.maximum(np.abs(model), 1e-300))
        model = new_model
        if change < rtol:
            converged = True
            break

    weights = _weights(nu, model, s)
    cov = _covariance(a, weights, cov_points)
    resid = s - model
    chi2 = float(np.sum(weights * resid * resid))
    at_bound = tuple(t for t, p in zip(terms, params) if p == 0.0)
    values = dict(zip(terms, params))
    stds = dict(zip(terms, np.sqrt(np.maximum(np.diag(cov), 0.0))))
    h1 = float(values.get("flicker", 0.0))
    noise = ClockNoise(q1_s=float(values.get("q1", 0.0)), q2_per_s=float(values.get("q2", 0.0)),
                       q3_per_s3=float(values.get("q3", 0.0)), r_s2=float(values.get("r", 0.0)))
    nan = float("nan")
    return NoiseFit(
        kind=kind, terms=terms, noise=noise, flicker_h_minus1=h1,
        flicker_adev=math.sqrt(FLICKER_AVAR * h1),
        r_std_s2=float(stds.get("r", nan)), q1_std_s=float(stds.get("q1", nan)),
        q2_std_per_s=float(stds.get("q2", nan)), q3_std_per_s3=float(stds.get("q3", nan)),
        flicker_h_minus1_std=float(stds.get("flicker", nan)), at_bound=at_bound,
        covariance=cov, tau_s=tau, measured=s, fitted=model, edf=nu, chi2=chi2,
        dof=int(tau.size - (len(terms) - len(at_bound))), n_iterations=n_iter,
        converged=converged)


def separate_clock_noise(pairs: Sequence[tuple[Hashable, Hashable]], tau_s, pair_variance,
                         pair_edf, *, clocks: Sequence[Hashable] | None = None,
                         kind: str = "hadamard", terms: Sequence[str] | None = None,
                         flicker: bool = False, pair_point_covariance=None,
                         correlation: str = "shared-clock",
                         warn: bool = True) -> ClockNoiseSeparation:
    """Noise parameters of each clock: fit every pair difference, then separate with the hat.

    Parameters
    ----------
    pairs : sequence of (label, label), length n_pairs
        The two clocks of each difference series.
    tau_s : ndarray, shape (n_tau,)
        Averaging times of the measured variances. [s]
    pair_variance : ndarray, shape (n_pairs, n_tau)
        HVAR (or AVAR) of each difference series; NaN where not available. [1]
    pair_edf : ndarray, shape (n_pairs, n_tau) or broadcastable
        EDF of each measured variance.
    clocks : sequence of labels, optional
        Row order of the result (default: order of first appearance in ``pairs``).
    kind, terms, flicker
        As for :func:`fit_noise`; the same terms are fitted for every pair.
    pair_point_covariance : ndarray, shape (n_pairs, n_tau, n_tau), optional
        ``point_covariance`` of each pair's fit (see :func:`fit_noise`).
    correlation : {"shared-clock", "independent"}
        Correlation model of the pair estimates in the hat (see :func:`n_cornered_hat`).
    warn : bool
        Issue :class:`~ensemble.stability.hat.NegativeVarianceWarning` for negative estimates.

    Returns
    -------
    ClockNoiseSeparation

    Notes
    -----
    The q's of independent clocks add like variances (q_ij = q_i + q_j for each term), so the
    hat of :func:`~ensemble.stability.hat.n_cornered_hat` applies to each term separately, with
    the fit uncertainties as pair uncertainties.  The hat weights the pairs equally (closed form
    when all pairs are given).
    """
    s = np.asarray(pair_variance, dtype=float)
    if s.ndim != 2 or s.shape[0] != len(pairs):
        raise ValueError(f"pair_variance must have shape (n_pairs={len(pairs)}, n_tau), "
                         f"got {s.shape}")
    nu = np.broadcast_to(np.asarray(pair_edf, dtype=float), s.shape)
    covs = [None] * len(pairs) if pair_point_covariance is None else pair_point_covariance
    if len(covs) != len(pairs):
        raise ValueError(f"pair_point_covariance must hold one matrix per pair ({len(pairs)})")
    fits = []
    for p, pair in enumerate(pairs):
        try:
            fits.append(fit_noise(tau_s, s[p], nu[p], kind=kind, terms=terms, flicker=flicker,
                                  point_covariance=covs[p]))
        except ValueError as exc:
            raise ValueError(f"pair {p} {tuple(pair)!r}: {exc}") from exc
    fits = tuple(fits)
    fitted_terms = fits[0].terms
    cols = [TERM_NAMES.index(t) for t in fitted_terms]
    values = np.array([_values_of(f)[cols] for f in fits])          # (n_pairs, n_terms)
    stds = np.array([_stds_of(f)[cols] for f in fits])
    names = [f"{t} [{_UNITS[t]}]" for t in fitted_terms]
    hat = n_cornered_hat(values, pairs, pair_std=stds, clocks=clocks, correlation=correlation,
                         column_labels=names, warn=False)
    messages = negative_messages(
        hat.clocks, hat.variance, hat.std, hat.negative, names, subject="noise separation",
        what="noise-parameter estimate",
        action="set to 0 in its ClockNoise (the raw value is kept in estimates)")
    if warn:
        for text in messages:
            warnings.warn(text, NegativeVarianceWarning, stacklevel=2)
    n_clocks = len(hat.clocks)
    est = np.zeros((n_clocks, len(TERM_NAMES)))
    est_std = np.full((n_clocks, len(TERM_NAMES)), np.nan)
    est[:, cols] = hat.variance
    est_std[:, cols] = hat.std
    negative = est < 0
    clipped = np.maximum(est, 0.0)
    noise = tuple(ClockNoise(q1_s=float(c[1]), q2_per_s=float(c[2]), q3_per_s3=float(c[3]),
                             r_s2=float(c[0])) for c in clipped)
    return ClockNoiseSeparation(clocks=hat.clocks, noise=noise,
                                flicker_h_minus1=clipped[:, 4].copy(), estimates=est,
                                std=est_std, negative=negative, pair_fits=fits,
                                messages=messages)


def simulate_variance_points(noise: ClockNoise, tau0_s: float, n_samples: int, m, *,
                             kind: str = "hadamard", n_realisations: int = 200,
                             seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance of overlapping HVAR (or AVAR) points by simulating the clock model.

    A parametric bootstrap for :func:`fit_noise` (``point_covariance``): simulate the model
    with the fitted noise, record the overlapping variance at the same averaging factors, and
    take the sample covariance over realisations.  It carries the correlation between the tau
    points and the non-chi-square shape of low-EDF points, which the EDF weights do not.

    Parameters
    ----------
    noise : ClockNoise
        Noise of the series (usually a first fit). [SI]
    tau0_s : float
        Sampling interval of the phase record. [s]
    n_samples : int
        Number of phase samples N of the record.
    m : sequence of int, shape (n_points,)
        Averaging factors, tau = m tau0, with 3 m < N (HVAR) or 2 m < N (AVAR).
    kind : {"hadamard", "allan"}
        Overlapping Hadamard variance, sum (x[i+3m] - 3x[i+2m] + 3x[i+m] - x[i])^2 /
        (6 tau^2 (N - 3m)), or overlapping Allan variance, sum (x[i+2m] - 2x[i+m] + x[i])^2 /
        (2 tau^2 (N - 2m)) (:mod:`ensemble.stability.deviations`).  The measured points must
        come from the same estimator for the covariance to apply.
    n_realisations : int
        Number of simulated records (sampling error of the covariance about sqrt(2 / n)).
    seed : int
        Seed of the numpy random generator.

    Returns
    -------
    mean : ndarray, shape (n_points,)
        Mean of the simulated variance points (estimates the model variance). [1]
    covariance : ndarray, shape (n_points, n_points)
        Their sample covariance, for ``point_covariance``. [1]

    Notes
    -----
    Flicker FM has no finite-state model and is not simulated.  Each record is the exact
    discretisation of :mod:`ensemble.model.clockmodel` (x, y, d propagated with Phi(tau0) and
    Gaussian Q(tau0) increments, drawn through an eigendecomposition because Q is nearly
    singular) plus white PM of variance r.  Cost: n_realisations x (3 N random numbers +
    n_points passes over N).
    """
    if kind not in _KINDS:
        raise ValueError(f"kind must be one of {_KINDS}, got {kind!r}")
    ms = np.atleast_1d(np.asarray(m))
    order = 3 if kind == "hadamard" else 2
    if (ms.ndim != 1 or np.any(ms != np.round(ms)) or np.any(ms < 1)
            or np.any(order * ms >= n_samples)):
        raise ValueError(f"m must be integers >= 1 with {order} m < n_samples = {n_samples}")
    if n_realisations < len(ms) + 2:
        raise ValueError(f"n_realisations = {n_realisations} is too small for {len(ms)} points")
    if kind == "allan" and noise.q3_per_s3 > 0:
        raise ValueError("random-run FM (q3 > 0) has no stationary Allan variance; "
                         "use kind='hadamard'")
    ms = ms.astype(int)
    tau0 = float(tau0_s)
    rng = np.random.default_rng(seed)
    # Increments in scaled states (x, y tau0, d tau0^2) keep Q's entries comparable.
    scale = np.array([1.0, tau0, tau0 * tau0])
    q = process_noise(noise, tau0, 3) / np.outer(scale, scale)
    vals, vecs = np.linalg.eigh(0.5 * (q + q.T))
    root = vecs * np.sqrt(np.maximum(vals, 0.0))
    out = np.empty((n_realisations, ms.size))
    for k in range(n_realisations):
        w = (rng.standard_normal((n_samples - 1, 3)) @ root.T) * scale
        d = np.concatenate(([0.0], np.cumsum(w[:, 2])))
        y = np.concatenate(([0.0], np.cumsum(tau0 * d[:-1] + w[:, 1])))
        x = np.concatenate(([0.0], np.cumsum(tau0 * y[:-1] + 0.5 * tau0 * tau0 * d[:-1]
                                             + w[:, 0])))
        if noise.r_s2 > 0:
            x = x + rng.normal(0.0, math.sqrt(noise.r_s2), n_samples)
        for j, mm in enumerate(ms):
            if kind == "hadamard":
                diff = x[3 * mm:] - 3 * x[2 * mm:-mm] + 3 * x[mm:-2 * mm] - x[:-3 * mm]
                out[k, j] = np.mean(diff * diff) / (6.0 * (mm * tau0) ** 2)
            else:
                diff = x[2 * mm:] - 2 * x[mm:-mm] + x[:-2 * mm]
                out[k, j] = np.mean(diff * diff) / (2.0 * (mm * tau0) ** 2)
    return out.mean(axis=0), np.atleast_2d(np.cov(out, rowvar=False))


def _values_of(fit: NoiseFit) -> np.ndarray:
    n = fit.noise
    return np.array([n.r_s2, n.q1_s, n.q2_per_s, n.q3_per_s3, fit.flicker_h_minus1])


def _stds_of(fit: NoiseFit) -> np.ndarray:
    return np.array([fit.r_std_s2, fit.q1_std_s, fit.q2_std_per_s, fit.q3_std_per_s3,
                     fit.flicker_h_minus1_std])


def _term_index(term: str) -> int:
    if term not in TERM_NAMES:
        raise ValueError(f"unknown term {term!r}; expected one of {TERM_NAMES}")
    return TERM_NAMES.index(term)


def _resolve_terms(kind: str, terms, flicker: bool) -> tuple[str, ...]:
    if terms is None:
        terms = ("r", "q1", "q2", "q3") if kind == "hadamard" else ("r", "q1", "q2")
        if flicker:
            terms = terms + ("flicker",)
    else:
        terms = tuple(terms)
        if flicker and "flicker" not in terms:
            terms = terms + ("flicker",)
    unknown = [t for t in terms if t not in TERM_NAMES]
    if unknown:
        raise ValueError(f"unknown fit term(s) {unknown}; expected a subset of {TERM_NAMES}")
    if len(set(terms)) != len(terms) or not terms:
        raise ValueError(f"terms must be a non-empty list without repeats, got {terms}")
    if kind == "allan" and "q3" in terms:
        raise ValueError("q3 (random-run FM) cannot be fitted to an Allan variance: it has no "
                         "stationary AVAR (it grows with the record length); fit the Hadamard "
                         "variance")
    return tuple(t for t in TERM_NAMES if t in terms)


def _design(tau: np.ndarray, kind: str, terms: Sequence[str]) -> np.ndarray:
    """Columns of the model, one per term, evaluated at tau [s]."""
    if kind == "hadamard":
        # H sigma^2 = 10 r/(3 tau^2) + q1/tau + q2 tau/6 + 11 q3 tau^3/120 + 1.124670 h_-1
        table = {"r": 10.0 / (3.0 * tau ** 2), "q1": 1.0 / tau, "q2": tau / 6.0,
                 "q3": 11.0 * tau ** 3 / 120.0, "flicker": np.full_like(tau, FLICKER_HVAR)}
    else:
        # sigma^2 = 3 r/tau^2 + q1/tau + q2 tau/3 + 2 ln2 h_-1
        table = {"r": 3.0 / tau ** 2, "q1": 1.0 / tau, "q2": tau / 3.0,
                 "flicker": np.full_like(tau, FLICKER_AVAR)}
    return np.column_stack([table[t] for t in terms])


def _weights(nu: np.ndarray, model: np.ndarray, measured: np.ndarray) -> np.ndarray:
    # w = nu / (2 sigma^4): inverse variance of a chi-square variance estimate.  A model value
    # of 0 (all terms at the bound at that tau) falls back to the measured value.
    sigma2 = np.where(model > 0, model, measured)
    return nu / (2.0 * sigma2 * sigma2)


def _weighted_nnls(a: np.ndarray, s: np.ndarray, weights: np.ndarray) -> np.ndarray:
    root_w = np.sqrt(weights)
    m = a * root_w[:, None]
    b = s * root_w
    col = np.linalg.norm(m, axis=0)
    scaled, _ = nnls(m / col, b)
    return scaled / col


def _covariance(a: np.ndarray, weights: np.ndarray, cov_points=None) -> np.ndarray:
    """(A^T W A)^-1, or the sandwich B C B^T with B = (A^T W A)^-1 A^T W, in scaled columns."""
    m = a * np.sqrt(weights)[:, None]
    col = np.linalg.norm(m, axis=0)
    inv_normal = np.linalg.pinv((m / col).T @ (m / col), hermitian=True)
    if cov_points is None:
        return inv_normal / np.outer(col, col)
    b = inv_normal @ ((a / col) * weights[:, None]).T          # scaled parameters per point
    cov = b @ cov_points @ b.T
    return 0.5 * (cov + cov.T) / np.outer(col, col)


def _point_covariance(point_covariance, keep: np.ndarray):
    if point_covariance is None:
        return None
    c = np.asarray(point_covariance, dtype=float)
    if c.shape != (keep.size, keep.size):
        raise ValueError(f"point_covariance must have shape {(keep.size, keep.size)}, "
                         f"got {c.shape}")
    c = c[np.ix_(keep, keep)]
    if not np.all(np.isfinite(c)) or np.any(np.diag(c) <= 0):
        raise ValueError("point_covariance must be finite with a positive diagonal")
    return c


def _validate_points(tau: np.ndarray, s: np.ndarray, nu: np.ndarray) -> None:
    """Every tau and every EDF of a usable point finite and > 0; variance > 0 or NaN."""
    used = ~np.isnan(s)
    for name, arr, ok in (("tau_s", tau, ~used | (np.isfinite(tau) & (tau > 0))),
                          ("variance", s, ~used | (np.isfinite(s) & (s > 0))),
                          ("edf", nu, ~used | (np.isfinite(nu) & (nu > 0)))):
        if not ok.all():
            k = int(np.flatnonzero(~ok)[0])
            raise ValueError(f"{name}[{k}] = {float(arr[k])!r}; expected a finite value > 0")
