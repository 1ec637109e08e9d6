"""Truth file of a simulation: HDF5 with everything the simulator knows (internal module).

Layout (every dataset has ``units`` and ``description`` attributes; (T, N) arrays have epochs on
axis 0 and clocks on axis 1 in ``/clocks/name`` order)::

    /                       attrs: format, format_version, software_version, scenario_toml,
                            seed, tau0_s, start_mjd
    /epochs/mjd             (T,)    epoch tags, MJD UTC [d]
    /epochs/elapsed         (T,)    time since the first epoch [s]
    /clocks/name            (N,)    identifiers
    /clocks/type            (N,)    preset keys
    /clocks/frequency_offset, /clocks/drift, /clocks/phase_offset   (N,) [1], [1/s], [s]
    /truth/phase            (T, N)  clock - ideal time, never NaN [s]
    /truth/white_fm_factor  (T-1, N) multiplier of the white-FM level per interval [1]
    /measured/phase         (T, N)  clock - reference, NaN where missing [s]
    /measured/reference     (T,)    column of each epoch's reference
    /noise/h0, h_minus1, h_minus2, h_minus4   (N,) power-law coefficients [s], [1], [1/s], [1/s^3]
    /noise/q1, q2, q3, r    (N,)    Kalman-model parameters [s], [1/s], [1/s^3], [s^2]
    /noise/flicker_fm_adev  (N,)    flicker-FM floor [1]
    /noise/white_pm, flicker_pm_h1    (N,) channel noise [s], [s^2]
    /events                 table: kind, clock, mjd [d], size (unit in column ``unit``),
                            unit, end_mjd [d], epoch
"""

from __future__ import annotations

import contextlib
import json

import numpy as np

from ..atomic import atomic_output

FORMAT = "ensemble simulation truth"
FORMAT_VERSION = 1


def _dataset(group, name: str, data, units: str, description: str):
    ds = group.create_dataset(name, data=data)
    ds.attrs["units"] = units
    ds.attrs["description"] = description
    return ds


def write_truth(path, sim, atomic: bool = True) -> None:
    """Write the truth file of a :class:`~ensemble.simulate.Simulation`.

    Parameters
    ----------
    path : path-like
        Output file.
    sim : Simulation
    atomic : bool
        Write to a temporary file renamed over ``path`` when complete (default).  False writes
        ``path`` directly, for callers that manage the atomic replacement themselves.
    """
    import h5py

    from .. import __version__

    params = [sim.noise[name] for name in sim.clocks]
    text = h5py.string_dtype("utf-8")
    with (atomic_output(path) if atomic else contextlib.nullcontext(path)) as target:
        with h5py.File(target, "w") as f:
            f.attrs["format"] = FORMAT
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["software_version"] = __version__
            f.attrs["scenario_toml"] = sim.scenario.to_toml()
            f.attrs["seed"] = int(sim.scenario.seed)
            f.attrs["tau0_s"] = float(sim.tau0_s)
            f.attrs["start_mjd"] = float(sim.mjd[0])
            ep = f.create_group("epochs")
            _dataset(ep, "mjd", sim.mjd, "d", "epoch tag, Modified Julian Date (UTC)")
            _dataset(ep, "elapsed", sim.elapsed_s, "s", "time since the first epoch, k * tau0")
            cl = f.create_group("clocks")
            _dataset(cl, "name", np.array(sim.clocks, dtype=object).astype(text), "",
                     "clock identifiers; the column order of every (T, N) dataset")
            _dataset(cl, "type", np.array([p.type for p in params], dtype=object).astype(text),
                     "", "clock type (preset key)")
            _dataset(cl, "frequency_offset", [p.frequency_offset for p in params], "1",
                     "deterministic fractional frequency offset at the first epoch")
            _dataset(cl, "drift", [p.drift_per_s for p in params], "1/s",
                     "deterministic linear frequency drift")
            _dataset(cl, "phase_offset", [p.phase_offset_s for p in params], "s",
                     "clock - ideal time at the first epoch")
            tr = f.create_group("truth")
            _dataset(tr, "phase", sim.true_phase_s, "s",
                     "clock - ideal time, including injected steps; defined at every epoch")
            _dataset(tr, "white_fm_factor", sim.white_fm_factor, "1",
                     "multiplier of the clock's white-FM level over each interval (noise growth)")
            me = f.create_group("measured")
            _dataset(me, "phase", sim.phase_s, "s",
                     "measured clock - reference with channel noise and outliers; NaN where "
                     "missing; 0 for the reference itself")
            _dataset(me, "reference", sim.reference.astype(np.int32), "",
                     "column (index into /clocks/name) of each epoch's reference clock")
            no = f.create_group("noise")
            for name, alpha, unit in (("h0", 0, "s"), ("h_minus1", -1, "1"),
                                      ("h_minus2", -2, "1/s"), ("h_minus4", -4, "1/s^3")):
                _dataset(no, name, [p.h.get(alpha, 0.0) for p in params], unit,
                         f"power-law coefficient h_{alpha} of S_y(f) = h f^{alpha} (one-sided)")
            for name, attr, unit, what in (
                    ("q1", "q1_s", "s", "white FM diffusion coefficient"),
                    ("q2", "q2_per_s", "1/s", "random-walk FM diffusion coefficient"),
                    ("q3", "q3_per_s3", "1/s^3", "random-run FM diffusion coefficient"),
                    ("r", "r_s2", "s^2", "white PM variance of the channel per sample")):
                _dataset(no, name, [getattr(p.clock_noise, attr) for p in params], unit,
                         f"Kalman clock model: {what} (flicker FM not representable)")
            _dataset(no, "flicker_fm_adev", [p.flicker_fm_adev for p in params], "1",
                     "flicker FM floor of the Allan deviation (not in q1, q2, q3)")
            _dataset(no, "white_pm", [p.white_pm_s for p in params], "s",
                     "white PM standard deviation of the channel's reading")
            _dataset(no, "flicker_pm_h1", [p.flicker_pm_h1_s2 for p in params], "s^2",
                     "flicker PM coefficient h_1 of the channel (S_y = h_1 f)")
            dtype = np.dtype([("kind", text), ("clock", text), ("mjd", "f8"), ("size", "f8"),
                              ("unit", text), ("end_mjd", "f8"), ("epoch", "i8")])
            rows = np.array([(e.kind, e.clock, e.mjd, e.size, e.unit, e.end_mjd, e.epoch)
                             for e in sim.events], dtype=dtype)
            ds = f.create_dataset("events", data=rows, dtype=dtype)
            ds.attrs["units"] = json.dumps({"kind": "", "clock": "", "mjd": "d",
                                            "size": "see column 'unit'", "unit": "",
                                            "end_mjd": "d", "epoch": ""})
            ds.attrs["description"] = (
                "injected events: kind, clock ('*' = all), epoch, size (s for phase steps and "
                "outliers, 1 for frequency steps and noise-growth factors, 1/s for drift "
                "changes, d for gaps), end of a span (NaN otherwise), epoch index")
