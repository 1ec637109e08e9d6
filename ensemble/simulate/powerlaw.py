"""Power-law phase noise for clock simulation (internal module of :mod:`ensemble.simulate`).

Generates phase (time deviation) x [s] on a regular grid of interval tau0 whose fractional
frequency has the one-sided spectrum S_y(f) = h_alpha f^alpha, for white PM (alpha = 2), flicker
PM (1), white FM (0), flicker FM (-1), random-walk FM (-2) and random-run FM (-4).  Every series
starts at x_0 = 0 and is a deterministic function of the numpy Generator it is given.

Discrete-time relations (chosen so that the Allan variance of the sampled phase equals the
power-law formulas of IEEE Std 1139-2008 and Riley, NIST SP 1065 (2008), recalled from memory
and reproduced by our own computation):

* White PM: independent phase samples of standard deviation s_x (given directly in seconds);
  AVAR = 3 s_x^2 / tau^2 at every tau.  From h_2: s_x^2 = h_2 f_h / (4 pi^2), f_h = 1 / (2 tau0).
* White FM: exact sampling of a phase random walk, increments N(0, q1 tau0) with q1 = h_0 / 2;
  AVAR = h_0 / (2 tau) exactly at every tau = m tau0.
* Random-walk FM: exact sampling of integrated Brownian frequency (q2 = 2 pi^2 h_-2) with the
  correlated (phase, frequency) increments of Q(tau0) (:mod:`ensemble.model.clockmodel`);
  AVAR = (2 pi^2/3) h_-2 tau exactly at every tau.
* Random-run FM: exact sampling of the three-state model with q3 = 8 pi^4 h_-4 only (Q(tau0) of
  :mod:`ensemble.model.clockmodel`); HVAR = 11 q3 tau^3 / 120 = (11 pi^4 / 15) h_-4 tau^3 exactly.
* Flicker FM and flicker PM: the fractional-differencing filter of Kasdin & Walter (1992),
  "Discrete simulation of power law noise", Proc. 1992 IEEE Frequency Control Symposium,
  h_0 = 1, h_k = h_{k-1} (k - 1 - a/2) / k, applied to white noise of variance
  sigma_w^2 = c / (2 tau0 (2 pi tau0)^a) for a sequence whose spectrum is c f^a at low
  frequency (a = -1 for both).  Flicker FM: the filtered sequence is the mean frequency of each
  interval with sigma_w^2 = pi h_-1, integrated to phase; AVAR -> 2 ln 2 h_-1 for tau >> tau0
  (1.0046 times that at 16 tau0, 1.05 at 4 tau0 and exactly 2 h_-1 = 1.44 times at tau0: the
  discrete model's spectrum rises above h_-1/f near the Nyquist frequency).  Flicker PM: the
  filtered sequence is the phase itself, S_x = h_1 / (4 pi^2 f), so sigma_w^2 = h_1 / (4 pi).

The filter is applied by FFT as an exact linear convolution (no circular wrap-around) after a
warm-up of ``WARMUP_FACTOR`` times the record length, discarded, so that the statistics of the
increments are those of the long-running process from the first kept sample (without warm-up the
Allan variance at lag m is up to 8 % low over the first few m samples).
"""

from __future__ import annotations

import functools
import math
from typing import Mapping

import numpy as np
import scipy.fft

#: Noise types by alpha (exponent of S_y(f) = h_alpha f^alpha).
NOISE_NAMES = {2: "white_pm", 1: "flicker_pm", 0: "white_fm", -1: "flicker_fm",
               -2: "random_walk_fm", -4: "random_run_fm"}
#: Warm-up length of the fractional-differencing filter, in record lengths.
WARMUP_FACTOR = 2
#: Spawn-key element of each noise type's own random stream (see :func:`component_rng`).
_STREAM_CODE = {2: 0, 1: 1, 0: 2, -1: 3, -2: 4, -4: 5}


