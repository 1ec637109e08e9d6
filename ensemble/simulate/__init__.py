"""Seeded clock simulation with known truth: power-law noise, scenarios, anomalies.

Public names:

Scenarios
    Scenario (``from_toml``, ``from_toml_text``, ``from_dict``, ``to_dict``, ``to_toml``),
    lab_scenario, ANOMALY_KINDS
Running
    simulate -> Simulation (true_phase_s, phase_s, reference, events, noise, ``to_csv``,
    ``write_truth``, ``measurements``), ClockParameters, Event
Power-law noise (SI units; phase in seconds)
    powerlaw_phase, white_pm_phase, flicker_pm_phase, white_fm_phase, flicker_fm_phase,
    random_walk_fm_phase, random_run_fm_phase, fractional_noise, kasdin_walter_filter,
    component_rng, NOISE_NAMES

The scenario keys are documented in docs/simulator.md and configs/demo_scenario.toml.
"""

from .anomalies import EVENT_UNITS, Event, growth_factor
from .powerlaw import (NOISE_NAMES, component_rng, flicker_fm_phase, flicker_pm_phase,
                       fractional_noise, kasdin_walter_filter, powerlaw_phase,
                       random_run_fm_phase, random_walk_fm_phase, white_fm_phase,
                       white_pm_phase)
from .scenario import ANOMALY_KINDS, ClockSpec, Scenario, lab_scenario
from .simulation import ClockParameters, Simulation, simulate

__all__ = ["ANOMALY_KINDS", "ClockParameters", "ClockSpec", "EVENT_UNITS", "Event",
           "NOISE_NAMES", "Scenario", "Simulation", "component_rng", "flicker_fm_phase",
           "flicker_pm_phase", "fractional_noise", "growth_factor", "kasdin_walter_filter",
           "lab_scenario", "powerlaw_phase", "random_run_fm_phase", "random_walk_fm_phase",
           "simulate", "white_fm_phase", "white_pm_phase"]
