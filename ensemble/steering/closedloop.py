"""Closed-loop simulation of a steered output, and the noise-free projection of a policy.

The simulation lets an operator see what a policy will do before applying it: a master clock of
given noise (exact Phi and Q of the clock model, seeded numpy Generator) plus a deterministic
frequency offset and drift, white measurement noise, a small Kalman filter estimating the
master's state relative to the target (the engine's role), the controller, and the synthesizer
integrating the applied changes.  Optionally an external reference whose difference from the
scale wanders as a two-state clock model is sampled every few days with noise.

Scenario files are TOML::

    [simulation]            days, step_h, seed, start_mjd, estimator_states
    [simulation.master]     noise, initial phase and frequency, drift of the master
    [simulation.reference]  (optional) the external reference - scale process and its points
    [steering]              the policy under test (the ordinary [steering] section)
"""

from __future__ import annotations

import math
import pathlib
import tomllib
from dataclasses import dataclass, replace

import numpy as np

from ..errors import ConfigError
from ..model.clockmodel import ClockNoise, process_noise, transition_matrix
from ..settings import build_section, setting
from ..units import SECONDS_PER_DAY, state_scale
from .controller import SteeringController, SteeringRecord
from .external import ExternalSeries
from .settings import SteeringSettings, steering_settings_from_table

#: Prior standard deviations of the simulated estimator's frequency [1] and drift [1/d].
_PRIOR_FREQUENCY_SD = 1e-13
_PRIOR_DRIFT_SD_PER_DAY = 1e-15
#: Marker for external_file when a simulation generates the external points itself.
SIMULATED_EXTERNAL = "<simulated>"


@dataclass(frozen=True)
class SimulationSettings:
    """``[simulation]``: length, epoch spacing and seed of a closed-loop run."""

    days: float = setting(90.0, unit="d", minimum=0.0, exclusive_minimum=True, maximum=3650.0,
                          doc="length of the simulated run")
    step_h: float = setting(1.0, unit="h", minimum=1.0 / 60.0, maximum=744.0,
                            doc="spacing of the measurement epochs (the engine's epochs)")
    seed: int = setting(1, minimum=0, doc="seed of the numpy random generator")
    start_mjd: float = setting(61000.0, unit="d", minimum=15020.0, maximum=88069.0,
                               doc="MJD label of the first epoch")
    estimator_states: int = setting(3, choices=(2, 3),
                                    doc="states of the estimating filter: 2 (x, y) or 3 (x, y, d)")


@dataclass(frozen=True)
class MasterTruth:
    """``[simulation.master]``: the simulated master clock relative to the scale."""

    q1_s: float = setting(4e-28, unit="s", minimum=0.0, maximum=1e-18,
                          doc="white-FM diffusion coefficient")
    q2_per_s: float = setting(1e-37, unit="1/s", minimum=0.0, maximum=1e-26,
                              doc="random-walk-FM diffusion coefficient")
    q3_per_s3: float = setting(0.0, unit="1/s^3", minimum=0.0, maximum=1e-40,
                               doc="random-run-FM diffusion coefficient")
    measurement_noise_ns: float = setting(0.03, unit="ns", minimum=0.0, exclusive_minimum=True,
                                          maximum=1e6,
                                          doc="standard deviation of the white measurement noise")
    initial_phase_ns: float = setting(5.0, unit="ns", minimum=-1e9, maximum=1e9,
                                      doc="master - scale at the first epoch")
    initial_frequency: float = setting(3e-15, unit="1", minimum=-1e-6, maximum=1e-6,
                                       doc="master's fractional frequency relative to the scale")
    drift_per_day: float = setting(1e-16, unit="1/d", minimum=-1e-9, maximum=1e-9,
                                   doc="master's linear frequency drift")

    @property
    def noise(self) -> ClockNoise:
        """Clock noise of the master (r is the measurement variance). [SI]"""
        return ClockNoise(self.q1_s, self.q2_per_s, self.q3_per_s3,
                          (self.measurement_noise_ns * 1e-9) ** 2)


