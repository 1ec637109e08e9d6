"""Internal: start-up of the ensemble from the first stretch of data.

For clocks whose noise levels the configuration does not give:

1. overlapping Hadamard variances of every pair difference (or of each clock against a few
   anchor clocks in large ensembles) at octave averaging times over the initial stretch;
2. the N-cornered hat at each averaging time (:func:`ensemble.stability.hat.n_cornered_hat`),
   then a non-negative weighted fit of (r, q1, q2) to each clock's curve
   (:func:`ensemble.stability.fit.fit_noise`).  Fitted over the averaging times where the
   filter runs, the q's are *effective* levels that also carry the flicker FM the model cannot
   represent (it needs extra Gauss-Markov states; Davis, Greenhall & Stacey 2005);
3. initial phase, frequency and drift of each clock relative to the first epoch's reference,
   from a polynomial fit over the same stretch, with covariances from the noise levels.

Configured values, then the clock type's typical levels, replace estimates the data cannot
support (negative, or not enough data).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..model.clockmodel import ClockNoise
from ..stability.grid import on_grid
from ..units import SECONDS_PER_DAY
from .likelihood import refine_q2
from .settings import ClockSettings, EnsembleSettings
from .timescale import ClockSetup

#: Fewest epochs of the start-up stretch from which noise levels are estimated.
_MIN_EPOCHS = 24
#: Pairs per clock when the ensemble is too large for all pairs.
_ANCHORS = 8
#: Smallest channel white PM variance accepted [s^2] (0.1 ps rms): keeps S positive definite.
_R_FLOOR_S2 = 1e-26
#: Typical frequency and drift uncertainty when a clock's type is unknown: 1e-11, 1e-13/d.
_FREQ_PRIOR = 1e-11
_DRIFT_PRIOR_PER_S = 1e-13 / SECONDS_PER_DAY


@dataclass(frozen=True)
class StartupReport:
    """What the start-up found, per clock (for the run summary and the archive)."""

    clocks: tuple
    source: tuple          # "config", "estimated", "type", "default" per clock
    noise: tuple           # ClockNoise per clock
    stretch_days: float
    messages: tuple


def _preset(kind: str):
    if kind == "auto":
        return None
    from ..model.presets import get_preset
    return get_preset(kind)


def _octaves(n_points: int) -> np.ndarray:
    m_max = max(1, (n_points - 1) // 12)
    return 2 ** np.arange(int(math.log2(m_max)) + 1)


def estimate_noise(phase_s: np.ndarray, tau0_s: float, members: np.ndarray,
                   clock_names, match_tau_s: float | None = None) -> tuple[dict, list]:
    """Per-clock ClockNoise from the pairwise Hadamard variances over a stretch.

    Parameters
    ----------
    phase_s : ndarray, shape (n_epochs, n_clocks)
        Clock - reference over the stretch [s], NaN where missing.
    tau0_s : float
        Sampling interval [s].
    members : ndarray of bool, shape (n_clocks,)
        Clocks to estimate.
    clock_names : sequence of str
    match_tau_s : float, optional
        The model has no flicker FM: a fitted flicker floor is carried by an effective
        random-walk FM level with the same Hadamard variance at this averaging time [s]
        (default: 48 sampling intervals).

    Returns
    -------
    (dict column -> ClockNoise or None, list of messages, dict column -> (longest averaging
    time [s], fitted Hadamard variance there [1]))
    """
    from ..stability.deviations import overlapping_avar_hvar
    from ..stability.edf import edf_greenhall

    idx = np.flatnonzero(members)
    messages: list[str] = []
    if idx.size < 3:
        return {int(i): None for i in idx}, ["fewer than three clocks: noise levels not "
                                             "separable, typical levels used"], {}
    t = phase_s.shape[0]
    if t < _MIN_EPOCHS:
        return {int(i): None for i in idx}, [
            f"the start-up stretch has {t} epochs, fewer than the {_MIN_EPOCHS} needed to "
            f"estimate noise levels; typical levels used"], {}
    avail = np.isfinite(phase_s[:, idx]).mean(axis=0)
    order = idx[np.argsort(-avail, kind="stable")]
    if idx.size <= 2 * _ANCHORS:
        pairs = [(int(a), int(b)) for k, a in enumerate(idx) for b in idx[k + 1:]]
    else:
        anchors = order[:_ANCHORS]
        pairs = sorted({tuple(sorted((int(a), int(b)))) for a in anchors for b in idx if a != b})
    m = _octaves(t)
    diff = np.stack([phase_s[:, a] - phase_s[:, b] for a, b in pairs], axis=1)
    ov = overlapping_avar_hvar(diff, tau0_s, m)
    hvar = np.asarray(ov.hvar).T                       # (n_pairs, n_m)
    nterm = np.asarray(ov.n_hvar).T
    edf = np.full(hvar.shape, np.nan)
    cache: dict = {}
    for (p, j), n in np.ndenumerate(nterm):
        if n < 2:
            continue
        key = (int(m[j]), int(n))
        if key not in cache:
            cache[key] = edf_greenhall(0, int(m[j]), int(n), order=3, overlapping=True)
        edf[p, j] = cache[key]
    ok = np.isfinite(hvar) & (hvar > 0) & np.isfinite(edf)
    hvar = np.where(ok, hvar, np.nan)
    edf = np.where(ok, edf, 1.0)
    with warnings.catch_warnings():
        # columns without any usable pair at some tau are NaN on purpose
        warnings.simplefilter("ignore", RuntimeWarning)
        return _separate(idx, pairs, clock_names, ov, hvar, edf, match_tau_s, tau0_s, messages)


def _separate(idx, pairs, clock_names, ov, hvar, edf, match_tau_s, tau0_s, messages):
    """Hat per averaging time, then a fit per clock (see :func:`estimate_noise`)."""
    from ..stability.fit import FLICKER_HVAR, fit_noise
    from ..stability.hat import NegativeVarianceWarning, n_cornered_hat

    labels = [clock_names[i] for i in idx]
    name_pairs = [(clock_names[a], clock_names[b]) for a, b in pairs]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NegativeVarianceWarning)
        # least-squares weights = inverse variance of each pair estimate, edf / (2 s^4)
        weights = np.where(np.isfinite(hvar), edf / np.where(np.isfinite(hvar), hvar, 1.0) ** 2,
                           np.nan)
        weights = weights / np.nanmax(weights, axis=0, keepdims=True)
        hat = n_cornered_hat(hvar, name_pairs, pair_edf=edf, weights=weights, clocks=labels,
                             warn=False)
    # Each clock is at most as noisy as its quietest pair: sigma_i^2 <= min_j sigma_ij^2.
    # Where the hat cannot separate a clock at some tau (negative, or uncertain by more than
    # half, as for two equal dominant clocks whose pairs with noisier clocks say little),
    # half of that quietest pair is the natural estimate.
    pair_arr = np.array(pairs)
    long_term = {}
    match = match_tau_s if match_tau_s is not None else 48.0 * tau0_s
    # White PM belongs to the measurement system and shows only in the quietest pairs: take its
    # level from the quietest pair (half per channel), and keep a clock's own fitted value only
    # where it stays near that level (elsewhere the fit trades white PM for white FM).
    quiet = int(np.nanargmin(np.where(np.isfinite(hvar[:, 0]), hvar[:, 0], np.inf)))
    q_ok = np.isfinite(hvar[quiet]) & (hvar[quiet] > 0)
    r_sys = 0.0
    if q_ok.sum() >= 3:
        r_sys = 0.5 * fit_noise(ov.tau_s[q_ok], hvar[quiet, q_ok], np.maximum(edf[quiet, q_ok], 1),
                                kind="hadamard", terms=_terms(int(q_ok.sum()), True)[:3]
                                ).noise.r_s2
    out = {}
    for k, i in enumerate(idx):
        mine = (pair_arr[:, 0] == i) | (pair_arr[:, 1] == i)
        bound = np.nanmin(np.where(mine[:, None], hvar, np.nan), axis=0)
        var = np.array(hat.variance[k], dtype=float)
        std = np.array(hat.std[k], dtype=float)
        good = (var > 0) & np.isfinite(std) & (std < 0.5 * var)
        value = np.where(good, np.minimum(var, bound), 0.5 * bound)
        point_edf = np.where(good, 2.0 * (var / np.where(good, std, 1.0)) ** 2,
                             np.nanmax(np.where(mine[:, None], edf, np.nan), axis=0))
        use = np.isfinite(value) & (value > 0) & np.isfinite(point_edf)
        if use.sum() < 3:
            out[int(i)] = None
            continue
        if not good[0]:
            messages.append(f"{clock_names[i]}: not separable from its pairs at the shortest "
                            f"averaging times; half of its quietest pair used")
        tau, w = ov.tau_s[use], np.maximum(point_edf[use], 1.0)
        fit = fit_noise(tau, value[use], w, kind="hadamard", terms=_terms(tau.size, True))
        r_fit = fit.noise.r_s2
        if r_fit > 4.0 * r_sys:
            rest = value[use] - 10.0 * r_sys / (3.0 * tau ** 2)
            keep = rest > 0
            if keep.sum() >= 2:
                fit = fit_noise(tau[keep], rest[keep], w[keep], kind="hadamard",
                                terms=_terms(int(keep.sum()), False))
            r_fit = r_sys
        h1 = fit.flicker_h_minus1 if np.isfinite(fit.flicker_h_minus1) else 0.0
        q2 = fit.noise.q2_per_s + 6.0 * FLICKER_HVAR * h1 / match
        nz = ClockNoise(fit.noise.q1_s, q2, 0.0, r_fit)
        out[int(i)] = nz if nz.q1_s > 0 else None
        # Long-term stability for the frame weights: the fitted curve at the longest averaging
        # time measured, taken as flat beyond it (a flicker floor).  Extrapolating a random
        # walk fitted over a few days to the frame interval overstated it a hundredfold in
        # simulation, and the q2 above is an effective level for the sampling interval.
        long_term[int(i)] = (float(tau.max()), float(np.asarray(fit.fitted)[-1]))
    return out, messages, long_term


def _terms(n_points: int, with_r: bool) -> tuple:
    """Terms a curve of ``n_points`` averaging times can carry (a flicker floor needs 6)."""
    terms = ("r", "q1", "q2", "flicker") if with_r else ("q1", "q2", "flicker")
    if n_points >= 6:
        return terms
    if n_points >= len(terms) - 1:
        return terms[:-1]
    return terms[:max(1, n_points - 1)] if with_r else terms[:max(1, n_points)]


#: Span of the linear fit giving the initial frequency: the frequency *at the start* is wanted,
#: and a clock's frequency wanders over a longer stretch [s].
_FREQ_FIT_S = 3 * SECONDS_PER_DAY


def _fit_state(x: np.ndarray, t_s: np.ndarray, drift: bool):
    """Initial (phase, frequency, drift) of a difference series and the frequency fit's span.

    The drift comes from a quadratic over the whole stretch (when it spans three days), the
    frequency from a straight line over the first :data:`_FREQ_FIT_S` after removing the drift.
    """
    ok = np.isfinite(x)
    if ok.sum() < 3:
        return None
    tt, xx = t_s[ok], x[ok]
    span = tt.max() - tt.min()
    drift_per_s = 0.0
    if drift and span >= 3 * SECONDS_PER_DAY and ok.sum() >= 10:
        scale = max(span, 1.0)
        coef = np.polynomial.polynomial.polyfit(tt / scale, xx, 2)
        drift_per_s = 2.0 * coef[2] / scale ** 2
    early = tt - tt.min() <= _FREQ_FIT_S
    if early.sum() < 3:
        early = np.ones(tt.size, dtype=bool)
    te, xe = tt[early], xx[early] - 0.5 * drift_per_s * tt[early] ** 2
    fspan = max(te.max() - te.min(), 1.0)
    coef = np.polynomial.polynomial.polyfit(te / fspan, xe, 1)
    return coef[0], coef[1] / fspan, drift_per_s, fspan


def build_setups(phase_s: np.ndarray, elapsed_s: np.ndarray, reference: np.ndarray,
                 tau0_s: float, clocks, clock_settings: dict, ensemble: EnsembleSettings):
    """ClockSetup for every clock, from the configuration and the initial stretch.

    Parameters
    ----------
    phase_s : ndarray, shape (n_epochs, n_clocks)
        Measurements (clock - reference) [s]; only the first ``startup_days`` are used.
    elapsed_s : ndarray, shape (n_epochs,)
    reference : ndarray of int, shape (n_epochs,)
    tau0_s : float
    clocks : sequence of str
    clock_settings : mapping name -> ClockSettings
    ensemble : EnsembleSettings

    Returns
    -------
    (list of ClockSetup, StartupReport)
    """
    n = len(clocks)
    settings = [clock_settings.get(c, ClockSettings()) for c in clocks]
    monitor = np.array([s.role == "monitor" for s in settings])
    rows = elapsed_s - elapsed_s[0] <= ensemble.startup_days * SECONDS_PER_DAY
    stretch = phase_s[rows]
    t = elapsed_s[rows] - elapsed_s[0]
    stretch_days = float(t[-1] / SECONDS_PER_DAY) if t.size else 0.0
    present = np.isfinite(stretch).mean(axis=0) >= 0.25
    need = np.array([any(math.isnan(getattr(s, k)) for k in ("q1_s", "q2_per_s", "r_s2"))
                     for s in settings])
    estimates, messages, long_term = ({}, [], {})
    # monitors (a measured steered output) are estimated too: their levels feed the steering
    # tracker, never the scale
    to_estimate = present
    if (need & to_estimate).any():
        # the pair variances index time by row: a missing epoch must be a NaN row, not a join
        _, _, (on_slots,) = on_grid(t, tau0_s, stretch)
        estimates, messages, long_term = estimate_noise(on_slots, tau0_s, to_estimate, clocks)
        drift_of = np.array([ensemble.drift_states if s.drift_state == "default"
                             else s.drift_state == "yes" for s in settings])
        estimates = refine_q2(stretch, t, estimates, drift_of)
    setups, sources, noises = [], [], []
    anchor = int(reference[0])
    span_s = max(float(t[-1]) if t.size else tau0_s, tau0_s)
    for i, (name, s) in enumerate(zip(clocks, settings)):
        preset = _preset(s.type)
        drift = ensemble.drift_states if s.drift_state == "default" else s.drift_state == "yes"
        est = estimates.get(i)
        typical = preset.clock_noise() if preset is not None else None
        base = est or typical
        source = "estimated" if est is not None else ("type" if typical is not None else "default")
        if base is None:
            base = ClockNoise(q1_s=1e-22, q2_per_s=1e-32, q3_per_s3=0.0, r_s2=(1e-11) ** 2)
        values = {}
        for key in ("q1_s", "q2_per_s", "q3_per_s3", "r_s2"):
            given = getattr(s, key)
            values[key] = given if not math.isnan(given) else getattr(base, key)
        if all(not math.isnan(getattr(s, k)) for k in ("q1_s", "q2_per_s", "r_s2")):
            source = "config"
        values["r_s2"] = max(values["r_s2"], _R_FLOOR_S2)
        values["q1_s"] = max(values["q1_s"], _R_FLOOR_S2 / tau0_s)
        # a random-walk FM level of zero would freeze the frequency estimate: keep the
        # white-FM / random-walk-FM crossover within the stretch at the latest
        values["q2_per_s"] = max(values["q2_per_s"], values["q1_s"] / span_s ** 2)
        if not drift:
            values["q3_per_s3"] = 0.0
        noise = ClockNoise(**values)
        freq_prior = _FREQ_PRIOR if preset is None else max(preset.frequency_offset, 1e-15)
        drift_prior = (_DRIFT_PRIOR_PER_S if preset is None
                       else max(preset.drift_per_day, 1e-18) / SECONDS_PER_DAY)
        frame_hvar = math.nan
        if source == "estimated" and i in long_term:
            tau_max, level = long_term[i]
            frame_hvar = max(level, values["q1_s"] / ensemble.frame_interval_s)
        setup = ClockSetup(noise, drift_state=drift, monitor=bool(monitor[i]),
                           frequency_prior=10 * freq_prior, drift_prior_per_s=10 * drift_prior,
                           frame_hvar=frame_hvar)
        setups.append(setup)
        sources.append("monitor" if monitor[i] else source)
        noises.append(noise)
    _initial_states(setups, stretch, t, anchor)
    report = StartupReport(tuple(clocks), tuple(sources), tuple(noises), stretch_days,
                           tuple(messages))
    return setups, report


def _initial_states(setups, stretch, t, anchor) -> None:
    """Initial (phase, frequency, drift) of each clock relative to the anchor clock.

    The values are fits of each clock minus the anchor; the covariance of each clock carries
    only its own share (from its own noise levels), so that the prior of any difference,
    P_i + P_j, does not depend on which clock served as the anchor (the initial covariance of
    the unobservable common mode is immaterial: the filter's frame removes it).
    """
    if not t.size:
        return
    z0 = stretch[0]
    for i, s in enumerate(setups):
        if s.monitor or not np.isfinite(z0[i]):
            continue
        own = _own_prior(s, min(max(float(t[-1]), 1.0), _FREQ_FIT_S), max(float(t[-1]), 1.0))
        if i == anchor:
            s.initial_state = np.zeros(3)
            s.initial_cov = own
            continue
        fit = _fit_state(stretch[:, i] - stretch[:, anchor], t, s.drift_state)
        if fit is None:
            continue
        _, freq, drift, fspan = fit
        cov = _own_prior(s, max(fspan, 1.0), max(float(t[-1]), 1.0))
        if not s.drift_state or float(t[-1]) < 3 * SECONDS_PER_DAY:
            drift = 0.0
        s.initial_state = np.array([z0[i] - z0[anchor], freq, drift])
        s.initial_cov = cov


def _own_prior(s: ClockSetup, span_s: float, drift_span_s: float) -> np.ndarray:
    """A clock's own share of the uncertainty of the fits: frequency over ``span_s``, drift over
    ``drift_span_s`` [s].

    Slope of a random-walk phase over T: variance 6 q1 / (5 T) (plus the frequency wander
    q2 T / 3 over the stretch); curvature: 720 q1 / T^3 + 12 q2 / T; four times these for
    safety (the fit ignores the correlation of the residuals).  Without a drift state, or over
    less than three days, the drift keeps its type's prior.
    """
    q1, q2 = s.noise.q1_s, s.noise.q2_per_s
    p_yy = 4.0 * (1.2 * q1 / span_s + q2 * span_s / 3.0)
    if not s.drift_state:
        p_dd = 0.0
    elif drift_span_s < 3 * SECONDS_PER_DAY:
        p_dd = s.drift_prior_per_s ** 2
    else:
        p_dd = 4.0 * (720.0 * q1 / drift_span_s ** 3 + 12.0 * q2 / drift_span_s)
    return np.diag([s.noise.r_s2, p_yy, p_dd])
