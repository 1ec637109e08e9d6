"""Frequency-stability statistics of phase or fractional-frequency series.

All in SI units: phase [s], fractional frequency [1], averaging times [s].  Missing values are
NaN and are never interpolated (see :mod:`ensemble.stability.deviations` for the gap rule).

Deviations (one value and term count per averaging factor m, tau = m tau0)
    deviation, adev, oadev, mdev, tdev, hdev, ohdev, totdev, DeviationResult,
    averaging_factors, phase_to_frequency, frequency_to_phase
Fast overlapping Allan and Hadamard variances of many phase series (for the ensemble)
    overlapping_avar_hvar, OverlappingVariances
Degrees of freedom and confidence intervals
    edf_greenhall, totdev_edf, edf_for, deviation_interval, chi2_factors, CONFIDENCE_68
Noise identification
    identify_noise, NoiseEstimate, lag1_alpha, b1_ratio, b1_expected, NOISE_NAMES
The per-tau table behind ``ensemble stability``
    stability_table, StabilityRow, plot_stability
"""

from .confidence import CONFIDENCE_68, chi2_factors, deviation_interval
from .deviations import (STATISTICS, DeviationResult, OverlappingVariances, adev,
                         averaging_factors, deviation, frequency_to_phase, hdev, mdev, oadev,
                         ohdev, overlapping_avar_hvar, phase_to_frequency, tdev)
from .edf import edf_for, edf_greenhall, totdev_edf
from .noiseid import (NOISE_NAMES, NoiseEstimate, b1_expected, b1_ratio, identify_noise,
                      lag1_alpha)
from .plot import plot_stability
from .table import StabilityRow, stability_table
from .total import totdev

__all__ = [
    # deviations
    "STATISTICS", "DeviationResult", "deviation", "adev", "oadev", "mdev", "tdev", "hdev",
    "ohdev", "totdev", "averaging_factors", "phase_to_frequency", "frequency_to_phase",
    "OverlappingVariances", "overlapping_avar_hvar",
    # degrees of freedom, intervals
    "edf_greenhall", "totdev_edf", "edf_for", "deviation_interval", "chi2_factors",
    "CONFIDENCE_68",
    # noise identification
    "identify_noise", "NoiseEstimate", "lag1_alpha", "b1_ratio", "b1_expected", "NOISE_NAMES",
    # table and plot
    "stability_table", "StabilityRow", "plot_stability",
]