@dataclass(frozen=True)
class ReferenceTruth:
    """``[simulation.reference]``: the simulated external reference - scale and its points."""

    every_d: float = setting(5.0, unit="d", minimum=0.0, exclusive_minimum=True, maximum=366.0,
                             doc="spacing of the external points")
    noise_ns: float = setting(1.0, unit="ns", minimum=0.0, exclusive_minimum=True, maximum=1e6,
                              doc="standard deviation of an external point (also its stated "
                                  "uncertainty)")
    q1_s: float = setting(1e-27, unit="s", minimum=0.0, maximum=1e-18,
                          doc="white-FM diffusion coefficient of external - scale")
    q2_per_s: float = setting(3e-37, unit="1/s", minimum=0.0, maximum=1e-26,
                              doc="random-walk-FM diffusion coefficient of external - scale")
    initial_offset_ns: float = setting(0.0, unit="ns", minimum=-1e9, maximum=1e9,
                                       doc="external - scale at the first epoch")
    initial_rate: float = setting(0.0, unit="1", minimum=-1e-6, maximum=1e-6,
                                  doc="rate of external - scale at the first epoch")


@dataclass(frozen=True)
class SimulationSetup:
    """A complete scenario: run settings, master, optional external reference, policy."""

    simulation: SimulationSettings
    master: MasterTruth
    reference: ReferenceTruth | None
    steering: SteeringSettings


def load_simulation(path: str | None = None, *, text: str | None = None) -> SimulationSetup:
    """Read a scenario TOML file (see the module docstring).

    Raises
    ------
    ConfigError
        Unreadable file, bad TOML, unknown table or key, or a bad value.
    """
    if text is None:
        try:
            text = pathlib.Path(path).read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"cannot read the scenario: {exc.strerror or exc}",
                              path=path) from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", path=path) from None
    for name in doc:
        if name not in ("simulation", "steering"):
            raise ConfigError("unknown table; a scenario has [simulation], "
                              "[simulation.master], [simulation.reference] and [steering]",
                              key=name, path=path)
    table = dict(doc.get("simulation", {}))
    master = table.pop("master", None)
    reference = table.pop("reference", None)
    sim = build_section(SimulationSettings, table, "simulation", path)
    master = build_section(MasterTruth, master, "simulation.master", path)
    if reference is not None:
        reference = build_section(ReferenceTruth, reference, "simulation.reference", path)
    steer_table = dict(doc.get("steering", {}))
    if steer_table.get("target") == "external":
        if reference is None:
            raise ConfigError("target = 'external' in a simulation needs a "
                              "[simulation.reference] table", key="steering.target", path=path)
        steer_table["external_file"] = SIMULATED_EXTERNAL
    steering = steering_settings_from_table(steer_table, path=None)
    return SimulationSetup(sim, master, reference, steering)


@dataclass(frozen=True, eq=False)
class SimulationResult:
    """Trajectories of a closed-loop run (one row per epoch; SI units).

    Attributes
    ----------
    mjd : ndarray, shape (n,)
        Epoch labels. [d]
    elapsed_d : ndarray, shape (n,)
        Time since the first epoch. [d]
    true_phase_error_s : ndarray, shape (n,)
        True steered output - target before each epoch's change. [s]
    estimated_phase_error_s : ndarray, shape (n,)
        The controller's phase error (from the estimate). [s]
    frequency_correction : ndarray, shape (n,)
        Applied change at each epoch (0 between commands). [1]
    total_correction : ndarray, shape (n,)
        Total correction after each epoch's change. [1]
    records : list of SteeringRecord
    external : ExternalSeries or None
        The simulated external points.
    setup : SimulationSetup
    """

    mjd: np.ndarray
    elapsed_d: np.ndarray
    true_phase_error_s: np.ndarray
    estimated_phase_error_s: np.ndarray
    frequency_correction: np.ndarray
    total_correction: np.ndarray
    records: list
    external: ExternalSeries | None
    setup: SimulationSetup

    @property
    def measurement_noise_s(self) -> float:
        """Standard deviation of one measurement. [s]"""
        return self.setup.master.measurement_noise_ns * 1e-9


