"""Power-law noise generators: Allan variances, spectra, filter, streams."""

import math

import numpy as np
import pytest
import scipy.signal
import scipy.special
import scipy.stats

from ensemble.simulate.powerlaw import (component_rng, flicker_fm_phase, flicker_pm_phase,
                                        fractional_noise, kasdin_walter_filter, powerlaw_phase,
                                        random_run_fm_phase, random_walk_fm_phase, white_fm_phase,
                                        white_pm_phase)

TAU0 = 10.0          # s
N = 4097             # phase points per realisation
K = 8                # realisations pooled per check
CONF = 0.999         # two-sided confidence of each interval check


def oavar(x, m, tau0):
    """Overlapping Allan variance, brute-force definition (Riley, NIST SP 1065, 2008)."""
    d = x[2 * m:] - 2 * x[m:-m] + x[:-2 * m]
    return np.sum(d ** 2) / (2 * (m * tau0) ** 2 * (x.size - 2 * m))


def ohvar(x, m, tau0):
    """Overlapping Hadamard variance, brute-force definition (Riley, NIST SP 1065, 2008)."""
    d = x[3 * m:] - 3 * x[2 * m:-m] + 3 * x[m:-2 * m] - x[:-3 * m]
    return np.sum(d ** 2) / (6 * (m * tau0) ** 2 * (x.size - 3 * m))


# EDF of the overlapping Allan variance, N phase points (Howe, Allan & Barnes 1981, as in
# Riley SP 1065 (2008) Table 5; formulas and table number recalled from memory, not read in
# the sources).
def edf_wfm(n, m):
    return (3 * (n - 1) / (2 * m) - 2 * (n - 2) / n) * 4 * m * m / (4 * m * m + 5)


def edf_ffm(n, m):
    return 2 * (n - 2) ** 2 / (2.3 * n - 4.9) if m == 1 else 5 * n * n / (4 * m * (n + 3 * m))


def edf_rwfm(n, m):
    return (n - 2) / m * ((n - 1) ** 2 - 3 * m * (n - 1) + 4 * m * m) / (n - 3) ** 2


def assert_in_chi2_interval(estimate, edf, true):
    """The chi-squared interval of a variance estimate (docs/stability.md) contains ``true``."""
    lo = edf * estimate / scipy.stats.chi2.ppf(0.5 + CONF / 2, edf)
    hi = edf * estimate / scipy.stats.chi2.ppf(0.5 - CONF / 2, edf)
    assert lo <= true <= hi, f"{true:.4e} outside [{lo:.4e}, {hi:.4e}] (edf {edf:.1f})"


def pooled(generator, h, m, seed, variance=oavar):
    rng = np.random.default_rng(seed)
    return np.mean([variance(generator(h, TAU0, N, rng), m, TAU0) for _ in range(K)])


@pytest.mark.parametrize("m", [1, 4, 16, 64])
def test_white_fm_allan_variance(m):
    # Source: IEEE Std 1139-2008 / Riley SP 1065 (2008): white FM AVAR = h0 / (2 tau)
    # (recalled from memory); interval from the chi-squared EDF above.
    h0 = 2e-22
    est = pooled(white_fm_phase, h0, m, seed=11)
    assert_in_chi2_interval(est, K * edf_wfm(N, m), h0 / (2 * m * TAU0))


@pytest.mark.parametrize("m", [16, 64, 256])
def test_flicker_fm_allan_variance(m):
    # Source: IEEE Std 1139-2008 / Riley SP 1065 (2008): flicker FM AVAR = 2 ln 2 h_-1
    # (recalled from memory).  The Kasdin-Walter discrete model matches it for tau >> tau0
    # (its exact stationary value is 1.0046 times that at m = 16: far inside the interval).
    hm1 = 1e-28
    est = pooled(flicker_fm_phase, hm1, m, seed=12)
    assert_in_chi2_interval(est, K * edf_ffm(N, m), 2 * math.log(2) * hm1)


