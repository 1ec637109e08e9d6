"""The Python entry points of the whole job (re-exported as ``ensemble.run`` and
``ensemble.append``)."""

from __future__ import annotations

import os

from .config import Config, load_config
from .io.measurements import Measurements
from .pipeline import RunResult, append_to_archive, form_time_scale, run_to_archive


def run(input, output: str | os.PathLike | None = None, *, config=None,
        reference: str | None = None, overwrite: bool = False, steer: bool = True) -> RunResult:
    """Form the time scale from measurements, optionally writing the archive.

    Parameters
    ----------
    input : path-like or Measurements
        A measurement CSV (long or wide form) or an already read :class:`Measurements`.
    output : path-like, optional
        Archive to write (atomically).  Without it nothing is written.
    config : Config, path-like or None
        Configuration (defaults when None).
    reference : str, optional
        Reference clock of a wide-form file.
    overwrite : bool
        Replace an existing archive.
    steer : bool
        Compute the steering advice.

    Returns
    -------
    RunResult
        All arrays in memory (SI units); ``result.frame("offset_s")`` and the like give pandas
        DataFrames indexed by MJD with one column per clock; ``result.events_frame()`` and
        ``result.steering_frame()`` the tables.

    Examples
    --------
    >>> import ensemble
    >>> sim = ensemble.simulate_scenario(ensemble.lab_scenario(
    ...     {"hydrogen_maser": 2, "cesium_standard": 2}, 20.0, seed=1))
    >>> result = ensemble.run(sim.measurements(), steer=False)
    >>> result.frame("weight").iloc[-1].round(2).to_dict()
    {'H01': 0.5, 'H02': 0.5, 'C01': 0.0, 'C02': 0.0}
    """
    cfg = config if isinstance(config, Config) else load_config(config)
    if isinstance(input, Measurements):
        if output is not None:
            raise ValueError("write an archive from a CSV file (its bytes are hashed into the "
                             "archive's provenance)")
        return form_time_scale(input, cfg, keep=True, steer=steer)
    if output is None:
        from .io.csvread import read_measurements
        meas = read_measurements(input, reference=reference or cfg.input.reference or None)
        return form_time_scale(meas, cfg, keep=True, steer=steer)
    return run_to_archive(input, output, config=cfg, reference=reference, overwrite=overwrite,
                          keep=True)


def append(input, archive, *, config=None, reference: str | None = None) -> RunResult:
    """Continue ``archive`` with the new epochs of ``input`` (see ``ensemble run --append``)."""
    return append_to_archive(input, archive, config=config, reference=reference, keep=True)
