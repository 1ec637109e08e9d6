"""Scenario simulator: measurements, injected anomalies, truth file, CSV, validation, CLI."""

import copy
import math

import h5py
import numpy as np
import pytest

from conftest import CONFIG_DIR, DEMO_DIR
from ensemble.cli import main as cli_main
from ensemble.errors import ConfigError
from ensemble.simulate import Scenario, lab_scenario, simulate

DAY = 86400.0
BASE = {
    "simulation": {"seed": 42, "start_mjd": 61000.0, "tau0_s": 3600.0, "duration_days": 12.0,
                   "reference": "M1"},
    "measurement": {"white_pm_s": 3e-12},
    "clocks": [
        {"name": "M1", "type": "hydrogen_maser", "frequency_offset": 1e-14,
         "drift_per_day": 1e-15},
        {"name": "M2", "type": "hydrogen_maser", "frequency_offset": -3e-14},
        {"name": "Cs1", "type": "cesium_standard", "frequency_offset": 5e-13},
        {"name": "Cs2", "type": "cesium_high_performance", "phase_offset_s": 2e-7},
        {"name": "Rb1", "type": "rubidium", "frequency_offset": 2e-12, "drift_per_day": 5e-13},
    ],
}


def scenario(**extra):
    table = copy.deepcopy(BASE)
    for key, value in extra.items():
        table[key] = value
    return Scenario.from_dict(table)


def second_difference(x):
    """s_k = x_{k+1} - 2 x_k + x_{k-1}, indexed so that out[k] is s_k (out[0] = NaN)."""
    out = np.full(x.shape, np.nan)
    out[1:-1] = x[2:] - 2 * x[1:-1] + x[:-2]
    return out


def test_grid_shapes_and_measurement_model():
    sim = simulate(scenario())
    assert sim.clocks == ("M1", "M2", "Cs1", "Cs2", "Rb1")
    assert sim.phase_s.shape == sim.true_phase_s.shape == (288, 5)
    assert np.all(np.isfinite(sim.true_phase_s))
    np.testing.assert_array_equal(sim.elapsed_s, np.arange(288) * 3600.0)
    np.testing.assert_allclose(sim.mjd, 61000.0 + np.arange(288) / 24.0, rtol=0, atol=1e-9)
    assert np.all(sim.reference == 0) and np.all(sim.phase_s[:, 0] == 0.0)
    # Measured = clock - reference + white PM of the clock's channel.
    residual = sim.phase_s[:, 1:] - (sim.true_phase_s[:, 1:] - sim.true_phase_s[:, :1])
    # Cross-check: sample std of 1152 normal draws within 10 % (about 3.4 standard errors).
    assert np.std(residual) == pytest.approx(3e-12, rel=0.1)
    # Deterministic terms: phase offset and frequency offset are in the truth.
    assert sim.true_phase_s[0, 3] == pytest.approx(2e-7, abs=1e-20)
    assert sim.noise["Rb1"].drift_per_s == pytest.approx(5e-13 / DAY, rel=1e-15)
    assert sim.noise["Cs1"].clock_noise.r_s2 == pytest.approx(9e-24, rel=1e-14)


