"""Run a scenario: true clock phases, measured differences, events (internal module).

For clock i with preset levels h_alpha, frequency offset y0, drift D and phase offset x0, on
the grid t_k = k tau0 (k = 0 ... T - 1)::

    true_i(t) = x0 + y0 t + D t^2 / 2 + noise_i(t) + (steps, frequency steps, drift changes)

(clock - ideal time, never missing), and the measurement of clock i against the epoch's
reference r(k)::

    phase_i(t_k) = true_i(t_k) - true_r(t_k) + v_i(t_k) + outliers,   phase_r(t_k) = 0,

with v_i the white PM (and optional flicker PM) of the channel of clock i.

Random streams (numpy SeedSequence with spawn keys, so that adding an anomaly, a clock at the
end or a noise term changes nothing else): clock i's noise uses (seed, spawn_key=(0, i)), one
child per noise type; its channel noise (seed, (1, i)); random offsets of clock group g
(seed, (2, g)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from ..model.clockmodel import ClockNoise
from .anomalies import Event, build_injection
from .powerlaw import component_rng, flicker_pm_phase, powerlaw_phase, white_pm_phase
from .scenario import SECONDS_PER_DAY, Scenario

#: MVAR of flicker PM at large n is 3.3740 h_1 / ((2 pi)^2 tau^2) (our own numerical evaluation;
#: the rounder 3.37 is recalled from memory), so its TDEV plateau T_f gives
#: h_1 = 12 pi^2 T_f^2 / 3.3740.
FLICKER_PM_MVAR_FACTOR = 3.3740


@dataclass(frozen=True)
class ClockParameters:
    """Noise and deterministic parameters of one simulated clock and its channel.

    Attributes
    ----------
    name, type : str
        Clock identifier and preset key.
    h : mapping of int to float
        Power-law coefficients of the clock: h_0 [s], h_-1 [1], h_-2 [1/s], h_-4 [1/s^3].
    clock_noise : ClockNoise
        The Kalman-model q1, q2, q3 of the clock (flicker FM not representable) and r = the
        channel's white-PM variance. [s], [1/s], [1/s^3], [s^2]
    flicker_fm_adev : float
        Flicker-FM Allan-deviation floor (not in ``clock_noise``). [1]
    frequency_offset : float
        Fractional frequency at the start. [1]
    drift_per_s : float
        Linear frequency drift. [1/s]
    phase_offset_s : float
        Clock - ideal time at the start. [s]
    white_pm_s : float
        White PM standard deviation of the channel. [s]
    flicker_pm_h1_s2 : float
        Flicker PM coefficient h_1 of the channel. [s^2]
    """

    name: str
    type: str
    h: Mapping[int, float]
    clock_noise: ClockNoise
    flicker_fm_adev: float
    frequency_offset: float
    drift_per_s: float
    phase_offset_s: float
    white_pm_s: float
    flicker_pm_h1_s2: float


@dataclass(frozen=True, eq=False)
class Simulation:
    """The result of :func:`simulate`: truth and measurements on the epoch grid.

    Attributes
    ----------
    scenario : Scenario
    clocks : tuple of str, length N
        Column order of every (T, N) array.
    mjd : ndarray, shape (T,)
        Epoch tags, MJD (UTC). [d]
    elapsed_s : ndarray, shape (T,)
        Time since the first epoch, k tau0. [s]
    tau0_s : float
        Sampling interval. [s]
    true_phase_s : ndarray, shape (T, N)
        Clock - ideal time, never NaN (also where no measurement exists). [s]
    phase_s : ndarray, shape (T, N)
        Measured clock - reference; 0 in the reference's column; NaN where missing. [s]
    reference : ndarray of int, shape (T,)
        Column of each epoch's reference clock.
    events : tuple of Event
        Injected anomalies, availability changes and reference changes.
    noise : dict of str to ClockParameters
        Per-clock parameters, in column order.
    white_fm_factor : ndarray, shape (T - 1, N)
        Multiplier of each clock's white-FM level over each interval (1 without noise growth).
    """

    scenario: Scenario
    clocks: tuple[str, ...]
    mjd: np.ndarray
    elapsed_s: np.ndarray
    tau0_s: float
    true_phase_s: np.ndarray
    phase_s: np.ndarray
    reference: np.ndarray
    events: tuple[Event, ...]
    noise: dict
    white_fm_factor: np.ndarray

    @property
    def n_epochs(self) -> int:
        return int(self.mjd.shape[0])

    @property
    def n_clocks(self) -> int:
        return len(self.clocks)

    @property
    def available(self) -> np.ndarray:
        """Boolean (T, N): True where a measurement exists."""
        return ~np.isnan(self.phase_s)

    def true_difference(self, i: int | str, j: int | str) -> np.ndarray:
        """True clock i - clock j at every epoch [s] (no measurement noise, never NaN)."""
        i = self.clocks.index(i) if isinstance(i, str) else i
        j = self.clocks.index(j) if isinstance(j, str) else j
        return self.true_phase_s[:, i] - self.true_phase_s[:, j]

    def to_csv(self, path) -> int:
        """Write the measurements as the long CSV of the contract; returns the number of rows."""
        from .csvout import write_long_csv
        return write_long_csv(path, self.mjd, self.clocks, self.phase_s, self.reference)

    def write_truth(self, path) -> None:
        """Write the truth HDF5 file (see :mod:`ensemble.simulate.truth`)."""
        from .truth import write_truth
        write_truth(path, self)

    def events_table(self) -> np.ndarray:
        """Events as a structured array: kind, clock, mjd [d], size, unit, end_mjd [d], epoch."""
        dtype = [("kind", "U16"), ("clock", "U32"), ("mjd", "f8"), ("size", "f8"),
                 ("unit", "U8"), ("end_mjd", "f8"), ("epoch", "i8")]
        return np.array([(e.kind, e.clock, e.mjd, e.size, e.unit, e.end_mjd, e.epoch)
                         for e in self.events], dtype=dtype)

    def measurements(self):
        """The measured data as an :class:`ensemble.io.measurements.Measurements` object."""
        from ..io.measurements import Measurements
        return Measurements(self.clocks, self.mjd.copy(), self.elapsed_s.copy(),
                            self.phase_s.copy(), self.reference.copy(), self.tau0_s,
                            source=self.scenario.path or "simulation")


def simulate(scenario: Scenario) -> Simulation:
    """Simulate a scenario.

    Parameters
    ----------
    scenario : Scenario
        From :meth:`Scenario.from_toml`, :meth:`Scenario.from_dict` or :func:`lab_scenario`.

    Returns
    -------
    Simulation

    Raises
    ------
    ConfigError
        Inconsistent availability (e.g. the reference leaves without a reference change).

    Examples
    --------
    >>> from ensemble.simulate import lab_scenario, simulate
    >>> sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 2}, 20.0, seed=3))
    >>> sim.true_phase_s.shape, sim.clocks
    ((480, 4), ('H01', 'H02', 'C01', 'C02'))
    >>> bool((sim.phase_s[:, 0] == 0).all())   # H01 is the reference throughout
    True
    """
    n_t, tau0 = scenario.n_epochs, scenario.tau0_s
    elapsed = np.arange(n_t, dtype=float) * tau0
    mjd = scenario.simulation.start_mjd + elapsed / SECONDS_PER_DAY
    inj = build_injection(scenario, elapsed, mjd)
    seed = scenario.seed
    tdev = scenario.measurement.flicker_pm_tdev_s
    h1 = 12.0 * math.pi ** 2 * tdev ** 2 / FLICKER_PM_MVAR_FACTOR
    n_c = len(scenario.clocks)
    true = np.empty((n_t, n_c))
    reading = np.empty((n_t, n_c))
    params = {}
    for i, clock in enumerate(scenario.clocks):
        h = clock.preset.h_coefficients()
        factor = inj.white_fm_factor[:, i]
        noise = powerlaw_phase(h, tau0, n_t, np.random.SeedSequence(seed, spawn_key=(0, i)),
                               white_fm_factor=None if np.all(factor == 1.0) else factor)
        true[:, i] = (clock.phase_offset_s + clock.frequency_offset * elapsed
                      + 0.5 * clock.drift_per_s * elapsed ** 2 + noise + inj.clock_change_s[:, i])
        sigma = scenario.white_pm_of(clock.name)
        channel = np.random.SeedSequence(seed, spawn_key=(1, i))
        v = np.zeros(n_t)
        if sigma > 0:
            v += white_pm_phase(sigma, n_t, component_rng(channel, 2))
        if h1 > 0:
            v += flicker_pm_phase(h1, tau0, n_t, component_rng(channel, 1))
        reading[:, i] = true[:, i] + v + inj.reading_error_s[:, i]
        params[clock.name] = ClockParameters(
            clock.name, clock.type, h, clock.preset.clock_noise(white_pm_s=sigma),
            clock.preset.flicker_fm_adev, clock.frequency_offset, clock.drift_per_s,
            clock.phase_offset_s, sigma, h1)
    rows = np.arange(n_t)
    phase = reading - true[rows, inj.reference][:, None]
    phase[rows, inj.reference] = 0.0
    phase[~inj.available] = np.nan
    return Simulation(scenario, scenario.clock_names, mjd, elapsed, tau0, true, phase,
                      inj.reference, inj.events, params, inj.white_fm_factor)