def test_flicker_fm_allan_variance_at_tau0_is_that_of_the_discrete_model():
    # Cross-check: at tau0 the discrete model gives AVAR = sigma_w^2 * sum(g_k^2) / 2 with g the
    # coefficients of (1 - B)^(1/2); sum(g_k^2) = Gamma(2) / Gamma(3/2)^2 = 4 / pi (variance of
    # fractionally differenced noise, Hosking 1981, Biometrika 68, 165; recalled), so with
    # sigma_w^2 = pi h_-1 the AVAR is exactly 2 h_-1.
    g = kasdin_walter_filter(200000, 1.0)            # (1 - B)^(1/2): alpha = +1
    assert np.sum(g ** 2) == pytest.approx(4 / math.pi, rel=1e-5)
    hm1 = 1e-28
    est = pooled(flicker_fm_phase, hm1, 1, seed=13)
    assert_in_chi2_interval(est, K * edf_ffm(N, 1), 2 * hm1)


@pytest.mark.parametrize("m", [1, 4, 16, 64])
def test_random_walk_fm_allan_variance(m):
    # Source: IEEE Std 1139-2008 / Riley SP 1065 (2008): random-walk FM AVAR =
    # (2 pi^2 / 3) h_-2 tau (recalled from memory); EDF above.
    hm2 = 1e-33
    est = pooled(random_walk_fm_phase, hm2, m, seed=14)
    assert_in_chi2_interval(est, K * edf_rwfm(N, m), 2 * math.pi ** 2 / 3 * hm2 * m * TAU0)


@pytest.mark.parametrize("m", [1, 8, 64])
def test_random_run_fm_hadamard_variance(m):
    # Cross-check: the three-state model's HVAR 11 q3 tau^3 / 120 (derived here,
    # ensemble/model/clockmodel.py) with q3 = 8 pi^4 h_-4.  No EDF formula for HVAR at hand:
    # the bound is 5 standard errors of the mean over 24 independent realisations.
    hm4 = 1e-50
    rng = np.random.default_rng(15)
    values = [ohvar(random_run_fm_phase(hm4, TAU0, N, rng), m, TAU0) for _ in range(24)]
    expected = 11 * (8 * math.pi ** 4 * hm4) * (m * TAU0) ** 3 / 120
    assert abs(np.mean(values) - expected) < 5 * np.std(values, ddof=1) / math.sqrt(24)


def test_flicker_fm_statistics_hold_from_the_first_sample():
    # Cross-check: one Gaussian second difference per realisation, so the sum of squares over
    # R realisations is exactly sigma^2 chi^2_R.  At the very first sample the AVAR at m = 32
    # must be the long-run value 2 ln 2 h_-1 (x 1.0004 for the discrete model); without the
    # warm-up it would be about 8 % low (start-up transient of the filter without a past).
    hm1, m, n, reps = 1e-28, 32, 96, 6000
    rng = np.random.default_rng(16)
    d2 = np.array([(lambda x: x[2 * m] - 2 * x[m] + x[0])(flicker_fm_phase(hm1, TAU0, n, rng))
                   for _ in range(reps)])
    est = np.mean(d2 ** 2) / (2 * (m * TAU0) ** 2)
    assert_in_chi2_interval(est, reps, 1.0004 * 2 * math.log(2) * hm1)
    assert est > 0.95 * 2 * math.log(2) * hm1


@pytest.mark.parametrize("generator, level, slope", [
    (white_fm_phase, 2e-22, 0.0),
    (flicker_fm_phase, 1e-28, -1.0),
    (random_walk_fm_phase, 1e-33, -2.0),
])
def test_frequency_spectrum_slope(generator, level, slope):
    # Cross-check: scipy.signal.welch periodogram of y = dx / tau0; least-squares slope of
    # log S_y against log f over a mid band (1/64 to 1/4 of the Nyquist frequency).
    x = generator(level, TAU0, 2 ** 17 + 1, np.random.default_rng(17))
    y = np.diff(x) / TAU0
    f, p = scipy.signal.welch(y, fs=1 / TAU0, nperseg=4096, detrend="linear")
    nyquist = 0.5 / TAU0
    band = (f > nyquist / 64) & (f < nyquist / 4)
    fitted = np.polyfit(np.log10(f[band]), np.log10(p[band]), 1)[0]
    assert fitted == pytest.approx(slope, abs=0.1)


