"""Cost of steering per epoch: microseconds per SteeringController.step call.

Target: steering must add < 10 % to a 100-clock year of `ensemble run`.  The engine's own cost
per epoch is represented here by a proxy measured in the same run: one dense covariance
prediction P <- Phi P Phi^T + Q of a 100-clock, 3-state filter (300 x 300), which is a lower
bound of what a 100-clock Kalman epoch costs (the measurement update and the weights come on
top; filterpy took 0.7-1.7 ms per epoch for 50 clocks on a small two-core machine, style.md 9,
which scales to several ms for 100).  Prints medians over repeats and the ratio.

    python benchmarks/bench_steering.py
"""

from __future__ import annotations

import pathlib
import statistics
import sys
import time

import numpy as np

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

from ensemble.model import ClockNoise  # noqa: E402
from ensemble.steering import (ExternalSeries, SteeringController,  # noqa: E402
                               SteeringSettings, simulate_closed_loop)
from ensemble.steering.closedloop import MasterTruth, SimulationSettings, SimulationSetup  # noqa: E402

N_EPOCHS = 8760          # one year of hourly epochs
REPEATS = 7


def _inputs(rng):
    x = 2e-9 + np.cumsum(rng.normal(0.0, 2e-11, N_EPOCHS))
    y = 3e-15 + rng.normal(0.0, 1e-16, N_EPOCHS)
    d = np.full(N_EPOCHS, 1e-21)
    states = np.column_stack([x, y, d])
    cov = np.diag([1e-21, 1e-32, 1e-44])
    return states, cov


def _time_controller(settings, states, cov, external=None):
    noise = ClockNoise(q1_s=4e-28, q2_per_s=1e-37)
    # Build every controller first: the LQG gain calls LAPACK, whose worker threads keep
    # spinning for a moment afterwards and would be timed with the first steps otherwise.
    controllers = [SteeringController(settings, noise=noise, external=external)
                   for _ in range(REPEATS + 1)]
    time.sleep(0.5)
    times = []
    for repeat, ctl in enumerate(controllers):   # the first run warms up and is not counted
        step = ctl.step
        t0 = time.perf_counter()
        for k in range(N_EPOCHS):
            step(61000.0 + k / 24.0, 3600.0, states[k], cov)
        if repeat:
            times.append((time.perf_counter() - t0) / N_EPOCHS)
    return statistics.median(times)


def _time_engine_proxy(rng, n_clocks=100):
    n = 3 * n_clocks
    phi = np.eye(n) + np.diag(rng.normal(0, 1e-3, n - 1), 1)
    a = rng.normal(size=(n, n))
    p = a @ a.T / n
    q = np.eye(n) * 1e-6
    times = []
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        for _ in range(50):
            p = phi @ p @ phi.T + q
            p = 0.5 * (p + p.T)
        times.append((time.perf_counter() - t0) / 50)
    return statistics.median(times)


def main() -> None:
    rng = np.random.default_rng(1)
    states, cov = _inputs(rng)
    ext = ExternalSeries.from_arrays(61000.0 + 5.0 * np.arange(80), rng.normal(1e-8, 1e-9, 80),
                                     np.full(80, 1e-9))
    cases = {
        "critical, virtual (default)": (SteeringSettings(), None),
        "lqg, virtual": (SteeringSettings(policy="lqg"), None),
        "critical, measured output": (SteeringSettings(output="measured", output_channel="OUT"),
                                      None),
        "critical, external target": (SteeringSettings(target="external",
                                                       external_file="<given>"), ext),
    }
    per_call = {name: _time_controller(settings, states, cov, external)
                for name, (settings, external) in cases.items()}
    proxy = _time_engine_proxy(rng)
    print(f"steering cost per epoch (median of {REPEATS} runs of {N_EPOCHS} hourly epochs)")
    print(f"engine proxy, 100 clocks (300 x 300 covariance prediction): {proxy * 1e6:9.1f} us/epoch")
    for name, t in per_call.items():
        print(f"  {name:32s} {t * 1e6:7.2f} us/call   year: {t * N_EPOCHS:6.3f} s"
              f"   ratio to engine proxy: {100 * t / proxy:5.2f} %")
    setup = SimulationSetup(SimulationSettings(days=365.0), MasterTruth(), None, SteeringSettings())
    t0 = time.perf_counter()
    simulate_closed_loop(setup)
    print(f"closed-loop simulation, 365 days hourly (estimator + controller): "
          f"{time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
