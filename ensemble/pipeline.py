"""Orchestration of a run: measurements -> start-up -> ensemble epoch by epoch -> steering ->
archive.  No formulas live here; each step calls the module that owns it.
"""

from __future__ import annotations

import dataclasses
import math
import os
import pathlib
from dataclasses import dataclass, field

import numpy as np

from .config import Config, load_config
from .engine.startup import StartupReport, build_setups
from .engine.timescale import STATE_NAMES, TimeScaleEngine
from .errors import ConfigError
from .io.measurements import Measurements

#: Epochs per block handed to the archive writer (bounds memory for long runs).
BLOCK_EPOCHS = 1024


@dataclass
class RunResult:
    """Everything a run produced (SI units; arrays (n_epochs, n_clocks) in ``clocks`` order).

    Attributes
    ----------
    clocks : tuple of str
    mjd : ndarray (T,)
        Epochs, MJD UTC. [d]
    offset_s, frequency, drift_per_s, weight, state : ndarray (T, N) or None
        Clock - scale [s]; frequency [1] and drift [1/s] relative to the scale; weights [1];
        standing codes (``STATE_NAMES``).  None when the run kept no arrays in memory.
    zscore : ndarray (T, N) or None
        Standardised prediction residual of each clock (relative to the other clean clocks).
    scale_sigma_s : ndarray (T,) or None
        Estimated standard deviation of each step of the scale. [s]
    events : list of Event
    steering : dict of column arrays (see ensemble.steering.output.STEERING_COLUMNS)
    startup : StartupReport
    archive : str or None
        Archive written, if any.
    """

    clocks: tuple
    mjd: np.ndarray
    offset_s: np.ndarray | None
    frequency: np.ndarray | None
    drift_per_s: np.ndarray | None
    weight: np.ndarray | None
    state: np.ndarray | None
    zscore: np.ndarray | None
    scale_sigma_s: np.ndarray | None
    events: list
    steering: dict
    startup: StartupReport
    archive: str | None = None
    final_weight: np.ndarray = field(default_factory=lambda: np.zeros(0))
    final_state: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int8))
    engine: TimeScaleEngine | None = None
    steering_clock: str | None = None
    steering_state: dict | None = None
    measurements: Measurements | None = None
    reformed: bool = False

    def frame(self, name: str):
        """One (T, N) array as a pandas DataFrame indexed by MJD with clock columns."""
        import pandas as pd

        data = getattr(self, name)
        if data is None:
            raise ValueError(f"{name} was not kept in memory (read it from the archive)")
        return pd.DataFrame(data, index=pd.Index(self.mjd, name="mjd"), columns=list(self.clocks))

    def events_frame(self):
        """The detected events as a DataFrame (magnitude in SI units)."""
        import pandas as pd

        return pd.DataFrame([dataclasses.asdict(e) for e in self.events],
                            columns=["mjd", "clock", "kind", "magnitude", "score",
                                     "detected_mjd", "uncertainty"])

    def steering_frame(self):
        """The steering table as a DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.steering)


def _prepare_roles(meas: Measurements, cfg: Config, known=()) -> dict:
    """Per-clock settings, with the measured steered output forced to the monitor role.

    ``known``: further clock names that exist (an archive's, when it is continued).
    """
    clocks = {name: cfg.clock(name) for name in (*meas.clocks, *known)}
    for name in cfg.clocks:
        if name not in clocks:
            raise ConfigError(f"clock '{name}' does not appear in the measurements "
                              f"(known: {', '.join(meas.clocks)})", key=f"clocks.{name}",
                              path=cfg.source or None)
    st = cfg.sections.get("steering")
    if st is not None and st.output == "measured":
        if st.output_channel not in clocks:
            raise ConfigError(f"output channel '{st.output_channel}' is not in the measurements",
                              key="steering.output_channel", value=st.output_channel,
                              path=cfg.source or None)
        clocks[st.output_channel] = dataclasses.replace(clocks[st.output_channel], role="monitor")
    if st is not None and st.master_clock and st.master_clock not in clocks:
        raise ConfigError(f"master clock '{st.master_clock}' is not in the measurements",
                          key="steering.master_clock", value=st.master_clock,
                          path=cfg.source or None)
    return clocks


class _OutputTracker:
    """Phase and frequency of a measured steered output relative to the scale.

    The output is a monitor channel (never in the ensemble): a two-state Kalman filter follows
    its offset from the scale, with the commanded frequency changes as known inputs
    (x_{k+1} = x_k + (y_k + u) dt, y_{k+1} = y_k + u), the channel's noise levels as process
    noise and its white PM as measurement noise.
    """

    def __init__(self, noise, x=None, p=None, u: float = 0.0):
        self.noise = noise
        self.x = None if x is None else np.array(x, dtype=float)
        self.p = None if p is None else np.array(p, dtype=float)
        self.u = float(u)

    def step(self, dt: float, offset: float):
        from .model.clockmodel import process_noise, transition_matrix

        if self.x is None:
            if not np.isfinite(offset):
                return (math.nan, math.nan), None
            self.x = np.array([offset, 0.0])
            self.p = np.diag([self.noise.r_s2, 1e-22])
            return tuple(self.x), self.p.copy()
        if dt > 0:
            phi = transition_matrix(dt, 2)
            self.x = phi @ self.x + np.array([dt, 1.0]) * self.u
            self.p = phi @ self.p @ phi.T + process_noise(self.noise, dt, 2)
        if np.isfinite(offset):
            s = self.p[0, 0] + self.noise.r_s2
            k = self.p[:, 0] / s
            self.x = self.x + k * (offset - self.x[0])
            i_kh = np.eye(2) - np.outer(k, [1.0, 0.0])
            self.p = i_kh @ self.p @ i_kh.T + np.outer(k, k) * self.noise.r_s2
        return tuple(self.x), self.p.copy()

    def state_dict(self) -> dict:
        return {"x": None if self.x is None else self.x.tolist(),
                "p": None if self.p is None else self.p.tolist(), "u": self.u}


class _Steering:
    """The steering controller fed from the engine's estimates each epoch."""

    def __init__(self, settings, clock: str, index: int, engine: TimeScaleEngine,
                 controller=None, last_t: float | None = None, tracker: dict | None = None):
        from .steering import SteeringController

        self.settings = settings
        self.clock = clock
        self.index = index
        self.engine = engine
        self.controller = controller if controller is not None else SteeringController(
            settings, noise=engine.noise[index])
        self.records = []
        self.last_t = last_t
        self.tracker = None
        if settings.output == "measured":
            t = tracker or {}
            self.tracker = _OutputTracker(engine.noise[index], t.get("x"), t.get("p"),
                                          t.get("u", 0.0))

    @classmethod
    def start(cls, cfg: Config, meas: Measurements, engine: TimeScaleEngine) -> "_Steering":
        first_ref = meas.clocks[int(meas.reference[0])]
        name = cfg.steering.steered_clock(first_ref)
        return cls(cfg.steering, name, meas.clocks.index(name), engine)

    @classmethod
    def resume(cls, cfg: Config, state: dict, engine: TimeScaleEngine) -> "_Steering":
        from .steering import SteeringController

        name = state["clock"]
        index = engine.clocks.index(name)
        controller = SteeringController.from_state(state["controller"], settings=cfg.steering,
                                                   noise=engine.noise[index])
        return cls(cfg.steering, name, index, engine, controller, float(state["last_t"]),
                   state.get("tracker"))

    def state_dict(self) -> dict:
        state = {"clock": self.clock, "last_t": self.last_t,
                 "controller": self.controller.state_dict()}
        if self.tracker is not None:
            state["tracker"] = self.tracker.state_dict()
        return state

    def step(self, t_s: float, mjd: float, out: dict) -> None:
        i = self.index
        dt = 0.0 if self.last_t is None else t_s - self.last_t
        self.last_t = t_s
        if self.tracker is not None:
            state, cov = self.tracker.step(dt, out["offset"][i])
        else:
            state = (out["offset"][i], out["frequency"][i], out["drift"][i])
            cov = self.engine.filter.cov_si(i) if self.engine.filter.active[i] else None
        record = self.controller.step(mjd, dt, state, cov, noise=self.engine.noise[i])
        if self.tracker is not None:
            self.tracker.u = record.frequency_correction
        self.records.append(record)

    def take(self):
        from .steering.output import records_to_columns

        records, self.records = self.records, []
        return records_to_columns(records) if records else None


def _start_engine(meas: Measurements, cfg: Config):
    """Start-up estimation and a fresh engine for ``meas``."""
    clocks_cfg = _prepare_roles(meas, cfg)
    setups, report = build_setups(meas.phase_s, meas.elapsed_s, meas.reference, meas.tau0_s,
                                  meas.clocks, clocks_cfg, cfg.ensemble)
    engine = TimeScaleEngine(meas.clocks, meas.tau0_s, setups, cfg.ensemble, cfg.detection)
    return engine, report


def form_time_scale(meas: Measurements, cfg: Config | None = None, *, sink=None,
                    keep: bool = True, progress: bool = False, steer: bool = True) -> RunResult:
    """Run the ensemble over all epochs of ``meas``.

    Parameters
    ----------
    meas : Measurements
    cfg : Config, optional
        Defaults when omitted.
    sink : callable, optional
        Called with (block dict, steering columns or None) every :data:`BLOCK_EPOCHS` epochs
        and at the end; block keys as :meth:`ensemble.archive.ArchiveWriter.append_epochs`
        expects them.
    keep : bool
        Keep every epoch's arrays in memory for the result (False: only blocks to ``sink``).
    progress : bool
        Show a progress bar (only when stderr is a terminal).
    steer : bool
        Compute the steering advice (the archive's /steering table needs it).

    Returns
    -------
    RunResult
    """
    cfg = cfg if cfg is not None else load_config(None)
    engine, report = _start_engine(meas, cfg)
    steering = _Steering.start(cfg, meas, engine) if steer and "steering" in cfg.sections \
        else None
    return _run_epochs(engine, steering, meas, 0.0, report, sink=sink, keep=keep,
                       progress=progress)


def _run_epochs(engine: TimeScaleEngine, steering, meas: Measurements, t_offset_s: float,
                report, *, sink=None, keep: bool = True, progress: bool = False,
                columns: np.ndarray | None = None) -> RunResult:
    """Feed every epoch of ``meas`` to the engine (and the steering), blocks to ``sink``.

    ``columns`` maps the measurement columns to the engine's (for a continued archive whose
    column order differs); the engine's time is ``t_offset_s + meas.elapsed_s``.
    """
    from threadpoolctl import threadpool_limits

    # The filter's matrices are small (3N x 3N): one BLAS thread is as fast on a quiet machine
    # and far faster on a busy one (measured: benchmarks/bench_engine.py).
    with threadpool_limits(limits=1, user_api="blas"):
        return _run_epochs_inner(engine, steering, meas, t_offset_s, report, sink=sink,
                                 keep=keep, progress=progress, columns=columns)


def _run_epochs_inner(engine, steering, meas, t_offset_s, report, *, sink, keep, progress,
                      columns) -> RunResult:
    t_n, n = meas.n_epochs, engine.n
    keys = ("offset", "frequency", "drift", "weight", "state", "zscore")
    kept = {k: np.empty((t_n, n), dtype=np.int8 if k == "state" else float) for k in keys} \
        if keep else None
    sigma = np.empty(t_n) if keep else None
    block = _new_block(BLOCK_EPOCHS, n)
    b = 0
    steer_parts = []
    bar = _progress(t_n, progress)
    out = None
    z = np.full(n, np.nan)
    ref_map = np.arange(meas.n_clocks) if columns is None else columns
    for k in range(t_n):
        if columns is None:
            z = meas.phase_s[k]
        else:
            z[:] = np.nan
            z[columns] = meas.phase_s[k]
        t = t_offset_s + float(meas.elapsed_s[k])
        ref = int(ref_map[int(meas.reference[k])])
        out = engine.step(t, float(meas.mjd[k]), z, ref)
        if steering is not None:
            steering.step(t, float(meas.mjd[k]), out)
        if keep:
            for key in keys:
                kept[key][k] = out[key]
            sigma[k] = out["scale_sigma"]
        if sink is not None:
            _fill(block, b, float(meas.mjd[k]), z, ref, t, out)
            b += 1
            if b == BLOCK_EPOCHS:
                cols = steering.take() if steering else None
                steer_parts.append(cols)
                sink(block, cols)
                block = _new_block(BLOCK_EPOCHS, n)
                b = 0
        if bar is not None and k % 256 == 0:
            bar.update(min(256, t_n - k))
    if bar is not None:
        bar.close()
    if sink is not None and (b or steering is not None):
        cols = steering.take() if steering else None
        steer_parts.append(cols)
        sink({key: value[:b] for key, value in block.items()}, cols)
    elif steering is not None:
        steer_parts.append(steering.take())
    result = RunResult(engine.clocks, meas.mjd.copy(),
                       kept["offset"] if keep else None, kept["frequency"] if keep else None,
                       kept["drift"] if keep else None, kept["weight"] if keep else None,
                       kept["state"] if keep else None, kept["zscore"] if keep else None,
                       sigma, list(engine.events), _concat(steer_parts), report)
    if out is not None:
        result.final_weight = out["weight"].copy()
        result.final_state = out["state"].copy()
    result.engine = engine
    result.steering_clock = steering.clock if steering is not None else None
    result.steering_state = steering.state_dict() if steering is not None else None
    result.measurements = meas
    return result


def _concat(parts: list) -> dict:
    parts = [p for p in parts if p]
    if not parts:
        return {}
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


#: Block keys of the per-epoch datasets, and the engine output each comes from.
_BLOCK = {"offset_s": "offset", "frequency": "frequency", "drift_per_s": "drift",
          "weight": "weight", "state": "state", "filter/scale_step_sigma": "scale_sigma",
          "filter/residual_z": "zscore"}


def _extra_datasets():
    """The engine's own per-epoch figures and the measurements, beside the contract datasets.

    Keeping the measurements makes the archive self-contained: the scale can be re-formed from
    it alone (leave-one-out assessment, audits).
    """
    from .archive import EpochDataset

    return (EpochDataset("/measurements/phase", "f8", True, "s",
                         "measured time difference clock - reference, as read; NaN where "
                         "missing"),
            EpochDataset("/measurements/reference", "i4", False, "1",
                         "column (in /clocks/name) of each epoch's measurement reference", fill=-1),
            EpochDataset("/measurements/elapsed", "f8", False, "s",
                         "time since the first epoch of the archive on the continuous time axis "
                         "(leap seconds counted)"),
            EpochDataset("/filter/scale_step_sigma", "f8", False, "s",
                         "estimated standard deviation of the scale's prediction error over "
                         "the last sampling interval, from the clocks' noise levels and weights"),
            EpochDataset("/filter/residual_z", "f8", True, "1",
                         "each clock's prediction residual relative to the other clean clocks, "
                         "divided by its predicted standard deviation; NaN where not measured"))


def _new_block(size: int, n: int) -> dict:
    block = {"mjd": np.empty(size), "filter/scale_step_sigma": np.empty(size),
             "state": np.empty((size, n), dtype=np.int8),
             "measurements/reference": np.empty(size, dtype=np.int32),
             "measurements/elapsed": np.empty(size)}
    for key in ("offset_s", "frequency", "drift_per_s", "weight", "filter/residual_z",
                "measurements/phase"):
        block[key] = np.empty((size, n))
    return block


def _fill(block: dict, b: int, mjd: float, z: np.ndarray, ref: int, t: float,
          out: dict) -> None:
    block["mjd"][b] = mjd
    block["measurements/phase"][b] = z
    block["measurements/reference"][b] = ref
    block["measurements/elapsed"][b] = t
    for key, name in _BLOCK.items():
        block[key][b] = out[name]


def _progress(total: int, wanted: bool):
    import sys

    if not wanted or not sys.stderr.isatty():
        return None
    from tqdm import tqdm
    return tqdm(total=total, unit="epoch", leave=False, file=sys.stderr)


def summary_text(result: RunResult) -> str:
    """A short human summary of a run: clocks with weights and standings, events, scale noise."""
    lines = []
    t = result.mjd
    lines.append(f"epochs: {t.size} from MJD {t[0]:.4f} to {t[-1]:.4f}")
    if result.final_weight.size:
        lines.append("clock        standing     weight now  noise levels (q1 s, q2 1/s) source")
        for i, c in enumerate(result.clocks):
            nz = result.startup.noise[i]
            lines.append(f"  {c:<10} {STATE_NAMES[int(result.final_state[i])]:<12} "
                         f"{result.final_weight[i]:9.4f}   {nz.q1_s:.2e} {nz.q2_per_s:.2e}  "
                         f"{result.startup.source[i]}")
    lines.append(f"events: {len(result.events)}")
    for e in result.events[:20]:
        unit = {"outlier": "s", "phase_step": "s", "frequency_step": "", "drift_change": "/s"}
        lines.append(f"  MJD {e.mjd:.4f}  {e.clock:<10} {e.kind:<15} "
                     f"{e.magnitude:+.3e}{unit.get(e.kind, '')}  score {e.score:.1f}")
    if len(result.events) > 20:
        lines.append(f"  ... and {len(result.events) - 20} more (see /events)")
    if result.scale_sigma_s is not None and result.scale_sigma_s.size:
        lines.append(f"scale step uncertainty now: {result.scale_sigma_s[-1] * 1e12:.2f} ps "
                     f"per {_interval_text(result)}")
    return "\n".join(lines)


def _interval_text(result: RunResult) -> str:
    if result.mjd.size < 2:
        return "epoch"
    dt = float(np.median(np.diff(result.mjd))) * 86400.0
    return f"{dt:g} s"


def _event_fields():
    from .archive import TableField

    return (TableField("detected_mjd", "f8", "d", "epoch at which the anomaly was decided, MJD "
                                                   "UTC"),
            TableField("uncertainty", "f8", "s, 1 or 1/d as magnitude",
                       "standard uncertainty of magnitude, in its unit"))


def _steering_fields():
    from .archive import TableField
    from .steering.output import CONTRACT_COLUMNS, STEERING_COLUMNS

    return tuple(TableField(name, dtype, units, desc)
                 for name, (dtype, units, desc) in STEERING_COLUMNS.items()
                 if name not in CONTRACT_COLUMNS)


def _writer_options() -> dict:
    return {"extra_epoch_datasets": _extra_datasets(), "extra_event_fields": _event_fields(),
            "steering_fields": _steering_fields()}


def _state_for_archive(result: RunResult) -> dict:
    state = {"engine": result.engine.state_dict()}
    if result.steering_state is not None:
        state["steering"] = result.steering_state
    return state


def _finish(writer, result: RunResult, input_name: str) -> None:
    if result.events:
        writer.append_events([dataclasses.asdict(e) for e in result.events])
    writer.write_state(_state_for_archive(result))
    writer.add_run_record(input_name)


def _create(meas: Measurements, cfg: Config, output: pathlib.Path, *, overwrite: bool,
            input_name: str, previous_runs=None, progress: bool = False,
            keep: bool = False) -> RunResult:
    """Form the scale over ``meas`` and write a new archive (atomically)."""
    from .archive import ArchiveWriter

    _prepare_roles(meas, cfg)        # configuration errors before anything is written
    attrs = {"config_toml": cfg.to_toml(), "input_sha256": meas.sha256}
    writer = ArchiveWriter.create(output, meas.clocks, attrs, overwrite=overwrite,
                                  **_writer_options())
    with writer:
        def sink(block, steer_cols):
            writer.append_epochs(block)
            if steer_cols:
                writer.append_steering(steer_cols)

        result = form_time_scale(meas, cfg, sink=sink, keep=keep, progress=progress)
        writer.write_group("/startup", _startup_group(result.startup),
                           units=_STARTUP_UNITS, descriptions=_STARTUP_DESCRIPTIONS)
        if previous_runs is not None and len(previous_runs):
            writer.add_previous_runs(previous_runs)
        _finish(writer, result, input_name)
    result.archive = str(output)
    return result


def run_to_archive(input_path, output, *, config=None, reference: str | None = None,
                   overwrite: bool = False, progress: bool = False,
                   keep: bool = False) -> RunResult:
    """Read ``input_path``, form the scale and write the archive ``output`` atomically.

    Parameters
    ----------
    input_path : path-like
        Measurement CSV (long or wide form).
    output : path-like
        Archive to write.  Refused if it exists, unless ``overwrite``.
    config : Config, path-like or None
        Configuration (defaults when None).
    reference : str, optional
        Reference clock of a wide-form file (overrides [input].reference).
    overwrite : bool
        Replace an existing archive.
    progress : bool
        Progress bar on a terminal.
    keep : bool
        Also keep all arrays in memory in the result.

    Returns
    -------
    RunResult
    """
    from .errors import InputError
    from .io.csvread import read_measurements

    cfg = config if isinstance(config, Config) else load_config(config)
    meas = read_measurements(input_path, reference=reference or cfg.input.reference or None)
    output = pathlib.Path(output)
    if output.exists() and not overwrite:
        raise InputError("the archive exists; continue it with --append, or replace it with "
                         "--overwrite", path=str(output))
    return _create(meas, cfg, output, overwrite=overwrite,
                   input_name=os.path.basename(str(input_path)), progress=progress, keep=keep)


def append_to_archive(input_path, archive, *, config=None, reference: str | None = None,
                      progress: bool = False, keep: bool = False) -> RunResult:
    """Continue an archive with new measurements (``ensemble run NEW.csv --append ARCHIVE``).

    The saved engine and steering state are restored and the new epochs processed exactly as
    one run over all the data would have (bit-identical when every clock already appeared in
    the archive and the sampling interval is a whole number of seconds).  While the archive
    covers less than the start-up stretch (``[ensemble].startup_days``), the start-up estimation
    is not complete: the archive is then re-formed from its own measurements plus the new ones
    (its earlier runs stay in ``/provenance``).  The new epochs must come after the archive's
    last one on its sampling grid; the archive is replaced atomically.

    Parameters
    ----------
    input_path : path-like
        The new measurements (long or wide CSV; a single epoch is enough).
    archive : path-like
        The archive to continue.
    config : Config, path-like or None
        Configuration; default the archive's own (``config_toml``).
    reference, progress, keep
        As for :func:`run_to_archive`.
    """
    import tomllib

    from . import open_archive
    from .archive import ArchiveWriter
    from .config import parse_config
    from .errors import InputError
    from .io.csvread import read_measurements

    archive = pathlib.Path(archive)
    with open_archive(archive) as arc:
        state = arc.engine_state
        clocks = tuple(arc.clocks)
        last_mjd = float(arc.mjd[-1])
        stored_config = arc.attrs.get("config_toml", "")
        previous_runs = arc.provenance.to_dict("records")
        old_phase = arc.array("/measurements/phase") if "engine" in state else None
        old_ref = arc.array("/measurements/reference") if "engine" in state else None
        old_elapsed = arc.array("/measurements/elapsed") if "engine" in state else None
        old_mjd = np.asarray(arc.mjd, dtype=float)
    if "engine" not in state:
        raise InputError("the archive holds no saved engine state; it cannot be continued "
                         "(write a new archive with ensemble run)", path=str(archive))
    if isinstance(config, Config):
        cfg = config
    elif config is not None:
        cfg = load_config(config)
    else:
        cfg = parse_config(tomllib.loads(stored_config), f"{archive} (config_toml)")
    tau0_s = float(state["engine"]["tau0_s"])
    meas = read_measurements(input_path, reference=reference or cfg.input.reference or None,
                             continues=(last_mjd, tau0_s))
    t_last = float(state["engine"]["t"])
    input_name = os.path.basename(str(input_path))
    _prepare_roles(meas, cfg, clocks)  # configuration errors before anything is written
    if t_last < cfg.ensemble.startup_days * 86400.0:
        combined = _combine(clocks, old_mjd, old_phase, old_ref, old_elapsed, meas, tau0_s)
        result = _create(combined, cfg, archive, overwrite=True, input_name=input_name,
                         previous_runs=previous_runs, progress=progress, keep=keep)
        result.reformed = True
        return result
    engine = TimeScaleEngine.from_state(state["engine"], cfg.ensemble, cfg.detection)
    new_names = [c for c in meas.clocks if c not in engine.clocks]
    if new_names:
        clocks_cfg = _prepare_roles(meas, cfg)
        setups, _ = build_setups(meas.phase_s, meas.elapsed_s, meas.reference, meas.tau0_s,
                                 meas.clocks, clocks_cfg, cfg.ensemble)
        engine.add_clocks({c: setups[meas.clocks.index(c)] for c in new_names})
    columns = np.array([engine.clocks.index(c) for c in meas.clocks])
    steering = None
    if "steering" in state and "steering" in cfg.sections:
        steering = _Steering.resume(cfg, state["steering"], engine)
    attrs = {"config_toml": cfg.to_toml(), "input_sha256": meas.sha256}
    writer = ArchiveWriter.open_for_append(archive, attrs,
                                           extra_epoch_datasets=_extra_datasets())
    with writer:
        if new_names:
            writer.add_clocks(new_names)

        def sink(block, steer_cols):
            writer.append_epochs(block)
            if steer_cols:
                writer.append_steering(steer_cols)

        result = _run_epochs(engine, steering, meas, t_last, None, sink=sink, keep=keep,
                             progress=progress, columns=columns)
        _finish(writer, result, input_name)
    result.archive = str(archive)
    result.reformed = False
    return result


def _combine(clocks, mjd, phase, ref, elapsed, new: Measurements, tau0_s: float) -> Measurements:
    """The archive's measurements followed by the new ones, clock columns in name order."""
    names = tuple(sorted(set(clocks) | set(new.clocks)))
    n_old, n_new = mjd.size, new.n_epochs
    out = np.full((n_old + n_new, len(names)), np.nan)
    out[:n_old, [names.index(c) for c in clocks]] = phase
    out[n_old:, [names.index(c) for c in new.clocks]] = new.phase_s
    refs = np.concatenate([[names.index(clocks[int(r)]) for r in ref],
                           [names.index(new.clocks[int(r)]) for r in new.reference]])
    times = np.concatenate([elapsed, elapsed[-1] + new.elapsed_s])
    return Measurements(names, np.concatenate([mjd, new.mjd]), times, out,
                        refs.astype(np.int64), tau0_s, new.source, new.sha256)


_STARTUP_UNITS = {"q1": "s", "q2": "1/s", "q3": "1/s^3", "r": "s^2", "source": "none"}
_STARTUP_DESCRIPTIONS = {
    "q1": "white FM level of each clock's model at the start (sigma_y^2(tau) = q1/tau)",
    "q2": "random-walk FM level of each clock's model at the start",
    "q3": "random-run FM level of each clock's model at the start",
    "r": "white PM variance of each clock's measurement channel",
    "source": "where each clock's levels came from: config, estimated, type, default, monitor"}


def _startup_group(report: StartupReport) -> dict:
    return {"q1": np.array([n.q1_s for n in report.noise]),
            "q2": np.array([n.q2_per_s for n in report.noise]),
            "q3": np.array([n.q3_per_s3 for n in report.noise]),
            "r": np.array([n.r_s2 for n in report.noise]),
            "source": list(report.source)}
