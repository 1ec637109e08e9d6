"""ensemble: clock ensemble time scales for timing laboratories.

Forms an ensemble ("paper") time scale from clock comparison measurements with a Kalman filter
and stability-based weights, detects anomalies, computes steering corrections for a physical
output, assesses each clock, and keeps everything in one self-describing HDF5 archive.

Public names by task (all SI units: seconds, dimensionless fractional frequency, 1/s drift):

Clock model
    ClockNoise, transition_matrix, process_noise
"""

__version__ = "0.1.0"

from .model import ClockNoise, process_noise, transition_matrix  # noqa: E402

__all__ = ["__version__", "ClockNoise", "process_noise", "transition_matrix"]
