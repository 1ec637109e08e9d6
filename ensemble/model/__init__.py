"""Clock model: noise parameters, transition and process-noise matrices, variance relations,
and typical noise levels of generic clock types (presets)."""

from .clockmodel import (ClockNoise, allan_variance, hadamard_variance, process_noise,
                         process_noise_blocks, q1_from_white_fm, q2_from_random_walk_fm,
                         q3_from_random_run_fm, q_from_h, r_from_h2, transition_matrix)
from .presets import (PRESETS, ClockPreset, allan_variance_from_h, expected_adev, expected_hdev,
                      get_preset, hadamard_variance_from_h)

__all__ = ["ClockNoise", "allan_variance", "hadamard_variance", "process_noise",
           "process_noise_blocks", "q1_from_white_fm", "q2_from_random_walk_fm",
           "q3_from_random_run_fm", "q_from_h", "r_from_h2", "transition_matrix",
           "PRESETS", "ClockPreset", "allan_variance_from_h", "expected_adev", "expected_hdev",
           "get_preset", "hadamard_variance_from_h"]