def _noise_factor(noise: ClockNoise, dt_s: float, n_states: int) -> np.ndarray:
    """L with L L^T = Q(dt) (SI), by eigen-decomposition in scaled units (Q may be singular)."""
    scale = state_scale(n_states)
    q = process_noise(noise, dt_s, n_states) * np.outer(scale, scale)
    lam, vec = np.linalg.eigh(0.5 * (q + q.T))
    return (vec * np.sqrt(np.clip(lam, 0.0, None))) / scale[:, None]


def _propagate(x0: np.ndarray, phi: np.ndarray, increments: np.ndarray) -> np.ndarray:
    out = np.empty((increments.shape[0] + 1, x0.shape[0]))
    out[0] = x0
    for k in range(increments.shape[0]):
        out[k + 1] = phi @ out[k] + increments[k]
    return out


def simulate_closed_loop(setup: SimulationSetup,
                         rng: np.random.Generator | None = None) -> SimulationResult:
    """Run the closed loop of ``setup``.

    Parameters
    ----------
    setup : SimulationSetup
    rng : numpy.random.Generator, optional
        Defaults to ``numpy.random.default_rng(setup.simulation.seed)``.

    Returns
    -------
    SimulationResult
    """
    sim, master, ref, steering = setup.simulation, setup.master, setup.reference, setup.steering
    rng = np.random.default_rng(sim.seed) if rng is None else rng
    dt_s = sim.step_h * 3600.0
    n = int(round(sim.days * 24.0 / sim.step_h)) + 1
    elapsed_d = np.arange(n) * (sim.step_h / 24.0)
    mjd = sim.start_mjd + elapsed_d
    noise = master.noise
    r_s2 = noise.r_s2

    # Truth: master - scale (x, y, d) with the exact discretisation (ensemble.model.clockmodel).
    phi3 = transition_matrix(dt_s, 3)
    x0 = np.array([master.initial_phase_ns * 1e-9, master.initial_frequency,
                   master.drift_per_day / SECONDS_PER_DAY])
    inc = rng.standard_normal((n - 1, 3)) @ _noise_factor(noise, dt_s, 3).T
    truth = _propagate(x0, phi3, inc)
    meas_noise = rng.normal(0.0, math.sqrt(r_s2), n)

    external = None
    e_true = np.zeros(n)
    weight = 0.0
    if ref is not None:
        ref_noise = ClockNoise(ref.q1_s, ref.q2_per_s)
        e0 = np.array([ref.initial_offset_ns * 1e-9, ref.initial_rate])
        e_inc = rng.standard_normal((n - 1, 2)) @ _noise_factor(ref_noise, dt_s, 2).T
        e_true = _propagate(e0, transition_matrix(dt_s, 2), e_inc)[:, 0]
        every = max(1, int(round(ref.every_d * 24.0 / sim.step_h)))
        idx = np.arange(0, n, every)
        sd = ref.noise_ns * 1e-9
        points = e_true[idx] + rng.normal(0.0, sd, idx.size)
        external = ExternalSeries.from_arrays(mjd[idx], points, np.full(idx.size, sd),
                                              source="simulated")
    if steering.target == "external":
        weight = steering.external_weight
    controller = SteeringController(steering, noise=noise, external=external)

    # Estimator: Kalman filter of the steered clock in scaled units (ns, ns/d, ns/d^2).
    ns = sim.estimator_states
    scale = state_scale(ns)
    phi = np.diag(scale) @ transition_matrix(dt_s, ns) @ np.diag(1.0 / scale)
    q = process_noise(noise, dt_s, ns) * np.outer(scale, scale)
    control = np.array([dt_s / SECONDS_PER_DAY, 1.0, 0.0][:ns])   # B for u in ns/d
    u_scale = 1e9 * SECONDS_PER_DAY                                 # fractional -> ns/d
    r_ns2 = r_s2 * 1e18
    inv_outer = 1.0 / np.outer(scale, scale)
    measured = steering.output == "measured"
    prior = np.array([r_ns2, (_PRIOR_FREQUENCY_SD * u_scale) ** 2,
                      (_PRIOR_DRIFT_SD_PER_DAY * u_scale) ** 2][:ns])   # [1/d] -> ns/d^2

    total_true = steering.initial_total_correction
    steer_true = 0.0
    true_err = np.empty(n)
    records: list[SteeringRecord] = []
    est = np.zeros(ns)
    cov = np.diag(prior)
    u_prev = 0.0
    for k in range(n):
        if k > 0:
            steer_true += total_true * dt_s
            est = phi @ est
            if measured:
                est = est + control * (u_prev * u_scale)
            cov = phi @ cov @ phi.T + q
        out_x = truth[k, 0] + steer_true
        z = ((out_x if measured else truth[k, 0]) + meas_noise[k]) * 1e9
        if k == 0:
            est[0] = z
        else:
            s_inn = cov[0, 0] + r_ns2
            gain = cov[:, 0] / s_inn
            est = est + gain * (z - est[0])
            cov = cov - np.outer(gain, cov[0, :])
        cov = 0.5 * (cov + cov.T)
        rec = controller.step(mjd[k], dt_s, est / scale, cov * inv_outer)
        records.append(rec)
        true_err[k] = out_x - weight * e_true[k]
        u_prev = rec.frequency_correction
        total_true += u_prev

    return SimulationResult(
        mjd=mjd, elapsed_d=elapsed_d, true_phase_error_s=true_err,
        estimated_phase_error_s=np.array([r.phase_error_s for r in records]),
        frequency_correction=np.array([r.frequency_correction for r in records]),
        total_correction=np.array([r.total_correction for r in records]),
        records=records, external=external, setup=setup)


