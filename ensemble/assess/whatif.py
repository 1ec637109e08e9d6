"""Internal: the scale re-formed without each clock in turn (leave-one-out), in parallel.

For each candidate clock the configuration is copied with that clock's role set to "monitor"
(measured against the scale, never weighted) and the whole ensemble is re-formed from the
archive's measurements with :func:`ensemble.pipeline.form_time_scale` (no steering).  The full
scale is re-formed the same way, so that every comparison is between two scales formed by the
same code from the same data.  Each run is reduced in its worker to the effective weights of
the clocks in that scale (:func:`ensemble.assess.scalestab.effective_weights`), which with the
clocks' own variances give the scale's estimated stability.

The runs go to a :class:`concurrent.futures.ProcessPoolExecutor` on the local cores, with a
progress bar on stderr when it is a terminal.
"""

from __future__ import annotations

import dataclasses
import os
import sys
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass

import numpy as np

from ..config import Config
from ..io.measurements import Measurements
from ..stability.grid import on_grid
from .history import clean_offsets
from .scalestab import EffectiveWeights, effective_weights


@dataclass(frozen=True, eq=False)
class ReformedScale:
    """One re-formed scale.

    Attributes
    ----------
    without : str or None
        The clock left out (None: the full scale re-formed).
    allan, hadamard : EffectiveWeights or None
        Effective weights at the judged averaging factors.
    mean_weight : ndarray, shape (N,)
        Mean /scale/weight of each clock in this run. [1]
    error : str
        Why the run failed ('' on success).
    """

    without: str | None
    allan: EffectiveWeights | None
    hadamard: EffectiveWeights | None
    mean_weight: np.ndarray
    error: str = ""


_WORKER: dict = {}


def _init(meas: Measurements, cfg: Config, m: np.ndarray) -> None:
    _WORKER.update(meas=meas, cfg=cfg, m=m)


def _without(cfg: Config, name: str | None) -> Config:
    if name is None:
        return cfg
    clocks = dict(cfg.clocks)
    clocks[name] = dataclasses.replace(cfg.clock(name), role="monitor")
    return Config(dict(cfg.sections), clocks, cfg.source)


def detrend_quadratic(offset_s: np.ndarray, elapsed_s: np.ndarray) -> np.ndarray:
    """Each column minus its least-squares quadratic in time (NaN kept). [s]

    Removing the linear frequency drift before an Allan variance is the usual practice
    (Riley, NIST SP 1065, 2008); third differences (Hadamard) are unaffected by it.
    """
    x = np.array(offset_s, dtype=float, copy=True)
    t = np.asarray(elapsed_s, dtype=float)
    if t.size < 4:
        return x
    tc = (t - t.mean()) / max(float(np.ptp(t)), 1.0)
    for i in range(x.shape[1]):
        ok = np.isfinite(x[:, i])
        if ok.sum() < 4:
            continue
        coef = np.polynomial.polynomial.polyfit(tc[ok], x[ok, i], 2)
        x[:, i] -= np.polynomial.polynomial.polyval(tc, coef)
    return x


def scale_weights(offset_s: np.ndarray, elapsed_s: np.ndarray, tau0_s: float, m,
                  mean_weight: np.ndarray):
    """Effective weights (Allan on drift-removed offsets, Hadamard) of one scale.

    ``offset_s`` (T, N) holds the archive's rows; they are placed on the regular grid first.
    """
    weighted = mean_weight > 0
    if not weighted.any():
        return None, None
    anchor = int(np.argmax(mean_weight))
    _, _, (grid,) = on_grid(elapsed_s, tau0_s, offset_s)
    t_grid = elapsed_s[0] + tau0_s * np.arange(grid.shape[0])
    flat = detrend_quadratic(grid, t_grid)
    return (effective_weights(flat, tau0_s, m, 2, weighted, anchor),
            effective_weights(grid, tau0_s, m, 3, weighted, anchor))


def _run_one(name: str | None) -> ReformedScale:
    from ..pipeline import form_time_scale

    meas, cfg, m = _WORKER["meas"], _WORKER["cfg"], _WORKER["m"]
    try:
        res = form_time_scale(meas, _without(cfg, name), keep=True, steer=False)
    except Exception as exc:  # noqa: BLE001 - reported per run, the others go on
        return ReformedScale(name, None, None, np.zeros(meas.n_clocks),
                             f"{type(exc).__name__}: {exc}")
    mean_w = np.mean(res.weight, axis=0)
    off = clean_offsets(res.offset_s, res.mjd, res.clocks, res.events_frame())
    allan, hadamard = scale_weights(off, meas.elapsed_s, meas.tau0_s, m, mean_w)
    return ReformedScale(name, allan, hadamard, mean_w)


def reform_scales(meas: Measurements, cfg: Config, candidates, m, *, workers: int = 0,
                  progress: bool = False, full: bool = True) -> dict:
    """Re-form the full scale and the scale without each candidate.

    Parameters
    ----------
    meas : Measurements
        The archive's measurements.
    cfg : Config
        The archive's configuration.
    candidates : sequence of str
        Clocks to leave out one at a time.
    m : sequence of int
        Averaging factors at which the effective weights are wanted.
    workers : int
        Processes (0: every core; 1: in this process).
    progress : bool
        Show a progress bar (only when stderr is a terminal; it disappears when done).
    full : bool
        Re-form the full scale too.

    Returns
    -------
    dict
        None -> the full scale (if ``full``), clock name -> the scale without it
        (ReformedScale each).
    """
    tasks = ([None] if full else []) + list(candidates)
    m = np.asarray(m, dtype=int)
    n_work = workers or (os.cpu_count() or 1)
    n_work = max(1, min(n_work, len(tasks)))
    bar = None
    if progress and sys.stderr.isatty():
        from tqdm import tqdm
        bar = tqdm(total=len(tasks), unit="scale", desc="what-if", leave=False,
                   file=sys.stderr)
    out: dict = {}
    try:
        if n_work == 1:
            _init(meas, cfg, m)
            try:
                for name in tasks:
                    out[name] = _run_one(name)
                    if bar is not None:
                        bar.update(1)
            finally:
                _WORKER.clear()
        else:
            with ProcessPoolExecutor(max_workers=n_work, initializer=_init,
                                     initargs=(meas, cfg, m)) as pool:
                futures = {pool.submit(_run_one, name): name for name in tasks}
                for fut in as_completed(futures):
                    out[futures[fut]] = fut.result()
                    if bar is not None:
                        bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    return out
