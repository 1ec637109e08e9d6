"""The three-state stochastic clock model: phase, frequency and frequency drift.

Continuous model (Zucca & Tavella 2005, IEEE Trans. UFFC 52(2), 289-296; the equations
re-derived here)::

    dx = y dt + sqrt(q1) dW1        x: phase (time deviation) [s]
    dy = d dt + sqrt(q2) dW2        y: fractional frequency [1]
    dd =        sqrt(q3) dW3        d: frequency drift [1/s]

with independent Wiener processes.  q1 [s] is the white-FM level (sigma_y^2(tau) = q1/tau),
q2 [1/s] random-walk FM, q3 [1/s^3] random-run FM.  White PM is measurement noise of variance
r [s^2] per sample: z = x + v.  Exact discretisation over any interval tau (derived here; equal
to the Van Loan matrix-exponential construction, tests/test_clockmodel.py)::

    Phi(tau) = [[1, tau, tau^2/2], [0, 1, tau], [0, 0, 1]]
    Q(tau)   = integral_0^tau Phi(s) diag(q1, q2, q3) Phi(s)^T ds

The two-state model (no drift state) keeps the upper-left 2x2 blocks with q3 = 0.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ClockNoise:
    """Noise parameters of one clock in the three-state model (SI units).

    Attributes
    ----------
    q1_s : float
        White FM diffusion coefficient; phase variance grows as q1 * tau. [s]
    q2_per_s : float
        Random-walk FM diffusion coefficient; frequency variance grows as q2 * tau. [1/s]
    q3_per_s3 : float
        Random-run FM diffusion coefficient; drift variance grows as q3 * tau. [1/s^3]
    r_s2 : float
        White PM (measurement) variance of one phase sample. [s^2]
    """

    q1_s: float = 0.0
    q2_per_s: float = 0.0
    q3_per_s3: float = 0.0
    r_s2: float = 0.0

    def __post_init__(self):
        for name in ("q1_s", "q2_per_s", "q3_per_s3", "r_s2"):
            value = getattr(self, name)
            if not np.isfinite(value) or value < 0:
                raise ValueError(f"ClockNoise.{name} must be finite and >= 0, got {value!r}")

    def as_array(self) -> np.ndarray:
        """(q1 [s], q2 [1/s], q3 [1/s^3], r [s^2]) as a float64 array of shape (4,)."""
        return np.array([self.q1_s, self.q2_per_s, self.q3_per_s3, self.r_s2], dtype=float)


def transition_matrix(tau_s: float, n_states: int = 3) -> np.ndarray:
    """State transition matrix Phi(tau) of one clock.

    Parameters
    ----------
    tau_s : float
        Interval. [s]
    n_states : int
        2 (phase, frequency) or 3 (phase, frequency, drift).

    Returns
    -------
    ndarray, shape (n_states, n_states)
        Maps (x [s], y [1], d [1/s]) at t to t + tau.
    """
    _check_states(n_states)
    phi = np.eye(n_states)
    phi[0, 1] = tau_s
    if n_states == 3:
        phi[0, 2] = 0.5 * tau_s * tau_s
        phi[1, 2] = tau_s
    return phi


def process_noise(noise: ClockNoise, tau_s: float, n_states: int = 3) -> np.ndarray:
    """Exact process-noise covariance Q(tau) of one clock (closed form of the module docstring).

    Parameters
    ----------
    noise : ClockNoise
        Diffusion coefficients (r is not used: it belongs to the measurement).
    tau_s : float
        Interval. [s]
    n_states : int
        2 or 3; with 2 states q3 is ignored.

    Returns
    -------
    ndarray, shape (n_states, n_states)
        Covariance of the state noise accumulated over tau, in units of (s, 1, 1/s).
    """
    return process_noise_blocks(np.array([noise.q1_s]), np.array([noise.q2_per_s]),
                                np.array([noise.q3_per_s3]), tau_s, n_states)[0]


def process_noise_blocks(q1_s: np.ndarray, q2_per_s: np.ndarray, q3_per_s3: np.ndarray,
                         tau_s: float, n_states: int = 3) -> np.ndarray:
    """Exact Q(tau) for many clocks at once (vectorised form of :func:`process_noise`).

    Parameters
    ----------
    q1_s, q2_per_s, q3_per_s3 : ndarray, shape (n_clocks,)
        Diffusion coefficients. [s], [1/s], [1/s^3]
    tau_s : float
        Interval. [s]
    n_states : int
        2 or 3.

    Returns
    -------
    ndarray, shape (n_clocks, n_states, n_states)
    """
    _check_states(n_states)
    q1 = np.asarray(q1_s, dtype=float)
    q2 = np.asarray(q2_per_s, dtype=float)
    q3 = np.asarray(q3_per_s3, dtype=float) if n_states == 3 else np.zeros_like(q1)
    t = float(tau_s)
    t2, t3, t4, t5 = t * t, t ** 3, t ** 4, t ** 5
    out = np.empty(q1.shape + (n_states, n_states))
    out[..., 0, 0] = q1 * t + q2 * t3 / 3.0 + q3 * t5 / 20.0
    out[..., 0, 1] = out[..., 1, 0] = q2 * t2 / 2.0 + q3 * t4 / 8.0
    out[..., 1, 1] = q2 * t + q3 * t3 / 3.0
    if n_states == 3:
        out[..., 0, 2] = out[..., 2, 0] = q3 * t3 / 6.0
        out[..., 1, 2] = out[..., 2, 1] = q3 * t2 / 2.0
        out[..., 2, 2] = q3 * t
    return out


def allan_variance(noise: ClockNoise, tau_s: np.ndarray | float,
                   drift_per_s: float = 0.0) -> np.ndarray:
    """Allan variance of the model at averaging time tau (derived here), without random-run FM.

    sigma_y^2(tau) = 3 r / tau^2 + q1 / tau + q2 tau / 3 + D^2 tau^2 / 2.

    The white-PM term assumes the sampling interval equals tau (one sample per tau); random-run FM
    has no stationary Allan variance and is left out (use :func:`hadamard_variance`).

    Parameters
    ----------
    noise : ClockNoise
    tau_s : float or ndarray
        Averaging time. [s]
    drift_per_s : float
        Deterministic linear frequency drift D. [1/s]

    Returns
    -------
    ndarray
        Allan variance [1] (dimensionless, squared fractional frequency).
    """
    tau = np.asarray(tau_s, dtype=float)
    return (3.0 * noise.r_s2 / tau ** 2 + noise.q1_s / tau + noise.q2_per_s * tau / 3.0
            + 0.5 * drift_per_s ** 2 * tau ** 2)


def hadamard_variance(noise: ClockNoise, tau_s: np.ndarray | float) -> np.ndarray:
    """Hadamard variance of the model at averaging time tau (derived here by kernel integration).

    H sigma_y^2(tau) = 10 r / (3 tau^2) + q1 / tau + q2 tau / 6 + 11 q3 tau^3 / 120.
    A linear drift does not contribute.

    Parameters
    ----------
    noise : ClockNoise
    tau_s : float or ndarray
        Averaging time. [s]

    Returns
    -------
    ndarray
        Hadamard variance [1].
    """
    tau = np.asarray(tau_s, dtype=float)
    return (10.0 * noise.r_s2 / (3.0 * tau ** 2) + noise.q1_s / tau + noise.q2_per_s * tau / 6.0
            + 11.0 * noise.q3_per_s3 * tau ** 3 / 120.0)


def q1_from_white_fm(adev_at_1s: float) -> float:
    """q1 [s] from a white-FM level sigma_y(tau) = a tau^-1/2 (a given at tau = 1 s): q1 = a^2."""
    return float(adev_at_1s) ** 2


def q2_from_random_walk_fm(adev: float, tau_s: float) -> float:
    """q2 [1/s] from a random-walk-FM Allan deviation b reached at tau_1: q2 = 3 b^2 / tau_1."""
    return 3.0 * float(adev) ** 2 / float(tau_s)


def q3_from_random_run_fm(hdev: float, tau_s: float) -> float:
    """q3 [1/s^3] from a random-run-FM Hadamard deviation c at tau_1: q3 = 120 c^2 / (11 tau_1^3)."""
    return 120.0 * float(hdev) ** 2 / (11.0 * float(tau_s) ** 3)


def q_from_h(h0: float = 0.0, h_minus2: float = 0.0) -> tuple[float, float]:
    """Power-law coefficients to diffusion coefficients (derived here): q1 = h0/2, q2 = 2 pi^2 h_-2.

    Parameters
    ----------
    h0 : float
        White-FM level of S_y(f) = h0. [1/Hz] = [s]
    h_minus2 : float
        Random-walk-FM level of S_y(f) = h_-2 f^-2. [Hz] = [1/s]

    Returns
    -------
    (q1 [s], q2 [1/s])
    """
    return 0.5 * h0, 2.0 * np.pi ** 2 * h_minus2


def r_from_h2(h2: float, f_high_hz: float) -> float:
    """White-PM variance per sample r [s^2] from S_y = h2 f^2 with cut-off f_h: r = h2 f_h / (4 pi^2)."""
    return h2 * f_high_hz / (4.0 * np.pi ** 2)


def _check_states(n_states: int) -> None:
    if n_states not in (2, 3):
        raise ValueError(f"n_states must be 2 or 3, got {n_states!r}")
