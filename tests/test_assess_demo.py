"""``ensemble assess`` on the demo laboratory (demo_data/README.md)."""

import json

import pytest

from ensemble import cli
from ensemble.pipeline import run_to_archive

from conftest import CONFIG_DIR, DEMO_DIR


@pytest.mark.slow
def test_demo_ageing_cesium_is_singled_out(capsys, tmp_path):
    # Source: demo_data/README.md -- C4 is the demo's degrading clock (its white FM grows
    # linearly to 2.5 times over the 120 days); no other clock ages or has repeated steps.
    archive = tmp_path / "demo.h5"
    run_to_archive(DEMO_DIR / "lab_demo.csv", archive, config=CONFIG_DIR / "demo.toml")
    assert cli.main(["assess", str(archive), "--json", "--no-store"]) == 0
    rows = {r["clock"]: r for r in json.loads(capsys.readouterr().out)}
    c4 = rows["C4"]
    assert c4["verdict"] in ("watch", "retire")
    assert c4["reasons"][0].startswith("white-FM noise rising")
    assert c4["ageing"]["white_fm"]["significant"]
    # the fitted growth of its white-FM Allan deviation over the span, against the true 2.5
    # (a fitted exponential trend through a linear growth; 1.7 to 3.2 allows for that and for
    # the spread of 13 overlapping windows, about 6 effective)
    assert 1.7 < c4["ageing"]["white_fm_growth"] < 3.2
    for name in ("C1", "C2", "C3", "H1", "H2", "R1", "R2"):
        assert rows[name]["verdict"] == "keep", rows[name]["reasons"]
    # the configured types (configs/demo.toml) are the yardstick
    assert rows["C2"]["type_compared"] == "cesium_high_performance"
    assert rows["H1"]["type_compared"] == "hydrogen_maser"
    # the cesium and rubidium levels of the README, from the hat (within 15 %)
    assert rows["C1"]["noise"]["white_fm_adev_1s"] == pytest.approx(1e-11, rel=0.15)
    assert rows["C2"]["noise"]["white_fm_adev_1s"] == pytest.approx(7e-12, rel=0.15)
    assert rows["R1"]["drift_per_day"]["value"] == pytest.approx(6.0e-13, rel=0.1)
