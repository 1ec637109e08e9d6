"""``ensemble steer``: archive -> command CSV, summary, cautions, errors; the simulation mode."""

import csv
import re

import h5py
import numpy as np
import pytest

from ensemble import cli
from ensemble.steering.controller import SteeringController
from ensemble.steering.output import (CAUTIONS, STEERING_COLUMNS, mjd_to_iso, records_to_columns,
                                      unit_factor, write_steering_group)
from ensemble.steering.settings import SteeringSettings

from conftest import CONFIG_DIR

DAY = 86400.0
CONFIG = '[steering]\nmax_step = 2e-15\ntime_constant_d = 4.0\nsettle_d = 1.0\n'


def _records(settings, days=12.0):
    ctl = SteeringController(settings)
    x, y = 6e-9, 3e-15
    recs = []
    for k in range(int(days * 24)):
        recs.append(ctl.step(61000.0 + k / 24, 3600.0, (x, y, 0.0)))
        x += 3600.0 * y
    return recs


def _archive(path, columns, config=CONFIG, compound=False):
    with h5py.File(path, "w") as f:
        f.attrs["format_version"] = 1
        if config is not None:
            f.attrs["config_toml"] = config
        if compound:
            names = list(columns)
            data = np.zeros(len(columns["mjd"]), dtype=[(n, "f8") for n in names])
            for n in names:
                data[n] = columns[n]
            f.create_dataset("steering", data=data)
        else:
            write_steering_group(f.create_group("steering"), columns)
    return str(path)


@pytest.fixture
def archive(tmp_path):
    settings = SteeringSettings(max_step=2e-15, time_constant_d=4.0, settle_d=1.0)
    cols = records_to_columns(_records(settings))
    return _archive(tmp_path / "lab.h5", cols), cols


def test_archive_to_commands_in_hz(archive, tmp_path, capsys):
    path, cols = archive
    out = tmp_path / "commands.csv"
    code = cli.main(["steer", path, "-o", str(out), "--units", "hz", "--nominal-hz", "10e6"])
    text = capsys.readouterr().out
    assert code == 0
    rows = list(csv.DictReader(out.read_text().splitlines()))
    cmd = np.nonzero(cols["command_epoch"])[0]
    assert len(rows) == cmd.size == 12
    for row, i in zip(rows, cmd):
        assert float(row["mjd"]) == pytest.approx(cols["mjd"][i], abs=1e-6)
        change = float(row["change"])
        assert change == pytest.approx(cols["frequency_correction"][i], rel=1e-6, abs=1e-30)
        # Cross-check: delta f = y * f_nominal (definition of fractional frequency)
        assert float(row["change_hz"]) == pytest.approx(change * 1e7, rel=1e-6, abs=1e-30)
        assert float(row["total_hz"]) == pytest.approx(float(row["total"]) * 1e7, rel=1e-6,
                                                       abs=1e-30)
        assert row["reason"] in ("command", "settling", "dead-band")
    assert rows[0]["time_utc"] == "2025-11-21T00:00:00Z"
    assert rows[0]["reason"] == "settling" and rows[1]["clipped"] == "step"
    # the archive's own configuration gives the limits shown
    assert "step limit 2e-15" in text
    assert "largest change: -2.000e-15 (-2e-08 Hz at 1e+07 Hz)" in text
    assert "clipped: " in text and "largest clip" in text
    assert "projection (noise-free" in text
    for caution in CAUTIONS:
        assert caution in " ".join(text.split())


def test_mjd_and_units():
    # Cross-check: MJD 51544 = 2000-01-01 and MJD 60676 = 2025-01-01 (MJD 0 = 1858-11-17; days
    # counted here with datetime); 1 ns/day = 1e-9/86400 = 1.1574e-14 (arithmetic), so
    # 1e-15 = 0.0864 ns/day.
    assert mjd_to_iso(51544.0) == "2000-01-01T00:00:00Z"
    assert mjd_to_iso(60676.5) == "2025-01-01T12:00:00Z"
    assert 1e-15 * unit_factor("ns/day", None) == pytest.approx(0.0864, rel=1e-12)
    assert 1.1574e-14 * unit_factor("ns/day", None) == pytest.approx(1.0, rel=1e-4)
    assert 1e-15 * unit_factor("ps/s", None) == pytest.approx(1e-3, rel=1e-12)
    assert unit_factor("hz", 5e6) == 5e6
    with pytest.raises(ValueError):
        unit_factor("hz", None)


