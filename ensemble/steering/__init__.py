"""Steering a physical output onto the time scale, or onto an external reference.

The engine calls :meth:`SteeringController.step` once per epoch with the estimate of the
steered clock relative to the scale; the records go to the archive's ``/steering`` table
(:func:`records_to_columns`).  Everything is advice: see :data:`CAUTIONS`.

Per-epoch control
    SteeringSettings, SteeringController, SteeringRecord, apply_limits, in_dead_band
Gains (pure functions, SI)
    critical_gains, lqg_gains, lqg_riccati, drift_feedforward, closed_loop_matrix,
    closed_loop_poles
External reference
    ExternalSeries, read_external, ExternalFlywheel
Closed loop and projection
    load_simulation, simulate_closed_loop, project_phase_error, plot_simulation (in .plot)
Archive table and operator output
    STEERING_COLUMNS, COLUMN_CODES, records_to_columns, write_steering_group,
    read_steering_table, write_commands_csv, summarize, CAUTIONS, cautions_text
Settings
    load_steering_settings, steering_settings_from_table
"""

from .closedloop import load_simulation, project_phase_error, simulate_closed_loop
from .controller import SteeringController, SteeringRecord, apply_limits, in_dead_band
from .external import ExternalFlywheel, ExternalSeries, read_external
from .gains import (closed_loop_matrix, closed_loop_poles, critical_gains, drift_feedforward,
                    lqg_gains, lqg_riccati)
from .output import (CAUTIONS, COLUMN_CODES, STEERING_COLUMNS, cautions_text, read_steering_table,
                     records_to_columns, summarize, write_commands_csv, write_steering_group)
from .settings import SteeringSettings, load_steering_settings, steering_settings_from_table

__all__ = [
    "CAUTIONS", "COLUMN_CODES", "ExternalFlywheel", "ExternalSeries", "STEERING_COLUMNS",
    "SteeringController", "SteeringRecord", "SteeringSettings", "apply_limits", "cautions_text",
    "closed_loop_matrix", "closed_loop_poles", "critical_gains", "drift_feedforward",
    "in_dead_band", "load_simulation", "load_steering_settings", "lqg_gains", "lqg_riccati",
    "project_phase_error", "read_external", "read_steering_table", "records_to_columns",
    "simulate_closed_loop", "steering_settings_from_table", "summarize", "write_commands_csv",
    "write_steering_group",
]
