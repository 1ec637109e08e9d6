"""Power-law noise identification at each averaging time (internal module).

The EDF of a stability variance depends on the dominant noise type, S_y(f) ~ f^alpha with
alpha = 2 white PM, 1 flicker PM, 0 white FM, -1 flicker FM, -2 random-walk FM, -3
flicker-walk FM, -4 random-run FM.  At averaging factor m the data are first reduced to
"tau-samples": phase decimated to every m-th point, or frequency averaged over blocks of m
(a block with a gap is missing).  Then:

* **Lag-1 autocorrelation** (Riley & Greenhall 2004, Proc. EFTF; recalled from memory,
  confirmed by our seeded simulations) when at least :data:`LAG1_MIN_SAMPLES` frequency
  tau-samples exist: r1 is the lag-1 autocorrelation of the series, delta = r1 / (1 + r1);
  while delta >= 0.25 and fewer than dmax differences have been taken, difference the series
  and repeat.  alpha = -2 (delta + d) for frequency data, +2 for phase data, rounded to an
  integer (d = number of differences taken).  dmax lets alpha reach -2 for the Allan family
  and -4 for the Hadamard family (2 and 3 differences of phase, 1 and 2 of frequency); the
  result is clipped to that range.  When the result is a PM noise (alpha 2 or 1) and m > 1,
  R(n) decides between white PM, flicker PM and white FM as for B1 below (method 'lag1+rn'):
  decimated flicker PM reads as white PM to the lag-1 rule, R(n) does not (flicker PM found in
  98 % instead of 55 % of seeded records with 100 samples at m = 4).
* **B1 ratio** (Barnes 1969; recalled from memory, verified here) with fewer samples (at least
  :data:`B1_MIN_SAMPLES`): B1 = (sample variance of the frequency tau-samples) / (their
  Allan variance), compared with B1(n, mu) = n (1 - n^mu) / (2 (n - 1) (1 - 2^mu)) for
  sigma_y^2 ~ tau^mu, mu = -2, -1, 0, 1 (alpha = -mu - 1); the nearest value wins, with
  boundaries at the geometric means of neighbouring values.  mu = -2 covers both PM noises.
  They are split by R(n) = MVAR/AVAR at m, measured on the whole record (many more terms than
  the tau-samples), against its expected values: 1/m for white PM, the flicker-PM value of
  Greenhall & Riley's model of tau0-averaged phase, sz(0; F = 1) / sz(0; F = m)
  (:mod:`ensemble.stability.edf`), and (m^2 + 1) / (2 m^2) for white FM; the nearest on a
  log scale wins.  The white-FM candidate is our addition: with few samples B1 often calls
  white FM "PM" (27 % of seeded white-FM records with 10 samples at m = 16, 5 % after the
  check), and a PM EDF would make the interval far too narrow.  At m = 1, where R(1) = 1 for
  every noise, the lag-1 autocorrelation of the frequency samples splits the PM noises
  instead (white PM -1/2, flicker PM -1/3; boundary -5/12).
* Fewer than :data:`B1_MIN_SAMPLES` samples: no estimate here; the table carries the value of
  the nearest shorter averaging time (:mod:`ensemble.stability.table`).

The thresholds come from seeded simulations (benchmarks/bench_stability.py prints the hit
rates).  At m = 1 the lag-1 method is at least as good as B1 from about 20-30 samples.  Below
8 samples B1 is right in only 25-70 % of records and calls FM noise "PM" in up to 18 %, so the
shorter tau's estimate is carried instead.

Known limitation (measured, not in the method's description): at m > 1 the lag-1 estimate is
biased for the flicker noises, because decimated or averaged flicker noise is not the discrete
fractional noise the rule alpha = -2 (delta + d) assumes: flicker PM reads as white PM (hence
the R(n) split above) and flicker FM sits near the -1/-2 boundary (-1.45 in the limit of large
m), so it is found in only 50-65 % of seeded records with 100 samples at m = 4 or 16, against
95-98 % for B1 with R(n).  Use ``alpha=`` (``--noise``) when the noise type is known.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ..errors import InputError
from .deviations import _Series, prepare, variance_at

#: Fewest frequency tau-samples for the lag-1 autocorrelation method.
LAG1_MIN_SAMPLES = 30

#: Fewest frequency tau-samples for the B1 ratio method.
B1_MIN_SAMPLES = 8

#: Noise names and short codes by alpha (S_y(f) ~ f^alpha).
NOISE_NAMES = {2: "white PM", 1: "flicker PM", 0: "white FM", -1: "flicker FM",
               -2: "random-walk FM", -3: "flicker-walk FM", -4: "random-run FM"}
NOISE_CODES = {2: "WPM", 1: "FPM", 0: "WFM", -1: "FFM", -2: "RWFM", -3: "FWFM", -4: "RRFM"}

#: Statistics of the Hadamard family (third differences: alpha down to -4).
_HADAMARD = ("hdev", "ohdev")


class NoiseEstimate(NamedTuple):
    """Identified noise at one averaging factor.

    Attributes
    ----------
    alpha : int or None
        Power-law exponent of S_y(f) ~ f^alpha; None when too few samples.
    method : str
        'lag1', 'lag1+rn', 'b1', 'b1+rn' (with the R(n) split), 'b1+r1' or 'none'.
    estimate : float
        The raw figure behind the choice: the unrounded alpha (lag1) or the measured B1 ratio;
        NaN for 'none'.
    n_samples : int
        Number of frequency tau-samples available.
    """

    alpha: int | None
    method: str
    estimate: float
    n_samples: int


def alpha_range(statistic: str) -> tuple[int, int]:
    """(lowest, highest) alpha the statistic's EDF supports: (-2, 2) Allan, (-4, 2) Hadamard."""
    return (-4, 2) if statistic in _HADAMARD else (-2, 2)


