"""Clock model: transition matrix, exact process noise, variance relations."""

import numpy as np
import pytest
import scipy.linalg

from ensemble.model import (ClockNoise, allan_variance, hadamard_variance, process_noise,
                            process_noise_blocks, q1_from_white_fm, q2_from_random_walk_fm,
                            q_from_h, transition_matrix)
from ensemble.units import scale_diffusion, state_scale


def _van_loan_q(q, tau):
    """Van Loan (1978) discretisation of dX = A X dt + dW, E[dW dW^T] = diag(q) dt, via expm.

    M = [[-A, Qc], [0, A^T]] tau;  expm(M) = [[., G12], [0, G22]];  Phi = G22^T, Q = Phi G12.
    """
    n = len(q)
    a = np.diag(np.ones(n - 1), 1)
    m = np.zeros((2 * n, 2 * n))
    m[:n, :n] = -a
    m[:n, n:] = np.diag(q)
    m[n:, n:] = a.T
    g = scipy.linalg.expm(m * tau)
    phi = g[n:, n:].T
    return phi, phi @ g[:n, n:]


@pytest.mark.parametrize("tau", [1.0, 3600.0, 86400.0])
def test_process_noise_equals_van_loan(tau):
    # Cross-check: Van Loan matrix-exponential discretisation computed with scipy.linalg.expm
    # (our own check: the closed form equals Van Loan to 1e-17). Scaled units keep expm accurate.
    noise = ClockNoise(q1_s=1e-26, q2_per_s=3.5e-36, q3_per_s3=1e-50)
    qs = [scale_diffusion(noise.q1_s, 1), scale_diffusion(noise.q2_per_s, 2),
          scale_diffusion(noise.q3_per_s3, 3)]
    tau_d = tau / 86400.0
    phi_ref, q_ref = _van_loan_q(qs, tau_d)
    s = state_scale(3)
    q_ours = process_noise(noise, tau) * np.outer(s, s)
    np.testing.assert_allclose(transition_matrix(tau) , np.diag(1 / s) @ phi_ref @ np.diag(s),
                               rtol=1e-12, atol=0)
    np.testing.assert_allclose(q_ours, q_ref, rtol=1e-9, atol=1e-15 * np.abs(q_ref).max())


def test_process_noise_closed_form_entries():
    # Cross-check: closed form of Q(tau) written out (Zucca & Tavella 2005; integral derived here),
    # evaluated here with exact small integers.
    noise = ClockNoise(q1_s=2.0, q2_per_s=3.0, q3_per_s3=5.0)
    q = process_noise(noise, 2.0)
    expected = np.array([
        [2 * 2 + 3 * 8 / 3 + 5 * 32 / 20, 3 * 4 / 2 + 5 * 16 / 8, 5 * 8 / 6],
        [3 * 4 / 2 + 5 * 16 / 8, 3 * 2 + 5 * 8 / 3, 5 * 4 / 2],
        [5 * 8 / 6, 5 * 4 / 2, 5 * 2]])
    np.testing.assert_allclose(q, expected, rtol=1e-15)


def test_two_state_is_upper_left_block_without_q3():
    noise = ClockNoise(q1_s=1e-24, q2_per_s=1e-34, q3_per_s3=0.0)
    q3 = process_noise(noise, 3600.0, 3)
    q2 = process_noise(noise, 3600.0, 2)
    np.testing.assert_array_equal(q2, q3[:2, :2])
    np.testing.assert_array_equal(transition_matrix(3600.0, 2), transition_matrix(3600.0)[:2, :2])


def test_process_noise_semigroup():
    # Analytic: Q(a + b) = Phi(b) Q(a) Phi(b)^T + Q(b) for the exact discretisation.
    noise = ClockNoise(q1_s=1.0, q2_per_s=0.1, q3_per_s3=0.01)
    a, b = 1.7, 2.9
    lhs = process_noise(noise, a + b)
    phi = transition_matrix(b)
    rhs = phi @ process_noise(noise, a) @ phi.T + process_noise(noise, b)
    np.testing.assert_allclose(lhs, rhs, rtol=1e-13)


def test_blocks_match_single():
    q1 = np.array([1e-26, 7e-23]); q2 = np.array([3e-36, 1e-34]); q3 = np.array([1e-50, 0.0])
    blocks = process_noise_blocks(q1, q2, q3, 3600.0)
    for i in range(2):
        np.testing.assert_array_equal(blocks[i], process_noise(ClockNoise(q1[i], q2[i], q3[i]), 3600.0))


def test_variance_relations():
    # Cross-check: AVAR = 3r/tau^2 + q1/tau + q2 tau/3 + D^2 tau^2/2 and
    # HVAR = 10r/(3 tau^2) + q1/tau + q2 tau/6 + 11 q3 tau^3/120 (derived here, kernel integration).
    noise = ClockNoise(q1_s=4.0, q2_per_s=6.0, q3_per_s3=120.0, r_s2=3.0)
    assert allan_variance(noise, 2.0, drift_per_s=1.0) == pytest.approx(
        9 / 4 + 2 + 4 + 2, rel=1e-15)
    assert hadamard_variance(noise, 2.0) == pytest.approx(10 / 4 + 2 + 2 + 88, rel=1e-15)


def test_datasheet_conversions():
    # Cross-check: our own worked examples, q1 = a^2: a maser at 1e-13 tau^-1/2 gives q1 = 1e-26 s;
    # a cesium at 8.5e-12 tau^-1/2 gives 7.2e-23 s (printed to 2 digits).
    assert q1_from_white_fm(1e-13) == pytest.approx(1e-26, rel=1e-12)
    assert q1_from_white_fm(8.5e-12) == pytest.approx(7.2e-23, rel=0.01)
    # Analytic: RW FM AVAR q2 tau/3 equals b^2 at tau_1 when q2 = 3 b^2 / tau_1.
    q2 = q2_from_random_walk_fm(1e-15, 864000.0)
    assert allan_variance(ClockNoise(q2_per_s=q2), 864000.0) == pytest.approx(1e-30, rel=1e-12)
    # Cross-check: q1 = h0/2 and q2 = 2 pi^2 h_-2 (our own mapping, derived here); AVAR of RW FM is
    # (2 pi^2 / 3) h_-2 tau (IEEE Std 1139-2008 power-law table).
    q1, q2 = q_from_h(h0=2e-26, h_minus2=1e-36)
    assert q1 == pytest.approx(1e-26)
    assert q2 / 3 == pytest.approx(2 * np.pi ** 2 / 3 * 1e-36, rel=1e-14)


def test_negative_noise_rejected():
    with pytest.raises(ValueError, match="q2_per_s"):
        ClockNoise(q2_per_s=-1.0)
