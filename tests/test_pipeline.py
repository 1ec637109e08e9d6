"""The whole run: CSV in, archive out, the Python API, the measured steered output."""

from __future__ import annotations

import numpy as np
import pytest

import ensemble
from ensemble.archive import verify_archive
from ensemble.config import parse_config
from ensemble.engine.timescale import MONITOR
from ensemble.simulate import lab_scenario, simulate


@pytest.fixture(scope="module")
def small_lab(tmp_path_factory):
    sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 3}, 15.0, seed=21,
                                anomalies=[{"kind": "phase_step", "clock": "C02", "day": 9.0,
                                            "size_s": 4e-9}]))
    path = tmp_path_factory.mktemp("lab") / "lab.csv"
    sim.to_csv(path)
    return sim, path


def test_run_writes_a_conformant_archive(small_lab, tmp_path):
    sim, csv = small_lab
    out = tmp_path / "lab.h5"
    result = ensemble.run(csv, out, config=parse_config({"ensemble": {"startup_days": 5.0}}))
    assert verify_archive(out) == []
    with ensemble.open_archive(out) as arc:
        assert list(arc.clocks) == list(result.clocks)
        np.testing.assert_array_equal(arc.offset.to_numpy(), result.offset_s)
        np.testing.assert_allclose(arc.weight.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert list(arc.events["kind"]) == ["phase_step"]
        assert len(arc.steering) == sim.n_epochs
        assert "engine" in arc.engine_state
        assert arc.attrs["input_sha256"] == result.measurements.sha256
    frame = result.frame("offset_s")
    assert frame.shape == (sim.n_epochs, sim.n_clocks) and frame.index.name == "mjd"
    assert list(result.events_frame()["clock"]) == ["C02"]


def test_api_without_output_writes_nothing(small_lab, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = ensemble.run(small_lab[1], config=parse_config({"ensemble": {"startup_days": 5.0}}))
    assert result.archive is None and list(tmp_path.iterdir()) == []
    assert result.steering["mjd"].size == small_lab[0].n_epochs


def test_measured_steered_output_is_a_monitor(tmp_path):
    # The output channel OUT (a maser-like clock) is measured like the others; it must never
    # enter the scale, and the steering follows it with its own tracker.
    clocks = [{"name": "H01", "type": "hydrogen_maser"}, {"name": "H02", "type": "hydrogen_maser"},
              {"name": "C01", "type": "cesium_standard"}, {"name": "OUT", "type": "hydrogen_maser",
                                                          "phase_offset_s": 4e-9}]
    sim = simulate(lab_scenario(clocks, 12.0, seed=4))
    cfg = parse_config({"ensemble": {"startup_days": 5.0},
                        "steering": {"output": "measured", "output_channel": "OUT",
                                     "settle_d": 1.0}})
    result = ensemble.run(sim.measurements(), config=cfg)
    out = result.clocks.index("OUT")
    assert (result.state[:, out] == MONITOR).all()
    assert (result.weight[:, out] == 0).all()
    steer = result.steering
    assert np.isfinite(steer["phase_error"][24:]).all()
    assert np.isfinite(steer["frequency_error"][24:]).all()
    commands = steer["frequency_correction"][steer["command_epoch"] == 1]
    assert (np.abs(commands) <= cfg.steering.max_step * (1 + 1e-12)).all()
    assert np.abs(commands).max() > 0
