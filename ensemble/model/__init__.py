"""Clock model: noise parameters, transition and process-noise matrices, variance relations."""

from .clockmodel import (ClockNoise, allan_variance, hadamard_variance, process_noise,
                         process_noise_blocks, q1_from_white_fm, q2_from_random_walk_fm,
                         q3_from_random_run_fm, q_from_h, r_from_h2, transition_matrix)

__all__ = ["ClockNoise", "allan_variance", "hadamard_variance", "process_noise",
           "process_noise_blocks", "q1_from_white_fm", "q2_from_random_walk_fm",
           "q3_from_random_run_fm", "q_from_h", "r_from_h2", "transition_matrix"]
