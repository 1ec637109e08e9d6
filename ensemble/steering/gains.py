"""Steering gains: critically damped pole placement and the LQG regulator (pure functions).

Plant of the steered output between two commands, interval tau (derived here; docs/steering.md)::

    x[k+1] = x[k] + tau y[k] + tau^2/2 d[k] + tau u[k]        x: output - target [s]
    y[k+1] = y[k] + tau d[k] + u[k]                           y: its fractional frequency [1]
    d[k+1] = d[k]                                             d: its drift [1/s]

where u[k] is the change of the commanded fractional frequency applied at epoch k (positive:
the output runs faster).  Every policy here is the state feedback

    u[k] = -(g_x x[k] + g_y y[k] + g_d d[k])

with g_x [1/s], g_y [1] and g_d [s], applied to the estimates (certainty equivalence).

* Critically damped (derived here; cf. Matsakis et al. 2019, first author from memory,
  Metrologia 56(2), 025007): double closed-loop pole p = exp(-tau/T), g_y = 1 - p^2,
  g_x = (1 - p)^2 / tau.
* LQG (Koppang & Leland 1999, IEEE Trans. UFFC 46(3), 517-522): minimise
  sum x^2 + w_y y^2 + rho u^2 in scaled units (ns, ns/d, days).  The gain is
  G = (rho + B^T S B)^-1 B^T S Phi with S the stabilising solution of the discrete algebraic
  Riccati equation, from ``scipy.linalg.solve_discrete_are``.  In SI units the Riccati solver
  fails (our own finding: it returns an unstable solution), so the problem is posed in ns and
  days and the gain converted back.
* Drift: the drift mode is not controllable (its eigenvalue 1 stays), so it is not part of the
  Riccati problem.  The feed-forward g_d = tau (1 - g_y / 2) makes a constant drift leave no
  phase error at the command epochs: in the steady state u = -tau d (the change cancels one
  interval of drift), y = tau d / 2 at each command epoch, x = 0; inserting these in the control
  law gives g_d (our derivation; docs/steering.md).  The closed-loop poles do not depend on g_d.
"""

from __future__ import annotations

import math

import numpy as np

from ..units import SECONDS_PER_DAY


def critical_gains(interval_s: float, time_constant_s: float) -> tuple[float, float]:
    """Gains of the critically damped loop with double pole exp(-interval / T).

    Parameters
    ----------
    interval_s : float
        Steering interval tau. [s]
    time_constant_s : float
        Time constant T of the closed loop. [s]

    Returns
    -------
    g_x : float
        Phase gain (1 - p)^2 / tau. [1/s]
    g_y : float
        Frequency gain 1 - p^2. [1]
    """
    if not (interval_s > 0 and time_constant_s > 0):
        raise ValueError(f"interval and time constant must be > 0, got {interval_s=}, "
                         f"{time_constant_s=}")
    p = math.exp(-interval_s / time_constant_s)
    return (1.0 - p) ** 2 / interval_s, 1.0 - p * p