def test_flicker_pm_spectrum_slope_and_tdev_plateau():
    # Cross-check: scipy.signal.welch of the phase, S_x ~ 1/f (slope -1), and the level
    # S_x = h_1 / (4 pi^2 f) within 15 % over the mid band (Kasdin-Walter low-frequency form).
    h1 = 1e-22
    x = flicker_pm_phase(h1, TAU0, 2 ** 17, np.random.default_rng(18))
    f, p = scipy.signal.welch(x, fs=1 / TAU0, nperseg=4096)
    band = (f > 0.5 / TAU0 / 64) & (f < 0.5 / TAU0 / 4)
    assert np.polyfit(np.log10(f[band]), np.log10(p[band]), 1)[0] == pytest.approx(-1, abs=0.1)
    ratio = np.median(p[band] / (h1 / (4 * math.pi ** 2 * f[band])))
    assert ratio == pytest.approx(1.0, rel=0.15)


def test_white_pm_samples_have_the_given_deviation():
    # Cross-check: sample standard deviation of 1e5 normal samples, within 1 % (3.5 sigma).
    x = white_pm_phase(3e-12, 100000, np.random.default_rng(19))
    assert np.std(x) == pytest.approx(3e-12, rel=0.01)


def test_filter_coefficients():
    # Cross-check: the Kasdin-Walter recursion equals the binomial series of (1 - z)^(-d),
    # h_k = (-1)^k binom(-d, k) with d = -alpha/2 (scipy.special.binom).
    k = np.arange(50)
    for alpha in (-1.0, 1.0, -0.5, -3.0):
        d = -alpha / 2
        np.testing.assert_allclose(kasdin_walter_filter(50, alpha),
                                   (-1.0) ** k * scipy.special.binom(-d, k), rtol=1e-12)
    np.testing.assert_array_equal(kasdin_walter_filter(5, 0.0), [1, 0, 0, 0, 0])
    np.testing.assert_array_equal(kasdin_walter_filter(5, -2.0), [1, 1, 1, 1, 1])


def test_fft_filter_is_the_exact_linear_convolution():
    # Cross-check: numpy.convolve (direct linear convolution) of the same innovations.
    n, warm = 300, 2
    out = fractional_noise(n, -1.0, np.random.default_rng(20), warmup_factor=warm)
    white = np.random.default_rng(20).standard_normal(n * (1 + warm))
    direct = np.convolve(white, kasdin_walter_filter(white.size, -1.0))[:white.size][-n:]
    np.testing.assert_allclose(out, direct, rtol=1e-10, atol=1e-12)


def test_streams_are_deterministic_and_independent_per_component():
    h = {0: 2e-26, -1: 7e-31, -2: 2e-37}
    seed = np.random.SeedSequence(99, spawn_key=(0, 3))
    a = powerlaw_phase(h, 3600.0, 500, seed)
    np.testing.assert_array_equal(a, powerlaw_phase(h, 3600.0, 500, seed))
    # Removing a term leaves the others bit for bit: each draws from its own child stream.
    parts = [powerlaw_phase({k: v}, 3600.0, 500, seed) for k, v in h.items()]
    np.testing.assert_array_equal(a, (parts[0] + parts[1]) + parts[2])
    assert not np.array_equal(component_rng(seed, 0).standard_normal(3),
                              component_rng(seed, -1).standard_normal(3))
    assert a[0] == 0.0


def test_invalid_arguments_are_refused():
    with pytest.raises(ValueError, match="unsupported power-law exponent"):
        powerlaw_phase({-3: 1.0}, 1.0, 10, 0)
    with pytest.raises(ValueError, match="finite and >= 0"):
        powerlaw_phase({0: -1.0}, 1.0, 10, 0)