def kasdin_walter_filter(n: int, alpha: float) -> np.ndarray:
    """Impulse response of the fractional-differencing filter for S(f) ~ f^alpha.

    h_0 = 1, h_k = h_{k-1} (k - 1 - alpha/2) / k (Kasdin & Walter 1992).  alpha = 0 gives white
    noise (h = 1, 0, 0, ...), alpha = -2 a random walk (h = 1, 1, 1, ...).

    Parameters
    ----------
    n : int
        Number of coefficients.
    alpha : float
        Spectral exponent of the generated sequence.

    Returns
    -------
    ndarray, shape (n,)
    """
    k = np.arange(1, n, dtype=float)
    h = np.empty(n)
    h[0] = 1.0
    h[1:] = np.cumprod((k - 1.0 - alpha / 2.0) / k)
    return h


@functools.lru_cache(maxsize=16)
def _filter_spectrum(n: int, alpha: float, size: int) -> np.ndarray:
    spectrum = scipy.fft.rfft(kasdin_walter_filter(n, alpha), size)
    spectrum.setflags(write=False)
    return spectrum


def fractional_noise(n: int, alpha: float, rng: np.random.Generator,
                     warmup_factor: int = WARMUP_FACTOR) -> np.ndarray:
    """A sequence with spectrum ~ f^alpha from unit-variance white innovations.

    The one-sided spectrum of the result, at sampling interval tau0, is
    2 tau0 / |2 sin(pi f tau0)|^(-alpha), i.e. 2 tau0 (2 pi f tau0)^alpha at low frequency
    (Kasdin & Walter 1992).

    Parameters
    ----------
    n : int
        Length of the returned sequence.
    alpha : float
        Spectral exponent (-1 for flicker).
    rng : numpy.random.Generator
        Source of the innovations (n * (1 + warmup_factor) standard normals are drawn).
    warmup_factor : int
        Warm-up length in units of n, generated and discarded.

    Returns
    -------
    ndarray, shape (n,)
    """
    total = n * (1 + int(warmup_factor))
    white = rng.standard_normal(total)
    size = scipy.fft.next_fast_len(2 * total - 1, real=True)   # exact linear convolution
    out = scipy.fft.irfft(scipy.fft.rfft(white, size) * _filter_spectrum(total, float(alpha), size),
                          size)
    return out[total - n:total]


def white_pm_phase(sigma_s: float, n: int, rng: np.random.Generator) -> np.ndarray:
    """White phase noise: independent samples of standard deviation sigma_s.

    Parameters
    ----------
    sigma_s : float
        Per-sample standard deviation. [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n,)
        Phase. [s]
    """
    return float(sigma_s) * rng.standard_normal(n)


def flicker_pm_phase(h1_s2: float, tau0_s: float, n: int, rng: np.random.Generator) -> np.ndarray:
    """Flicker phase noise, S_y(f) = h_1 f, i.e. S_x(f) = h_1 / (4 pi^2 f).

    Parameters
    ----------
    h1_s2 : float
        Power-law coefficient h_1. [s^2]
    tau0_s : float
        Sampling interval (the model is scale-free; kept for a uniform signature). [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n,)
        Phase. [s]
    """
    del tau0_s  # sigma_w^2 = c (2 pi tau0) / (2 tau0) does not depend on tau0 for a = -1
    return math.sqrt(h1_s2 / (4.0 * math.pi)) * fractional_noise(n, -1.0, rng)


def white_fm_phase(h0_s: float, tau0_s: float, n: int, rng: np.random.Generator,
                   level_factor: np.ndarray | None = None) -> np.ndarray:
    """White frequency noise: a phase random walk, S_y(f) = h_0.

    Parameters
    ----------
    h0_s : float
        Power-law coefficient h_0 (q1 = h_0 / 2). [s]
    tau0_s : float
        Sampling interval. [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator
    level_factor : ndarray, shape (n - 1,), optional
        Multiplies the standard deviation of each interval's increment (the white-FM Allan
        deviation level), e.g. for a clock whose noise grows. [1]

    Returns
    -------
    ndarray, shape (n,)
        Phase, x_0 = 0. [s]
    """
    steps = math.sqrt(0.5 * h0_s * tau0_s) * rng.standard_normal(n - 1)
    if level_factor is not None:
        steps *= level_factor
    return _integrate(steps)