def noise_name(alpha: int) -> str:
    """Name of the power-law noise with exponent alpha (e.g. 'white FM')."""
    return NOISE_NAMES[int(alpha)]


# --------------------------------------------------------------------------------------------
# Building blocks


def lag1_autocorrelation(series) -> float:
    """Lag-1 autocorrelation r1 of a series (NaN-aware).

    r1 = sum (z_k - zbar)(z_{k+1} - zbar) / sum (z_k - zbar)^2 (n - 1 pairs over n values);
    with gaps, the mean and denominator use the values present and the numerator the pairs
    present, rescaled to n - 1 pairs.  Returns NaN
    when fewer than two values or no pair are present, or the series is constant.
    """
    z = np.asarray(series, dtype=float)
    ok = np.isfinite(z)
    if ok.sum() < 2:
        return np.nan
    dz = z - z[ok].mean()
    pair = ok[:-1] & ok[1:]
    den = float(np.dot(dz[ok], dz[ok]))
    if not pair.any() or den == 0.0:
        return np.nan
    num = float(np.dot(dz[:-1][pair], dz[1:][pair]))
    # without gaps this is the usual sum over n - 1 pairs; with gaps the pair sum is rescaled
    # to n - 1 pairs so that missing pairs do not bias r1 towards 0
    return num * ((ok.sum() - 1) / pair.sum()) / den


def lag1_alpha(series, *, phase: bool, dmax: int) -> float:
    """Unrounded alpha of the lag-1 autocorrelation method (Riley & Greenhall 2004).

    Parameters
    ----------
    series : array_like
        Phase tau-samples (``phase=True``) or frequency tau-samples; NaN where missing.
    phase : bool
        Whether ``series`` is phase (adds 2 to the frequency result).
    dmax : int
        Largest number of differences.

    Returns
    -------
    float
        -2 (delta + d) (+ 2 for phase); NaN if r1 cannot be formed.
    """
    z = np.asarray(series, dtype=float)
    d = 0
    while True:
        r1 = lag1_autocorrelation(z)
        if not np.isfinite(r1):
            return np.nan
        delta = r1 / (1.0 + r1) if r1 > -1.0 else -np.inf
        if delta < 0.25 or d >= dmax:
            break
        z = np.diff(z)
        d += 1
    return -2.0 * (delta + d) + (2.0 if phase else 0.0)


def b1_expected(n: int, mu: float) -> float:
    """Expected B1 ratio for n frequency samples when sigma_y^2(tau) ~ tau^mu.

    B1(n, mu) = n (1 - n^mu) / (2 (n - 1) (1 - 2^mu)); the limit n ln n / (2 (n - 1) ln 2)
    at mu = 0 (Barnes 1969; recalled from memory, verified in tests/test_noiseid.py).
    """
    n = float(n)
    if mu == 0:
        return n * np.log(n) / (2.0 * (n - 1.0) * np.log(2.0))
    return n * (1.0 - n ** mu) / (2.0 * (n - 1.0) * (1.0 - 2.0 ** mu))


def b1_ratio(frequency_samples) -> float:
    """Measured B1: sample variance (n - 1 divisor) over the Allan variance of the samples.

    The Allan variance is the mean of (ybar_{k+1} - ybar_k)^2 / 2 over pairs present.
    NaN when fewer than two values or no pair are present, or the Allan variance is 0.
    """
    y = np.asarray(frequency_samples, dtype=float)
    ok = np.isfinite(y)
    if ok.sum() < 2:
        return np.nan
    var = float(np.var(y[ok], ddof=1))
    dy = np.diff(y)
    pair = np.isfinite(dy)
    if not pair.any():
        return np.nan
    avar = 0.5 * float(np.mean(dy[pair] ** 2))
    return var / avar if avar > 0 else np.nan


def rn_expected(m: int, alpha: int) -> float:
    """Expected R(n) = MVAR/AVAR at factor m for white (alpha 2) or flicker (alpha 1) PM.

    Greenhall-Riley model of tau0-averaged phase: sz(0; F = 1) / sz(0; F = m), d = 2.
    """
    from .edf import _sz
    if alpha not in (1, 2):
        raise InputError(f"R(n) reference values are for alpha 2 or 1, got {alpha!r}")
    return float(_sz(0.0, 1.0, alpha, 2) / _sz(0.0, float(m), alpha, 2))


