"""Named constants and unit conversions (SI inside the package; other units only at the edges).

The filter and Riccati code works in scaled units, nanoseconds and days, so that covariances of
phase (~1e-9 s), frequency (~1e-14) and drift (~1e-21 /s) stay within a few decades of each other
(our own numerical experience: in SI units Riccati solutions lost accuracy or failed).  The
scaling is exact: x' = 1e9 x, t' = t / 86400, hence a frequency in ns/day is y * 1e9 * 86400
and a drift in ns/day^2 is d * 1e9 * 86400**2.
"""

from __future__ import annotations

import numpy as np

#: Seconds in one day of 86 400 SI seconds [s/d] (definition).
SECONDS_PER_DAY = 86400.0
#: Nanoseconds per second [ns/s] (definition).
NS_PER_S = 1e9
#: Picoseconds per second [ps/s] (definition).
PS_PER_S = 1e12
#: Modified Julian Date of 1970-01-01T00:00:00 UTC [d] (MJD = JD - 2 400 000.5).
MJD_UNIX_EPOCH = 40587.0
#: Fractional frequency of 1 ns/day [1] = 1e-9 / 86400.
NS_PER_DAY = 1e-9 / SECONDS_PER_DAY


def state_scale(n_states: int) -> np.ndarray:
    """Factors that turn an SI clock state into scaled units.

    Parameters
    ----------
    n_states : int
        2 (phase, frequency) or 3 (phase, frequency, drift).

    Returns
    -------
    ndarray, shape (n_states,)
        Multiply phase [s], frequency [1] and drift [1/s] by these to get ns, ns/d and ns/d^2.
    """
    return np.array([NS_PER_S, NS_PER_S * SECONDS_PER_DAY,
                     NS_PER_S * SECONDS_PER_DAY ** 2][:n_states])


def scale_diffusion(q: float | np.ndarray, k: int) -> float | np.ndarray:
    """Convert the diffusion coefficient q_k from SI to scaled units (ns, days).

    q_k' = q_k * 1e18 * 86400**(2k - 1) for k = 1 (white FM, [s] -> [ns^2/d]),
    k = 2 (random-walk FM, [1/s] -> [ns^2/d^3]) and k = 3 (random-run FM, [1/s^3] -> [ns^2/d^5]).
    """
    return q * NS_PER_S ** 2 * SECONDS_PER_DAY ** (2 * k - 1)


def seconds_to_days(t_s: float | np.ndarray) -> float | np.ndarray:
    """Time interval [s] -> [d]."""
    return t_s / SECONDS_PER_DAY
