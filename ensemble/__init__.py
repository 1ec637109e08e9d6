"""ensemble: clock ensemble time scales for timing laboratories.

Forms an ensemble ("paper") time scale from clock comparison measurements with a Kalman filter
and stability-based weights, detects anomalies, computes steering corrections for a physical
output, assesses each clock, and keeps everything in one self-describing HDF5 archive.

Public names by task (SI units throughout: seconds, dimensionless fractional frequency, drift
per second; the archive stores drift per day, as its ``units`` attributes say):

Run the whole job
    run(input, output=None, config=None, ...) -> RunResult  (pandas frames via .frame(name))
    append(input, archive, config=None, ...) -> RunResult   (continue an archive)
Measurements
    read_measurements(path, reference=None) -> Measurements
Archive
    open_archive(path) -> Archive  (DataFrames of offset, frequency, drift, weight, state;
    events, steering, provenance; units; saved engine state)
Configuration
    load_config(path) -> Config, default_config()
Stability statistics
    deviation(statistic, values, tau0_s, m), stability_table(values, tau0_s, statistic, ...)
Clock assessment
    assess_archive(path, settings=None, what_if=False, ...) -> Assessment  (a record per clock:
    verdict, reasons and the evidence; docs/assessment.md)
Clock model and simulation
    ClockNoise, transition_matrix, process_noise, PRESETS, simulate_scenario, Scenario,
    lab_scenario  (the subpackage ensemble.simulate holds the simulator itself)

Names load on first use, so ``import ensemble`` stays fast.
"""

__version__ = "0.1.0"

_LAZY = {
    "run": ("ensemble.api", "run"),
    "append": ("ensemble.api", "append"),
    "RunResult": ("ensemble.pipeline", "RunResult"),
    "read_measurements": ("ensemble.io.csvread", "read_measurements"),
    "Measurements": ("ensemble.io.measurements", "Measurements"),
    "open_archive": ("ensemble.archive", "open_archive"),
    "load_config": ("ensemble.config", "load_config"),
    "default_config": ("ensemble.config", "default_config"),
    "deviation": ("ensemble.stability", "deviation"),
    "stability_table": ("ensemble.stability", "stability_table"),
    "assess_archive": ("ensemble.assess.core", "assess_archive"),
    "ClockNoise": ("ensemble.model", "ClockNoise"),
    "transition_matrix": ("ensemble.model", "transition_matrix"),
    "process_noise": ("ensemble.model", "process_noise"),
    "PRESETS": ("ensemble.model.presets", "PRESETS"),
    "simulate_scenario": ("ensemble.simulate", "simulate"),
    "Scenario": ("ensemble.simulate", "Scenario"),
    "lab_scenario": ("ensemble.simulate", "lab_scenario"),
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name):
    """Load a public name on first use (PEP 562)."""
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        value = getattr(importlib.import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ensemble' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