def test_contract_only_compound_table(tmp_path, capsys):
    settings = SteeringSettings(settle_d=0.0)
    full = records_to_columns(_records(settings, days=4.0))
    cols = {k: full[k] for k in ("mjd", "frequency_correction", "phase_error")}
    path = _archive(tmp_path / "plain.h5", cols, config=None, compound=True)
    out = tmp_path / "c.csv"
    assert cli.main(["steer", path, "-o", str(out), "--units", "ns/day"]) == 0
    text = capsys.readouterr().out
    assert "projection: not available" in text
    rows = list(csv.DictReader(out.read_text().splitlines()))
    assert len(rows) == int(np.sum(cols["frequency_correction"] != 0))
    assert float(rows[0]["change_ns_per_day"]) == pytest.approx(
        float(rows[0]["change"]) * 1e9 * DAY, rel=1e-6)
    assert rows[0]["clipped"] == "" and rows[0]["predicted_phase_error_ns"] == ""


@pytest.mark.parametrize("make, args, match", [
    ("none", [], r"cannot open as an HDF5 archive"),
    ("nosteer", [], r"lab\.h5: column '/steering': the archive has no /steering table"),
    ("nocol", [], r"column '/steering/phase_error': the /steering table lacks"),
    ("ok", ["--units", "hz"], r"--units hz needs --nominal-hz"),
    ("ok", ["--simulate", "x.toml"], r"give either ARCHIVE.h5 or --simulate"),
    ("ok", ["--plot", "p.png"], r"--plot needs --simulate"),
])
def test_bad_input_exit_2_and_no_output(tmp_path, capsys, make, args, match):
    path = tmp_path / "lab.h5"
    if make == "nosteer":
        with h5py.File(path, "w") as f:
            f.attrs["format_version"] = 1
    elif make == "nocol":
        with h5py.File(path, "w") as f:
            g = f.create_group("steering")
            g["mjd"] = np.arange(3.0)
            g["frequency_correction"] = np.zeros(3)
    elif make == "ok":
        cols = records_to_columns(_records(SteeringSettings(), days=2.0))
        _archive(path, cols)
    out = tmp_path / "commands.csv"
    code = cli.main(["steer", str(path), "-o", str(out), *args])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("error: ") and len(err.strip().splitlines()) == 1
    assert re.search(match, err)
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == (["lab.h5"] if make != "none" else [])


def test_bad_config_exit_2(archive, tmp_path, capsys):
    path, _ = archive
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[steering]\nmax_step = -1.0\n")
    assert cli.main(["steer", path, "--config", str(cfg)]) == 2
    assert "key 'steering.max_step'" in capsys.readouterr().err


def test_simulate_writes_plot_and_commands(tmp_path, capsys):
    scenario = tmp_path / "s.toml"
    text = (CONFIG_DIR / "steering_examples.toml").read_text()
    scenario.write_text(text + "\n[simulation]\ndays = 15.0\n")
    png, out = tmp_path / "loop.png", tmp_path / "c.csv"
    code = cli.main(["steer", "--simulate", str(scenario), "--plot", str(png), "-o", str(out),
                     "--units", "ps/s"])
    printed = capsys.readouterr().out
    assert code == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    header = out.read_text().splitlines()[0].split(",")
    assert header[:6] == ["mjd", "time_utc", "change", "total", "change_ps_per_s",
                          "total_ps_per_s"]
    assert "true phase error over the last quarter" in printed
    assert "CAUTIONS" in printed


def test_column_metadata_complete():
    cols = records_to_columns(_records(SteeringSettings(), days=1.0))
    assert list(cols) == list(STEERING_COLUMNS)
    for name, values in cols.items():
        assert values.dtype == np.dtype(STEERING_COLUMNS[name][0])
