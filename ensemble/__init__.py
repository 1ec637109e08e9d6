"""ensemble: clock ensemble time scales for timing laboratories.

Forms an ensemble ("paper") time scale from clock comparison measurements with a Kalman filter
and stability-based weights, detects anomalies, computes steering corrections for a physical
output, assesses each clock, and keeps everything in one self-describing HDF5 archive.

Public names by task (all SI units: seconds, dimensionless fractional frequency, 1/s drift):

Clock model
    ClockNoise, transition_matrix, process_noise

Archive
    open_archive (read an archive: DataFrames of offset, frequency, drift, weight, state;
    events, steering, provenance; units; saved engine state)
"""

__version__ = "0.1.0"

from .archive import open_archive  # noqa: E402  (h5py is imported on first use)
from .model import ClockNoise, process_noise, transition_matrix  # noqa: E402

__all__ = ["__version__", "ClockNoise", "process_noise", "transition_matrix", "open_archive"]