def _pick_b1(b1: float, n: int) -> int:
    """mu in (-2, -1, 0, 1) whose expected B1 is nearest in ratio (geometric boundaries)."""
    mus = (-2, -1, 0, 1)
    ref = [b1_expected(n, mu) for mu in mus]
    for k in range(len(mus) - 1):
        if b1 < np.sqrt(ref[k] * ref[k + 1]):
            return mus[k]
    return mus[-1]


# --------------------------------------------------------------------------------------------
# Identification on a prepared series


def tau_samples(series: _Series, m: int, tau0_s: float, data: str):
    """Phase and frequency tau-samples at factor m (internal).

    Returns ``(phase_samples or None, frequency_samples)``: decimated phase [s] (phase input
    only) and block-mean frequency [1], NaN where missing.
    """
    if data == "phase":
        z = series.x[::m].copy()
        if series.bad is not None:
            z[series.bad[::m]] = np.nan
        return z, np.diff(z) / (m * tau0_s)
    edges = series.x[::m]
    y = np.diff(edges) / (m * tau0_s)
    if series.cum_gap is not None:
        cg = series.cum_gap[::m]
        y[cg[1:] != cg[:-1]] = np.nan
    return None, y


def _rn_split(series: _Series, m: int, tau0_s: float):
    """alpha in (2, 1, 0) whose expected R(n) = MVAR/AVAR is nearest (log scale); None if m = 1
    or the variances are not available."""
    if m < 2:
        return None
    mvar, n_mod = variance_at(series, "mdev", m, tau0_s)
    avar, n_all = variance_at(series, "oadev", m, tau0_s)
    if not (n_mod and n_all and avar > 0 and mvar > 0):
        return None
    rn = mvar / avar
    refs = {2: rn_expected(m, 2), 1: rn_expected(m, 1), 0: (m * m + 1) / (2.0 * m * m)}
    return min(refs, key=lambda a: abs(np.log(rn / refs[a])))


def identify_prepared(series: _Series, m: int, tau0_s: float, data: str,
                      statistic: str) -> NoiseEstimate:
    """Noise estimate at factor m of a prepared series (internal; see :func:`identify_noise`)."""
    lo, hi = alpha_range(statistic)
    z, y = tau_samples(series, m, tau0_s, data)
    n = int(np.count_nonzero(np.isfinite(y)))
    if n >= LAG1_MIN_SAMPLES:
        if data == "phase":
            raw = lag1_alpha(z, phase=True, dmax=(2 - lo) // 2)
        else:
            raw = lag1_alpha(y, phase=False, dmax=-lo // 2)
        if np.isfinite(raw):
            alpha = int(np.clip(np.round(raw), lo, hi))
            if alpha >= 1:
                split = _rn_split(series, m, tau0_s)
                if split is not None:
                    return NoiseEstimate(split, "lag1+rn", raw, n)
            return NoiseEstimate(alpha, "lag1", raw, n)
    if n < B1_MIN_SAMPLES:
        return NoiseEstimate(None, "none", np.nan, n)
    b1 = b1_ratio(y)
    if not np.isfinite(b1):
        return NoiseEstimate(None, "none", np.nan, n)
    mu = _pick_b1(b1, n)
    if mu != -2:
        return NoiseEstimate(int(np.clip(-mu - 1, lo, hi)), "b1", b1, n)
    # white or flicker PM (or white FM mistaken for PM): decide by R(n) = MVAR/AVAR
    split = _rn_split(series, m, tau0_s)
    if split is not None:
        return NoiseEstimate(split, "b1+rn", b1, n)
    r1 = lag1_autocorrelation(y)
    alpha = 2 if (np.isfinite(r1) and r1 < -5.0 / 12.0) else 1
    return NoiseEstimate(alpha, "b1+r1", b1, n)


def identify_noise(values, tau0_s: float, m: int, *, data: str = "phase",
                   statistic: str = "oadev") -> NoiseEstimate:
    """Identify the dominant power-law noise at averaging factor m.

    Parameters
    ----------
    values : array_like, shape (n,)
        Phase [s] or fractional frequency [1]; NaN marks a missing value.
    tau0_s : float
        Sampling interval. [s]
    m : int
        Averaging factor (tau = m tau0).
    data : {'phase', 'frequency'}
        What ``values`` holds.
    statistic : str
        The statistic the estimate is for: sets the alpha range, -2 .. 2 (Allan family) or
        -4 .. 2 (hdev, ohdev).

    Returns
    -------
    NoiseEstimate
        alpha (None if too few samples), the method used, the raw figure, the sample count.
    """
    series = prepare(values, tau0_s, data)
    m = int(m)
    if m < 1:
        raise InputError(f"averaging factor must be >= 1, got {m}")
    return identify_prepared(series, m, float(tau0_s), data, statistic)