def lqg_riccati(interval_d: float, effort_weight_d2: float,
                frequency_weight_d2: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Riccati solution and gain of the LQG steering problem in scaled units (ns, days).

    Parameters
    ----------
    interval_d : float
        Steering interval. [d]
    effort_weight_d2 : float
        rho, the weight of a squared change (ns/d)^2 against a squared phase error ns^2. [d^2]
    frequency_weight_d2 : float
        w_y, the weight of a squared frequency error (ns/d)^2. [d^2]

    Returns
    -------
    S : ndarray, shape (2, 2)
        Stabilising solution of S = Phi^T S Phi - Phi^T S B (rho + B^T S B)^-1 B^T S Phi + W.
        [ns^2 per ns^2 of state, scaled units]
    gain : ndarray, shape (2,)
        (g_x [1/d], g_y [1]) with u [ns/d] = -(g_x x [ns] + g_y y [ns/d]).
    """
    import scipy.linalg

    if not (interval_d > 0 and effort_weight_d2 > 0 and frequency_weight_d2 >= 0):
        raise ValueError(f"need interval_d > 0, effort_weight_d2 > 0, frequency_weight_d2 >= 0; "
                         f"got {interval_d=}, {effort_weight_d2=}, {frequency_weight_d2=}")
    phi = np.array([[1.0, interval_d], [0.0, 1.0]])
    b = np.array([[interval_d], [1.0]])
    weight = np.diag([1.0, frequency_weight_d2])
    rho = np.array([[effort_weight_d2]])
    s = scipy.linalg.solve_discrete_are(phi, b, weight, rho)
    s = 0.5 * (s + s.T)
    gain = np.linalg.solve(rho + b.T @ s @ b, b.T @ s @ phi)[0]
    return s, gain


def lqg_gains(interval_s: float, effort_weight_d2: float,
              frequency_weight_d2: float = 0.0) -> tuple[float, float]:
    """LQG gains in SI units (see :func:`lqg_riccati` for the problem in scaled units).

    Parameters
    ----------
    interval_s : float
        Steering interval. [s]
    effort_weight_d2, frequency_weight_d2 : float
        rho and w_y in scaled units. [d^2]

    Returns
    -------
    g_x : float
        [1/s]
    g_y : float
        [1]
    """
    _, gain = lqg_riccati(interval_s / SECONDS_PER_DAY, effort_weight_d2, frequency_weight_d2)
    # u [ns/d] = -(g_x' x [ns] + g_y' y [ns/d]); dividing by 1e9 * 86400 gives
    # u = -(g_x' / 86400 * x [s] + g_y' * y): the ns factors cancel.
    if not np.isfinite(gain).all():
        raise ValueError(f"Riccati gain is not finite: {gain!r}")
    return float(gain[0]) / SECONDS_PER_DAY, float(gain[1])


def drift_feedforward(interval_s: float, g_y: float) -> float:
    """Drift gain g_d = tau (1 - g_y / 2) that leaves no phase error under a constant drift. [s]

    Parameters
    ----------
    interval_s : float
        Steering interval tau. [s]
    g_y : float
        Frequency gain of the loop. [1]
    """
    return interval_s * (1.0 - 0.5 * g_y)


def closed_loop_matrix(interval_s: float, g_x: float, g_y: float) -> np.ndarray:
    """Closed-loop transition Phi - B G of (x [s], y [1]) over one interval.

    Parameters
    ----------
    interval_s : float
        [s]
    g_x : float
        [1/s]
    g_y : float
        [1]

    Returns
    -------
    ndarray, shape (2, 2)
        Characteristic polynomial lambda^2 - (2 - tau g_x - g_y) lambda + (1 - g_y) (derived here).
    """
    t = float(interval_s)
    return np.array([[1.0 - t * g_x, t * (1.0 - g_y)], [-g_x, 1.0 - g_y]])


def closed_loop_poles(interval_s: float, g_x: float, g_y: float) -> np.ndarray:
    """Eigenvalues of :func:`closed_loop_matrix` (complex, shape (2,))."""
    return np.linalg.eigvals(closed_loop_matrix(interval_s, g_x, g_y)).astype(complex)


def policy_gains(policy: str, interval_s: float, *, time_constant_s: float | None = None,
                 effort_weight_d2: float | None = None, frequency_weight_d2: float = 0.0,
                 drift: bool = True) -> tuple[float, float, float]:
    """(g_x [1/s], g_y [1], g_d [s]) of a named policy ('critical' or 'lqg')."""
    if policy == "critical":
        g_x, g_y = critical_gains(interval_s, time_constant_s)
    elif policy == "lqg":
        g_x, g_y = lqg_gains(interval_s, effort_weight_d2, frequency_weight_d2)
    else:
        raise ValueError(f"unknown policy {policy!r}; known: 'critical', 'lqg'")
    g_d = drift_feedforward(interval_s, g_y) if drift else 0.0
    return g_x, g_y, g_d