def test_same_scenario_same_bytes_other_seed_other_noise(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    simulate(scenario()).to_csv(a)
    simulate(scenario()).to_csv(b)
    assert a.read_bytes() == b.read_bytes()
    other = copy.deepcopy(BASE)
    other["simulation"]["seed"] = 43
    assert not np.array_equal(simulate(Scenario.from_dict(other)).true_phase_s,
                              simulate(scenario()).true_phase_s)


def test_injected_signatures_at_their_epochs():
    # Source: analytic second-difference signatures (derived here) of an outlier (+a, -2a, +a),
    # a phase step (+b, -b, 0) and a frequency step (0, c tau, 0) at k0 - 1, k0, k0 + 1; a drift
    # change D gives (0, D tau^2 / 2, D tau^2).  The runs with and without the anomalies share
    # every random stream, so their difference is the injected signal alone (round-off
    # tolerance).
    tau, a, b, c, d = 3600.0, 5e-9, 2e-9, 1e-13, 2e-15 / DAY
    anomalies = [
        {"kind": "outlier", "clock": "Cs1", "day": 2.0, "size_s": a},
        {"kind": "phase_step", "clock": "M2", "day": 4.5, "size_s": b},
        {"kind": "frequency_step", "clock": "Cs2", "day": 6.0, "size": c},
        {"kind": "drift_change", "clock": "Rb1", "day": 8.25, "size_per_day": 2e-15},
    ]
    base, hit = simulate(scenario()), simulate(scenario(anomalies=anomalies))
    diff = hit.phase_s - base.phase_s
    true_diff = hit.true_phase_s - base.true_phase_s
    atol = 1e-18
    cases = [("Cs1", 48, (a, -2 * a, a), False), ("M2", 108, (b, -b, 0.0), True),
             ("Cs2", 144, (0.0, c * tau, 0.0), True),
             ("Rb1", 198, (0.0, d * tau ** 2 / 2, d * tau ** 2), True)]
    for name, k0, pattern, in_clock in cases:
        j = hit.clocks.index(name)
        s = second_difference(diff[:, j])
        np.testing.assert_allclose(s[k0 - 1:k0 + 2], pattern, rtol=1e-9, atol=atol)
        np.testing.assert_allclose(s[1:k0 - 1], 0.0, atol=atol)
        after = d * tau ** 2 if name == "Rb1" else 0.0
        np.testing.assert_allclose(s[k0 + 2:-1], after, rtol=1e-6, atol=atol)
        # Steps change the clock; an outlier only the reading.
        assert np.any(true_diff[:, j] != 0) == in_clock
    # Every other clock's noise is untouched, bit for bit.
    np.testing.assert_array_equal(hit.true_phase_s[:, 0], base.true_phase_s[:, 0])
    events = {(e.kind, e.clock): e for e in hit.events}
    assert events[("phase_step", "M2")].mjd == pytest.approx(61004.5, abs=1e-9)
    assert events[("phase_step", "M2")].unit == "s"
    assert events[("drift_change", "Rb1")].size == pytest.approx(d, rel=1e-15)
    assert events[("drift_change", "Rb1")].unit == "1/s"


def test_gaps_joins_leaves_and_reference_change(tmp_path):
    anomalies = [
        {"kind": "gap", "clock": "Cs1", "day": 1.0, "duration_days": 0.25},
        {"kind": "gap", "day": 3.0, "duration_days": 2 / 24},
        {"kind": "join", "clock": "Rb1", "day": 2.0},
        {"kind": "leave", "clock": "M1", "day": 9.0},
    ]
    sim = simulate(scenario(anomalies=anomalies,
                            reference_changes=[{"day": 6.0, "clock": "M2"}]))
    nan = np.isnan(sim.phase_s)
    assert nan[24:30, 2].all() and not nan[23, 2] and not nan[30, 2]
    assert nan[72:74].all() and not nan[71].any() and not nan[74].any()
    assert nan[:48, 4].all() and not nan[48, 4]
    assert nan[216:, 0].all() and not nan[215, 0]
    assert np.all(np.isfinite(sim.true_phase_s))
    np.testing.assert_array_equal(sim.reference, np.where(np.arange(288) < 144, 0, 1))
    k = 200          # after the change: M1 is measured against M2
    assert sim.phase_s[k, 1] == 0.0
    assert sim.phase_s[k, 0] == pytest.approx(sim.true_phase_s[k, 0] - sim.true_phase_s[k, 1],
                                              abs=2e-11)
    # The CSV has no rows for missing data, and names the reference of each epoch.
    path = tmp_path / "m.csv"
    assert sim.to_csv(path) == int((~nan).sum())
    lines = path.read_text().splitlines()
    assert lines[0] == "mjd,clock,reference,phase"
    rows = [line.split(",") for line in lines[1:]]
    tags = np.array([float(r[0]) for r in rows])
    epoch = np.rint((tags - 61000.0) * 24).astype(int)
    assert not np.isin(epoch, [72, 73]).any()
    assert not any(r[1] == "Cs1" and e in range(24, 30) for r, e in zip(rows, epoch))
    assert {r[2] for r, e in zip(rows, epoch) if e >= 144} == {"M2"}
    # Sorted by epoch, then by clock identifier; tags on the grid to 1e-10 d.
    keys = [(e, r[1]) for r, e in zip(rows, epoch)]
    assert keys == sorted(keys)
    np.testing.assert_allclose(tags, 61000.0 + epoch / 24.0, rtol=0, atol=6e-11)
    # Phase text reads back to the identical float64.
    col = {name: i for i, name in enumerate(sim.clocks)}
    back = np.array([float(r[3]) for r in rows])
    np.testing.assert_array_equal(back, sim.phase_s[epoch, [col[r[1]] for r in rows]])


def test_noise_growth_multiplies_the_white_fm_level():
    # Cross-check: for a white-FM-only clock the phase increments are N(0, q1 tau f^2); the
    # variance ratio between the last and the first fifth estimates f_end^2 / f_start^2.  Sample
    # variances of ~1400 increments: chi-squared relative spread ~4 %; tolerance 15 %.
    levels = {"flicker_fm_adev": 0.0, "rw_fm_adev": 0.0}
    table = copy.deepcopy(BASE)
    table["simulation"]["duration_days"] = 300.0
    for clock in table["clocks"]:
        clock["levels"] = dict(levels)
    for shape in ("linear", "exponential"):
        table["anomalies"] = [{"kind": "noise_growth", "clock": "Cs1", "day": 0.0,
                               "factor": 3.0, "shape": shape}]
        sim = simulate(Scenario.from_dict(table))
        f = sim.white_fm_factor[:, 2]
        assert f[0] == 1.0 and f[-1] == pytest.approx(3.0, rel=1e-3)
        mid = f[f.size // 2]
        assert mid == pytest.approx(2.0 if shape == "linear" else math.sqrt(3.0), rel=1e-3)
        steps = np.diff(sim.true_phase_s[:, 2] - 5e-13 * sim.elapsed_s) / f
        q1 = sim.noise["Cs1"].clock_noise.q1_s
        assert np.var(steps) == pytest.approx(q1 * 3600.0, rel=0.1)
        raw = np.diff(sim.true_phase_s[:, 2])
        n5 = raw.size // 5
        ratio = np.var(raw[-n5:]) / np.var(raw[:n5])
        expected = np.mean(f[-n5:] ** 2) / np.mean(f[:n5] ** 2)
        assert ratio == pytest.approx(expected, rel=0.15)


def test_truth_file_holds_what_the_docs_say(tmp_path):
    text = (CONFIG_DIR / "demo_scenario.toml").read_text()
    sc = Scenario.from_toml_text(text)
    sim = simulate(sc)
    path = tmp_path / "truth.h5"
    sim.write_truth(path)
    with h5py.File(path, "r") as f:
        assert f.attrs["scenario_toml"] == text
        assert f.attrs["format_version"] == 1
        names = [n.decode() if isinstance(n, bytes) else n for n in f["clocks/name"][()]]
        assert tuple(names) == sim.clocks
        np.testing.assert_array_equal(f["truth/phase"][()], sim.true_phase_s)
        np.testing.assert_array_equal(f["measured/phase"][()], sim.phase_s)
        np.testing.assert_array_equal(f["measured/reference"][()], sim.reference)
        np.testing.assert_array_equal(f["epochs/mjd"][()], sim.mjd)
        np.testing.assert_array_equal(f["noise/q1"][()],
                                      [sim.noise[n].clock_noise.q1_s for n in sim.clocks])
        np.testing.assert_array_equal(f["noise/h_minus1"][()],
                                      [sim.noise[n].h[-1] for n in sim.clocks])
        ev = f["events"][()]
        assert len(ev) == len(sim.events)
        assert [k.decode() for k in ev["kind"]] == [e.kind for e in sim.events]
        np.testing.assert_array_equal(ev["mjd"], [e.mjd for e in sim.events])
        datasets = []
        f.visititems(lambda name, obj: datasets.append(obj)
                     if isinstance(obj, h5py.Dataset) else None)
        assert len(datasets) >= 20
        for ds in datasets:
            assert "units" in ds.attrs and ds.attrs["description"], ds.name


def test_demo_csv_is_reproduced_byte_for_byte(tmp_path, capsys):
    # Regression: demo_data/lab_demo.csv as committed, regenerated from its scenario.
    out = tmp_path / "lab_demo.csv"
    assert cli_main(["simulate", str(CONFIG_DIR / "demo_scenario.toml"), "-o", str(out)]) == 0
    assert out.read_bytes() == (DEMO_DIR / "lab_demo.csv").read_bytes()
    assert "wrote" in capsys.readouterr().err


def test_demo_lab_contents():
    sim = simulate(Scenario.from_toml(CONFIG_DIR / "demo_scenario.toml"))
    assert sim.clocks == ("H1", "H2", "C1", "C2", "C3", "C4", "R1", "R2")
    assert sim.n_epochs == 2880
    kinds = sorted(e.kind for e in sim.events)
    assert kinds == ["frequency_step", "gap", "gap", "noise_growth", "outlier", "outlier",
                     "phase_step", "reference_change"]
    assert sim.white_fm_factor[-1, 5] == pytest.approx(2.5, rel=1e-3)


def test_programmatic_scenarios_round_trip():
    sc = lab_scenario({"hydrogen_maser": 2, "cesium_standard": 3, "rubidium": 1}, 20.0, seed=5,
                      anomalies=[{"kind": "phase_step", "clock": "C02", "day": 5.0,
                                  "size_s": 1e-9}])
    assert sc.clock_names == ("H01", "H02", "C01", "C02", "C03", "R01")
    again = Scenario.from_dict(sc.to_dict())
    np.testing.assert_array_equal(simulate(again).phase_s, simulate(sc).phase_s)
    again_text = Scenario.from_toml_text(sc.to_toml())
    np.testing.assert_array_equal(simulate(again_text).true_phase_s, simulate(sc).true_phase_s)
    # Random offsets come from the type's typical scale and the group's own stream.
    offsets = [c.frequency_offset for c in sc.clocks]
    assert all(o != 0 for o in offsets) and abs(offsets[0]) < 1e-12
    meas = simulate(sc).measurements()
    assert meas.clocks == sc.clock_names and meas.tau0_s == 3600.0


def test_benchmark_scenarios_are_valid():
    files = sorted((CONFIG_DIR / "scenarios").glob("*.toml"))
    names = {p.stem: Scenario.from_toml(p) for p in files}
    assert set(names) == {"mixed_lab_clean", "mixed_lab_anomalies", "clocks100_1year",
                          "five_clocks_10years"}
    assert len(names["clocks100_1year"].clocks) == 100
    assert names["clocks100_1year"].n_epochs == 8760
    assert names["five_clocks_10years"].n_epochs == 87600
    assert names["mixed_lab_clean"].to_dict()["clocks"] == \
        names["mixed_lab_anomalies"].to_dict()["clocks"]
    kinds = {a.kind for a in names["mixed_lab_anomalies"].anomalies}
    assert {"phase_step", "frequency_step", "outlier", "gap", "join", "leave"} <= kinds
    assert names["mixed_lab_anomalies"].reference_changes


@pytest.mark.parametrize("edit, key", [
    (lambda t: t["simulation"].update(sed=1), "simulation.sed"),
    (lambda t: t.update(clock={}), "clock"),
    (lambda t: t["simulation"].update(tau0_s=-1.0), "simulation.tau0_s"),
    (lambda t: t["simulation"].update(duration_days=1.3), "simulation.duration_days"),
    (lambda t: t["simulation"].update(reference="X9"), "simulation.reference"),
    (lambda t: t["clocks"][2].update(type="quartz"), "clocks[2].type"),
    (lambda t: t["clocks"][2].update(levels={"white_fm": 1e-12}), "clocks[2].levels.white_fm"),
    (lambda t: t["clocks"][2].update(levels={"rw_fm_adev": -1e-14}), "clocks[2].levels.rw_fm_adev"),
    (lambda t: t["clocks"][1].update(name="M1"), "clocks"),
    (lambda t: t["clocks"][1].pop("name"), "clocks[1].name"),
    (lambda t: t["clocks"][1].update(colour="red"), "clocks[1].colour"),
    (lambda t: t.update(reference_changes=[{"clock": "M2"}]), "reference_changes[0].day"),
    (lambda t: t["clocks"][1].update(name="bad name"), "clocks[1].name"),
    (lambda t: t["measurement"].update(white_pm_s="3 ps"), "measurement.white_pm_s"),
    (lambda t: t["measurement"].update(channel_white_pm_s={"Zz": 1e-12}),
     "measurement.channel_white_pm_s.Zz"),
    (lambda t: t.update(anomalies=[{"kind": "spike", "clock": "M2", "day": 1.0}]),
     "anomalies[0].kind"),
    (lambda t: t.update(anomalies=[{"kind": "phase_step", "clock": "M2", "day": 1.0,
                                    "size": 1e-9}]), "anomalies[0].size"),
    (lambda t: t.update(anomalies=[{"kind": "phase_step", "clock": "M2", "day": 1.0}]),
     "anomalies[0].size_s"),
    (lambda t: t.update(anomalies=[{"kind": "outlier", "clock": "M2", "day": 30.0,
                                    "size_s": 1e-9}]), "anomalies[0].day"),
    (lambda t: t.update(anomalies=[{"kind": "outlier", "clock": "Q", "day": 3.0,
                                    "size_s": 1e-9}]), "anomalies[0].clock"),
    (lambda t: t.update(anomalies=[{"kind": "outlier", "clock": "M1", "day": 3.0,
                                    "size_s": 1e-9}]), "anomalies[0].clock"),
    (lambda t: t.update(anomalies=[{"kind": "leave", "clock": "M1", "day": 3.0}]),
     "simulation.reference"),
    (lambda t: t.update(reference_changes=[{"day": 2.0, "clock": "M1"}]),
     "reference_changes[0].clock"),
])
def test_invalid_scenarios_name_the_key(edit, key):
    table = copy.deepcopy(BASE)
    edit(table)
    with pytest.raises(ConfigError) as err:
        simulate(Scenario.from_dict(table))
    assert err.value.key == key
    assert f"'{key}'" in str(err.value)


def test_cli_bad_scenario_exits_2_with_one_line_and_writes_nothing(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text((CONFIG_DIR / "demo_scenario.toml").read_text()
                   .replace("tau0_s = 3600.0", "tau0_s = -5.0"))
    out, truth = tmp_path / "out" / "m.csv", tmp_path / "out" / "t.h5"
    out.parent.mkdir()
    code = cli_main(["simulate", str(bad), "-o", str(out), "--truth", str(truth)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "simulation.tau0_s" in err and str(bad) in err
    assert list(out.parent.iterdir()) == []
    bad.write_text("[simulation\nseed = 1\n")
    assert cli_main(["simulate", str(bad), "-o", str(out)]) == 2
    assert "not valid TOML" in capsys.readouterr().err
    assert cli_main(["simulate", str(tmp_path / "absent.toml"), "-o", str(out)]) == 2
    assert list(out.parent.iterdir()) == []


def test_cli_writes_csv_and_truth(tmp_path):
    out, truth = tmp_path / "m.csv", tmp_path / "t.h5"
    assert cli_main(["simulate", str(CONFIG_DIR / "demo_scenario.toml"), "-o", str(out),
                     "--truth", str(truth), "-q"]) == 0
    assert out.read_bytes() == (DEMO_DIR / "lab_demo.csv").read_bytes()
    with h5py.File(truth, "r") as f:
        assert f["truth/phase"].shape == (2880, 8)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.csv", "t.h5"]