def flicker_fm_phase(h_minus1: float, tau0_s: float, n: int,
                     rng: np.random.Generator) -> np.ndarray:
    """Flicker frequency noise, S_y(f) = h_-1 / f (Kasdin & Walter filter, integrated to phase).

    The mean frequency of each interval is taken relative to that of the interval just before
    the record, so the phase carries no arbitrary initial frequency.

    Parameters
    ----------
    h_minus1 : float
        Power-law coefficient h_-1. [1]
    tau0_s : float
        Sampling interval. [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n,)
        Phase, x_0 = 0. [s]
    """
    y = math.sqrt(math.pi * h_minus1) * fractional_noise(n, -1.0, rng)
    return _integrate(tau0_s * (y[1:] - y[0]))


def random_walk_fm_phase(h_minus2: float, tau0_s: float, n: int,
                         rng: np.random.Generator) -> np.ndarray:
    """Random-walk frequency noise, S_y(f) = h_-2 / f^2, sampled exactly (q2 = 2 pi^2 h_-2).

    Over each interval tau the frequency changes by dy ~ N(0, q2 tau) and the phase by
    y tau + xi, xi = dy tau / 2 + N(0, q2 tau^3 / 12): the covariance Q(tau) of
    :func:`ensemble.model.clockmodel.process_noise`.

    Parameters
    ----------
    h_minus2 : float
        Power-law coefficient h_-2. [1/s]
    tau0_s : float
        Sampling interval. [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n,)
        Phase, x_0 = 0 (frequency 0 at the start). [s]
    """
    q2 = 2.0 * math.pi ** 2 * h_minus2
    tau = float(tau0_s)
    a, b = rng.standard_normal((2, n - 1))
    dy = math.sqrt(q2 * tau) * a
    xi = 0.5 * tau * dy + math.sqrt(q2 * tau ** 3 / 12.0) * b
    y = _integrate(dy)[:-1]                      # frequency at the start of each interval
    return _integrate(y * tau + xi)


#: Cholesky factor of Q(1)/q3 of the random-run model, [[1/20, 1/8, 1/6], [1/8, 1/3, 1/2],
#: [1/6, 1/2, 1]] (Q(tau) of :mod:`ensemble.model.clockmodel` with q1 = q2 = 0, tau = 1).
_RR_CHOLESKY = np.linalg.cholesky(np.array([[1 / 20, 1 / 8, 1 / 6], [1 / 8, 1 / 3, 1 / 2],
                                            [1 / 6, 1 / 2, 1.0]]))


def random_run_fm_phase(h_minus4: float, tau0_s: float, n: int,
                        rng: np.random.Generator) -> np.ndarray:
    """Random-run frequency noise, S_y(f) = h_-4 / f^4: a drift performing a random walk.

    Exact sampling of the three-state model with q3 = 8 pi^4 h_-4 (derived in
    :mod:`ensemble.model.clockmodel`): the state noise over tau has the covariance
    q3 [[tau^5/20, tau^4/8, tau^3/6], [tau^4/8, tau^3/3, tau^2/2], [tau^3/6, tau^2/2, tau]].

    Parameters
    ----------
    h_minus4 : float
        Power-law coefficient h_-4. [1/s^3]
    tau0_s : float
        Sampling interval. [s]
    n : int
        Number of samples.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n,)
        Phase, x_0 = 0 (frequency and drift 0 at the start). [s]
    """
    q3 = 8.0 * math.pi ** 4 * h_minus4
    tau = float(tau0_s)
    w = _RR_CHOLESKY @ rng.standard_normal((3, n - 1))
    scale = math.sqrt(q3) * np.array([tau ** 2.5, tau ** 1.5, tau ** 0.5])
    wx, wy, wd = w * scale[:, None]
    d = _integrate(wd)[:-1]                      # drift at the start of each interval
    y = _integrate(d * tau + wy)[:-1]            # frequency at the start of each interval
    return _integrate(y * tau + 0.5 * d * tau * tau + wx)