def project_phase_error(settings: SteeringSettings, mjd: float, phase_error_s: float,
                        frequency_error: float, drift_per_s: float, total_correction: float,
                        days: float) -> dict:
    """Noise-free projection of the policy from a known state (the dry run of a plan).

    The state is taken as exact and unaffected by noise; commands follow every
    ``settings.interval_d`` from ``mjd`` (the first one at ``mjd``), with the configured policy,
    dead band and limits.

    Parameters
    ----------
    settings : SteeringSettings
    mjd : float
        First command epoch of the projection. [d]
    phase_error_s : float
        Output - target at ``mjd`` before its command. [s]
    frequency_error : float
        Output frequency relative to the target at ``mjd`` before its command. [1]
    drift_per_s : float
        Drift relative to the target. [1/s]
    total_correction : float
        Total correction in force at ``mjd``. [1]
    days : float
        Length of the projection. [d]

    Returns
    -------
    dict of ndarray
        ``mjd`` [d], ``phase_error_s`` [s] (before each command), ``frequency_correction`` [1],
        ``clipped`` (codes as in :data:`~ensemble.steering.controller.CLIP_NAMES`).
    """
    plan = replace(settings, output="virtual", target="scale", external_file="", settle_d=0.0,
                   anchor="first-epoch", initial_total_correction=total_correction)
    ctl = SteeringController(plan)
    tau = plan.interval_s
    x, y, d = phase_error_s, frequency_error - total_correction, drift_per_s
    n = int(math.floor(days / plan.interval_d)) + 1
    out = {"mjd": np.empty(n), "phase_error_s": np.empty(n),
           "frequency_correction": np.empty(n), "clipped": np.zeros(n, dtype=np.int8)}
    for k in range(n):
        t = mjd + k * plan.interval_d
        rec = ctl.step(t, tau, (x, y, d))
        out["mjd"][k] = t
        out["phase_error_s"][k] = rec.phase_error_s
        out["frequency_correction"][k] = rec.frequency_correction
        out["clipped"][k] = rec.clipped
        # The master (virtual mode: the error without the synthesizer) runs freely.
        x, y = x + tau * y + 0.5 * tau * tau * d, y + tau * d
    return out
