"""Shared pieces of the engine benchmark: scenarios, engine runs epoch by epoch, deviations.

Used by ``bench_engine.py`` and ``engine_speed.py``; nothing here prints.  SI units throughout
(phase [s], frequency [1], time [s]).
"""

from __future__ import annotations

import math
import os
import pathlib
import sys
from dataclasses import dataclass, field

ROOT = pathlib.Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from ensemble.config import load_config  # noqa: E402
from ensemble.engine.timescale import TimeScaleEngine  # noqa: E402
from ensemble.simulate import Scenario, simulate  # noqa: E402

SCENARIOS = ROOT / "configs" / "scenarios"
#: The anomaly scenario with steps sized to the targets, derived from mixed_lab_anomalies.toml.
SIZED = "mixed_lab_anomalies_sized"
#: Environment variables that set the thread count of the BLAS libraries numpy may use.
THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def blas_threads() -> str:
    """The BLAS thread setting in effect ("default" when none is set)."""
    return os.environ.get("OPENBLAS_NUM_THREADS", "default")


def load_scenario(name: str, duration_days: float | None = None) -> Scenario:
    """A benchmark scenario by file stem, optionally shortened (events beyond the end dropped).

    Parameters
    ----------
    name : str
        File stem under configs/scenarios (``"mixed_lab_clean"``), or :data:`SIZED`, the anomaly
        scenario with its steps resized (:func:`anomaly_checks.sized_anomaly_scenario`).
    duration_days : float, optional
        New span [d]; anomalies and reference changes after it are left out.
    """
    if name == SIZED:
        import anomaly_checks
        scenario = anomaly_checks.sized_anomaly_scenario(load_scenario("mixed_lab_anomalies"))
    else:
        scenario = Scenario.from_toml(SCENARIOS / f"{name}.toml")
    if duration_days is None:
        return scenario
    table = scenario.to_dict()
    table["simulation"]["duration_days"] = float(duration_days)
    for key in ("anomalies", "reference_changes"):
        if key in table:
            table[key] = [e for e in table[key] if e.get("day", 0.0) < duration_days]
    return Scenario.from_dict(table, path=f"{name} ({duration_days:g} d)")


def scale_error_s(true_phase_s: np.ndarray, offset_s: np.ndarray,
                  reference: np.ndarray) -> np.ndarray:
    """True error of a scale, TA - ideal time [s], shape (T,).

    TA - ideal = (clock_R - ideal) - (clock_R - TA) at each epoch's reference R (its offset
    carries no measurement noise of its own in the simulation).
    """
    rows = np.arange(true_phase_s.shape[0])
    ref = np.asarray(reference, dtype=int)
    return true_phase_s[rows, ref] - offset_s[rows, ref]


def octave_factors(n_points: int, tau0_s: float, max_fraction: float = 0.1) -> np.ndarray:
    """Octave averaging factors 1, 2, 4, ... with m tau0 at most ``max_fraction`` of the span."""
    span = (n_points - 1) * tau0_s
    m = [1]
    while 2 * m[-1] * tau0_s <= max_fraction * span:
        m.append(2 * m[-1])
    return np.array(m, dtype=int)


def ohdev_values(phase_s: np.ndarray, tau0_s: float, m: np.ndarray) -> np.ndarray:
    """Overlapping Hadamard deviations of one phase series (or of each column) [1]."""
    from ensemble.stability.deviations import overlapping_avar_hvar

    ov = overlapping_avar_hvar(phase_s, tau0_s, [int(v) for v in m])
    return np.sqrt(np.asarray(ov.hvar))


def ohdev_relative_uncertainty(n_points: int, m: np.ndarray) -> np.ndarray:
    """1-sigma relative uncertainty of an OHDEV estimate, sqrt(1 / (2 edf)), for white FM.

    EDF from ensemble.stability.edf.edf_greenhall (third differences, overlapping); white FM
    (alpha = 0) is the dominant noise of the scale at short and intermediate averaging times.
    """
    from ensemble.stability.edf import edf_greenhall

    out = np.full(len(m), np.nan)
    for k, mk in enumerate(m):
        n_terms = n_points - 3 * int(mk)
        if n_terms >= 2:
            edf = edf_greenhall(0, int(mk), int(n_terms), order=3, overlapping=True)
            out[k] = math.sqrt(1.0 / (2.0 * edf))
    return out


def build_engine(meas, cfg=None) -> TimeScaleEngine:
    """Start-up estimation and a fresh engine, exactly as ``form_time_scale`` starts them."""
    from ensemble.pipeline import _start_engine

    engine, _ = _start_engine(meas, cfg if cfg is not None else load_config(None))
    return engine


@dataclass
class StepRun:
    """An engine run epoch by epoch (arrays (T, N), SI units)."""

    offset_s: np.ndarray
    engine: TimeScaleEngine
    slow_stat: np.ndarray            # (T, N) largest slow-test GLR statistic after each epoch
    q_si: np.ndarray                 # (T, N, 3) the engine's q1 [s], q2 [1/s], q3 [1/s^3]
    checks: list = field(default_factory=list)   # callback results


def run_steps(meas, cfg=None, every: int = 0, check=None, record_slow: bool = False,
              record_noise: bool = False) -> StepRun:
    """Run TimeScaleEngine.step over all epochs, as the pipeline does (one BLAS thread).

    Parameters
    ----------
    meas : Measurements
    cfg : Config, optional
    every : int
        Call ``check(k, engine, out)`` every ``every`` epochs (0: never) and at the last epoch.
    check : callable, optional
    record_slow : bool
        Keep each clock's largest slow-test statistic d^2 / C after every epoch.
    record_noise : bool
        Keep the engine's noise levels of every clock after every epoch (they are re-estimated
        during the run).
    """
    from threadpoolctl import threadpool_limits

    engine = build_engine(meas, cfg)
    with threadpool_limits(limits=1, user_api="blas"):     # as the pipeline's epoch loop
        return _steps(engine, meas, every, check, record_slow, record_noise)


def _steps(engine, meas, every, check, record_slow, record_noise) -> StepRun:
    t_n, n = meas.n_epochs, meas.n_clocks
    offset = np.empty((t_n, n))
    slow = np.zeros((t_n, n)) if record_slow else np.zeros((0, n))
    q_si = np.zeros((t_n, n, 3)) if record_noise else np.zeros((0, n, 3))
    checks = []
    for k in range(t_n):
        out = engine.step(float(meas.elapsed_s[k]), float(meas.mjd[k]), meas.phase_s[k],
                          int(meas.reference[k]))
        offset[k] = out["offset"]
        if record_slow:
            c = engine.slow.C
            with np.errstate(divide="ignore", invalid="ignore"):
                stat = np.where(c > 0, engine.slow.d ** 2 / c, 0.0)
            slow[k] = stat.reshape(n, -1).max(axis=1)
        if record_noise:
            q_si[k] = engine.q_si
        if check is not None and every and (k % every == 0 or k == t_n - 1):
            checks.append(check(k, engine, out))
    return StepRun(offset, engine, slow, q_si, checks)


def simulate_cached(cache: dict, name: str, duration_days: float | None = None):
    """Simulate a scenario once per (name, duration) and keep it in ``cache``."""
    key = ("sim", name, duration_days)
    if key not in cache:
        cache[key] = simulate(load_scenario(name, duration_days))
    return cache[key]