def component_rng(seed: np.random.SeedSequence | int, alpha: int) -> np.random.Generator:
    """The random stream of one noise type, derived from ``seed`` and alpha.

    Each noise type draws from its own child of the seed (SeedSequence spawn key extended by a
    code for alpha), so adding or removing one component leaves the others unchanged.
    """
    if not isinstance(seed, np.random.SeedSequence):
        seed = np.random.SeedSequence(int(seed))
    child = np.random.SeedSequence(entropy=seed.entropy,
                                   spawn_key=tuple(seed.spawn_key) + (_STREAM_CODE[alpha],))
    return np.random.default_rng(child)


def powerlaw_phase(h: Mapping[int, float], tau0_s: float, n: int,
                   seed: np.random.SeedSequence | int,
                   white_fm_factor: np.ndarray | None = None) -> np.ndarray:
    """Phase of a clock with the power-law spectrum S_y(f) = sum h_alpha f^alpha.

    Parameters
    ----------
    h : mapping
        h_alpha by alpha in {2, 1, 0, -1, -2, -4}: h_2 [s^3] (white PM, cut-off f_h =
        1/(2 tau0)), h_1 [s^2], h_0 [s], h_-1 [1], h_-2 [1/s], h_-4 [1/s^3].  Zero terms are
        skipped (their stream is not drawn).
    tau0_s : float
        Sampling interval. [s]
    n : int
        Number of samples (>= 2).
    seed : SeedSequence or int
        Root of the random streams; each noise type uses its own (:func:`component_rng`).
    white_fm_factor : ndarray, shape (n - 1,), optional
        Per-interval multiplier of the white-FM level (see :func:`white_fm_phase`). [1]

    Returns
    -------
    ndarray, shape (n,)
        Phase, x_0 = 0 apart from white and flicker PM. [s]
    """
    unknown = sorted(set(h) - set(NOISE_NAMES))
    if unknown:
        raise ValueError(f"unsupported power-law exponent(s) {unknown}; supported: "
                         f"{sorted(NOISE_NAMES)}")
    if n < 2:
        raise ValueError(f"need at least 2 samples, got n={n}")
    x = np.zeros(n)
    for alpha in sorted(h, reverse=True):
        level = float(h[alpha])
        if level < 0 or not math.isfinite(level):
            raise ValueError(f"h[{alpha}] must be finite and >= 0, got {level!r}")
        if level == 0.0:
            continue
        rng = component_rng(seed, alpha)
        if alpha == 2:
            x += white_pm_phase(math.sqrt(level / (8.0 * math.pi ** 2 * tau0_s)), n, rng)
        elif alpha == 1:
            x += flicker_pm_phase(level, tau0_s, n, rng)
        elif alpha == 0:
            x += white_fm_phase(level, tau0_s, n, rng, white_fm_factor)
        elif alpha == -1:
            x += flicker_fm_phase(level, tau0_s, n, rng)
        elif alpha == -2:
            x += random_walk_fm_phase(level, tau0_s, n, rng)
        else:
            x += random_run_fm_phase(level, tau0_s, n, rng)
    return x


def _integrate(steps: np.ndarray) -> np.ndarray:
    """Cumulative sum with a leading zero: out[0] = 0, out[k] = steps[0] + ... + steps[k-1]."""
    out = np.empty(steps.shape[0] + 1)
    out[0] = 0.0
    np.cumsum(steps, out=out[1:])
    return out
