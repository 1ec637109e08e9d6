"""PNG plot of a closed-loop simulation: phase error, commanded changes and total correction."""

from __future__ import annotations

import numpy as np

from ..atomic import atomic_output
from .closedloop import SimulationResult


def plot_simulation(result: SimulationResult, path: str, *, title: str | None = None) -> None:
    """Write a three-panel PNG (atomic) of a simulation.

    Top: true and estimated phase error (output - target) [ns] with +-2 measurement-noise lines;
    middle: the change applied at each command epoch [1e-15], clipped ones marked, with the step
    limit; bottom: the total correction [1e-15] with its limit.

    Parameters
    ----------
    result : SimulationResult
    path : str
        PNG file to write.
    title : str, optional
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    s = result.setup.steering
    days = result.elapsed_d
    rec = result.records
    cmd = np.array([r.command_epoch for r in rec])
    clipped = np.array([r.clipped != 0 for r in rec])
    unit = 1e-15

    fig, axes = plt.subplots(3, 1, figsize=(8.0, 7.2), sharex=True,
                             gridspec_kw={"height_ratios": [2.2, 1.2, 1.0]})
    ax = axes[0]
    ax.plot(days, result.true_phase_error_s * 1e9, color="#1f4e79", lw=1.0,
            label="true phase error")
    ax.plot(days, result.estimated_phase_error_s * 1e9, color="#d08c2c", lw=0.8, alpha=0.85,
            label="estimated by the filter")
    band = 2.0 * result.measurement_noise_s * 1e9
    for sign in (-1, 1):
        ax.axhline(sign * band, color="0.55", lw=0.7, ls="--",
                   label=f"+-2 x measurement noise ({band:.3g} ns)" if sign > 0 else None)
    ax.axhline(0.0, color="0.3", lw=0.6)
    ax.set_ylabel("output - target [ns]")
    ax.legend(loc="upper right", fontsize=8, frameon=False)

    ax = axes[1]
    ok = cmd & ~clipped
    ax.vlines(days[ok], 0.0, result.frequency_correction[ok] / unit, color="#3a7d44", lw=1.4)
    if clipped.any():
        ax.vlines(days[clipped], 0.0, result.frequency_correction[clipped] / unit,
                  color="#b22222", lw=1.6, label="clipped")
        ax.legend(loc="upper right", fontsize=8, frameon=False)
    for sign in (-1, 1):
        ax.axhline(sign * s.max_step / unit, color="#b22222", lw=0.7, ls=":")
    ax.axhline(0.0, color="0.3", lw=0.6)
    ax.set_ylabel("change [1e-15]")

    ax = axes[2]
    ax.step(days, result.total_correction / unit, where="post", color="#5b3a7d", lw=1.0)
    ax.axhline(0.0, color="0.3", lw=0.6)
    ax.set_ylabel("total [1e-15]")
    ax.set_xlabel("days since the first epoch")

    policy = (f"critically damped, T = {s.time_constant_d:g} d" if s.policy == "critical"
              else f"LQG, rho = {s.effort_weight_d2:g} d^2, w_y = {s.frequency_weight_d2:g} d^2")
    fig.suptitle(title or f"Closed-loop steering: {policy}, interval {s.interval_d:g} d",
                 fontsize=10)
    fig.tight_layout()
    with atomic_output(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)
    plt.close(fig)
