"""The assessment's result objects (the Python API of :func:`ensemble.assess.assess_archive`).

All values are SI (seconds, dimensionless fractional frequency, drift per second) unless a
field name says otherwise (``_per_day``, ``_days``).  Arrays over averaging times follow
``Assessment.tau_s``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .history import ClockHistory

#: The verdicts, in increasing order of concern (the contract's values).
VERDICTS = ("keep", "watch", "retire")


@dataclass(frozen=True, eq=False)
class Deviation:
    """A clock's own deviation at the judged averaging times, from the N-cornered hat.

    Attributes
    ----------
    value : ndarray, shape (n_tau,)
        The deviation (NaN where the hat estimate is not positive). [1]
    lo, hi : ndarray, shape (n_tau,)
        Its confidence interval (probability ``Assessment.confidence``). [1]
    edf : ndarray, shape (n_tau,)
        Equivalent degrees of freedom of the estimate.
    resolved : ndarray of bool, shape (n_tau,)
        False where the hat cannot separate the clock (only ``upper_bound`` is known).
    upper_bound : ndarray, shape (n_tau,)
        Deviation of the clock's quietest pair: the clock cannot be noisier. [1]
    """

    value: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    edf: np.ndarray
    resolved: np.ndarray
    upper_bound: np.ndarray


@dataclass(frozen=True)
class NoiseLevels:
    """The clock model fitted to the clock's own Hadamard variance (hat working values).

    Attributes
    ----------
    q1_s, q1_std_s : float
        White FM: sigma_y^2(tau) = q1 / tau, and its standard uncertainty. [s]
    white_fm_adev_1s : float
        sqrt(q1): the white-FM Allan deviation at tau = 1 s. [1]
    flicker_adev, flicker_adev_std : float
        Flicker-FM floor as an Allan deviation, sqrt(2 ln 2 h_-1), and its uncertainty. [1]
    q2_per_s, q2_std_per_s : float
        Random-walk FM: sigma_y^2(tau) = q2 tau / 3, and its uncertainty. [1/s]
    r_s2, r_std_s2 : float
        White PM of the clock's measurement channel, variance per reading. [s^2]
    assumed : bool
        True if any point of the fit was a working value (half of the quietest pair) rather
        than a resolved estimate.
    chi2, dof : float, int
        Goodness of fit.
    """

    q1_s: float
    q1_std_s: float
    white_fm_adev_1s: float
    flicker_adev: float
    flicker_adev_std: float
    q2_per_s: float
    q2_std_per_s: float
    r_s2: float
    r_std_s2: float
    assumed: bool
    chi2: float
    dof: int


@dataclass(frozen=True)
class Holdover:
    """Predicted time error if the clock carried time alone from the last epoch.

    The clock's present offset, frequency and drift relative to the scale are taken as known
    corrections, so the prediction is zero and the bound is k sigma of its error:
    sigma^2(t) = [Phi(t) P0 Phi(t)^T + Q(t)]_11 + (flicker floor t)^2 (derived here; see
    :mod:`ensemble.assess.holdover`),
    P0 the covariance of the clock's state relative to the scale at the last epoch and Q its
    own noise (q1, q2 of :class:`NoiseLevels`).

    Attributes
    ----------
    budgets_s : tuple of float
        Time-error budgets. [s]
    time_to_budget_s : tuple of float
        Time until the bound first exceeds each budget (inf beyond the horizon). [s]
    horizon_s : float
        Longest holdover searched. [s]
    bound_s : dict of float to float
        The bound after 1 d, 10 d and 30 d (keys in s). [s]
    coverage : float
        Two-sided probability of the bound. [1]
    """

    budgets_s: tuple
    time_to_budget_s: tuple
    horizon_s: float
    bound_s: dict
    coverage: float


@dataclass(frozen=True)
class WhatIf:
    """How the scale changes without this clock.

    Attributes
    ----------
    adev_change : ndarray, shape (n_tau,)
        Relative change of the scale's estimated Allan deviation when the clock is left out,
        sigma_without / sigma_with - 1 (> 0: the scale gets worse). [1]
    adev_change_std : ndarray, shape (n_tau,)
        Its standard uncertainty. [1]
    scale_adev_without : ndarray, shape (n_tau,)
        The scale's estimated Allan deviation without the clock. [1]
    role : str
        "leans on", "better without", "not needed" or "minor".
    error : str
        Why the re-formed scale is missing ('' when it ran).
    """

    adev_change: np.ndarray
    adev_change_std: np.ndarray
    scale_adev_without: np.ndarray
    role: str
    error: str = ""


@dataclass(frozen=True, eq=False)
class ClockAssessment:
    """Everything the assessment found about one clock.

    Attributes
    ----------
    clock : str
    verdict : str
        "keep", "watch" or "retire" (advisory; the evidence is in ``reasons``).
    reasons : tuple of str
        Plain sentences naming the numbers and the thresholds, most serious first.
    repair_suggested : bool
        The evidence points to a fault worth repairing rather than to retirement.
    role : str
        "member" or "monitor" in the archive's configuration.
    type_configured : str
        [clocks.NAME].type of the configuration ("auto" if not given).
    type_compared : str or None
        Preset key whose typical levels the clock was compared with (None: no comparison).
    adev, hdev : Deviation
        Own overlapping Allan deviation (linear drift removed) and Hadamard deviation at
        ``Assessment.tau_s``.
    hdev_typical : ndarray, shape (n_tau,)
        Typical Hadamard deviation of ``type_compared`` plus the channel's white PM; NaN
        without a type. [1]
    noise : NoiseLevels or None
    frequency, frequency_std : float
        Fractional frequency of the clock relative to the scale at the last epoch. [1]
    drift_per_day, drift_std_per_day : float
        Its linear frequency drift relative to the scale (0 where none is estimated). [1/d]
    history : ClockHistory
        Events, weights, standings and data availability.
    white_fm_trend, drift_trend : TrendTest or None
        Trend tests of the windowed white-FM level and drift.
    white_fm_growth : float
        Factor by which the fitted white-FM Allan deviation grew over the span. [1]
    holdover : Holdover or None
    what_if : WhatIf or None
        None unless the assessment ran with ``what_if=True``.
    """

    clock: str
    verdict: str
    reasons: tuple
    repair_suggested: bool
    role: str
    type_configured: str
    type_compared: str | None
    adev: Deviation
    hdev: Deviation
    hdev_typical: np.ndarray
    noise: NoiseLevels | None
    frequency: float
    frequency_std: float
    drift_per_day: float
    drift_std_per_day: float
    history: ClockHistory
    white_fm_trend: object
    drift_trend: object
    white_fm_growth: float
    holdover: Holdover | None
    what_if: WhatIf | None = None


@dataclass(frozen=True, eq=False)
class Assessment:
    """The assessment of every clock of an archive.

    Attributes
    ----------
    archive : str
        The archive assessed.
    clocks : tuple of str
        In the archive's column order.
    first_mjd, last_mjd : float
        Span assessed, MJD UTC. [d]
    tau0_s : float
        Sampling interval. [s]
    tau_s : ndarray, shape (n_tau,)
        The judged averaging times the span supports (multiples of tau0). [s]
    confidence : float
        Two-sided probability of the deviation intervals. [1]
    records : tuple of ClockAssessment
        One per clock, in ``clocks`` order.
    scale_adev, scale_adev_std, scale_hdev, scale_hdev_std : ndarray, shape (n_tau,)
        The scale's estimated own stability and its uncertainty (see
        :mod:`ensemble.assess.scalestab`). [1]
    what_if : bool
        Whether the leave-one-out runs were made.
    windows : str
        How the ageing windows were laid out.
    messages : tuple of str
        Notes on the analysis (clocks not separable, windows shortened, runs that failed).
    details : dict
        The intermediate objects (own-stability curves, fits, windows, filter state) for plots
        and the archive; not a stable interface.
    """

    archive: str
    clocks: tuple
    first_mjd: float
    last_mjd: float
    tau0_s: float
    tau_s: np.ndarray
    confidence: float
    records: tuple
    scale_adev: np.ndarray
    scale_adev_std: np.ndarray
    scale_hdev: np.ndarray
    scale_hdev_std: np.ndarray
    what_if: bool
    windows: str
    messages: tuple = ()
    details: dict = field(default_factory=dict)

    def record(self, clock: str) -> ClockAssessment:
        """The record of one clock (KeyError naming the known clocks)."""
        for rec in self.records:
            if rec.clock == clock:
                return rec
        raise KeyError(f"unknown clock {clock!r}; known: {', '.join(self.clocks)}")

    @property
    def verdicts(self) -> dict:
        """clock -> verdict."""
        return {r.clock: r.verdict for r in self.records}
