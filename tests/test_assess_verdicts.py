"""Verdicts on simulated laboratories with known truth (ensemble/assess: core, verdict)."""

import dataclasses

import numpy as np
import pytest

from ensemble.assess import assess_archive
from ensemble.assess.history import ClockHistory, EventSummary
from ensemble.assess.records import ClockAssessment, Deviation
from ensemble.assess.settings import AssessmentSettings
from ensemble.assess.verdict import decide, what_if_role
from ensemble.pipeline import run_to_archive
from ensemble.simulate import lab_scenario, simulate

DAY = 86400.0


def build_archive(folder, scenario, name="lab"):
    """Simulate, write the CSV and form the scale into an archive; returns (path, simulation)."""
    sim = simulate(scenario)
    csv = folder / f"{name}.csv"
    sim.to_csv(csv)
    path = folder / f"{name}.h5"
    run_to_archive(csv, path)
    return path, sim


@pytest.fixture(scope="module")
def cesium_lab(tmp_path_factory):
    # Five cesium beams of one type.  C5's white FM doubles over the span (linear growth of
    # the Allan deviation, simulator truth); C4 gets three frequency steps of 1e-12 (large
    # enough for the engine to detect each: about 10 times the 1-d Allan deviation).
    clocks = [{"name": f"C{i}", "type": "cesium_standard", "frequency_offset": 1e-13 * i}
              for i in range(1, 6)]
    steps = [{"kind": "frequency_step", "clock": "C4", "day": d, "size": s}
             for d, s in ((12.0, 1e-12), (30.0, -1e-12), (45.0, 1e-12))]
    scenario = lab_scenario(clocks, 60.0, seed=5, white_pm_s=3e-12,
                            anomalies=[{"kind": "noise_growth", "clock": "C5", "factor": 2.0}]
                            + steps)
    path, _ = build_archive(tmp_path_factory.mktemp("cesium"), scenario)
    return path


def test_ageing_clock_and_step_prone_clock_are_flagged(cesium_lab):
    # Source: the simulator's truth (docs/simulator.md): C5's white-FM level doubles over the
    # span, C4 has three frequency steps, C1-C3 are healthy clocks of the same type.
    a = assess_archive(cesium_lab)
    v = a.verdicts
    c5 = a.record("C5")
    assert v["C5"] in ("watch", "retire")
    assert any(r.startswith("white-FM noise rising") for r in c5.reasons)
    assert c5.white_fm_trend.significant
    # the fitted growth of the Allan deviation over the span, against the true factor 2
    assert 1.4 < c5.white_fm_growth < 2.9
    c4 = a.record("C4")
    assert v["C4"] in ("watch", "retire")
    assert any("frequency steps" in r and "threshold 3" in r for r in c4.reasons)
    assert c4.repair_suggested                      # its noise is that of a healthy cesium
    for name in ("C1", "C2", "C3"):
        assert v[name] == "keep", a.record(name).reasons
    # every clock was compared with its configured type: "auto" matched cesium_standard
    assert {r.type_compared for r in a.records} == {"cesium_standard"}


def test_fitted_levels_match_the_simulated_clocks(cesium_lab):
    # Source: simulator truth, cesium_standard preset: white FM 1e-11 at 1 s (q1 = 1e-22 s),
    # flicker floor 7e-14 (typical values from memory, ensemble/model/presets.py).  Within 3
    # fitted standard uncertainties, and the judged Hadamard deviations within their 68 %
    # intervals widened to 3 sigma.
    from ensemble.model.presets import expected_hdev

    a = assess_archive(cesium_lab)
    for name in ("C1", "C2", "C3"):
        r = a.record(name)
        assert abs(r.noise.q1_s - 1e-22) < 3 * r.noise.q1_std_s
        assert abs(r.noise.flicker_adev - 7e-14) < 3 * r.noise.flicker_adev_std + 0.15 * 7e-14
        truth = expected_hdev("cesium_standard", a.tau_s, white_pm_s=3e-12)
        half = 0.5 * (r.hdev.hi - r.hdev.lo)
        assert np.all(np.abs(r.hdev.value - truth) < 3 * half)


def _record(**changes):
    n = 3
    dev = Deviation(np.full(n, 1e-13), np.full(n, 0.9e-13), np.full(n, 1.1e-13), np.full(n, 50.0),
                    np.ones(n, dtype=bool), np.full(n, 1.2e-13))
    hist = ClockHistory(availability=1.0, mean_weight=0.2, recent_weight=0.2, final_weight=0.2,
                        state_days={"active": 60.0}, longest_exclusion_days=0.0, events={})
    base = ClockAssessment(
        clock="X", verdict="keep", reasons=(), repair_suggested=False, role="member",
        type_configured="cesium_standard", type_compared="cesium_standard", adev=dev, hdev=dev,
        hdev_typical=np.full(n, 1e-13), noise=None, frequency=0.0, frequency_std=1e-14,
        drift_per_day=0.0, drift_std_per_day=1e-15, history=hist, white_fm_trend=None,
        drift_trend=None, white_fm_growth=float("nan"), holdover=None)
    return dataclasses.replace(base, **changes)


TAUS = np.array([3600.0, DAY, 10 * DAY])


def test_rules_use_the_lower_confidence_bound_and_the_thresholds():
    s = AssessmentSettings()
    assert decide(_record(), TAUS, 60.0, s, 0.683)[0] == "keep"
    worse = Deviation(np.full(3, 3e-13), np.full(3, 2.5e-13), np.full(3, 3.5e-13),
                      np.full(3, 50.0), np.ones(3, dtype=bool), np.full(3, 4e-13))
    verdict, reasons, _ = decide(_record(hdev=worse), TAUS, 60.0, s, 0.683)
    assert verdict == "watch" and "2x watch threshold" in reasons[0]
    assert "3.0 times the typical" in reasons[0]
    much = dataclasses.replace(worse, value=np.full(3, 6e-13), lo=np.full(3, 5e-13))
    assert decide(_record(hdev=much), TAUS, 60.0, s, 0.683)[0] == "retire"
    # the same evidence under a looser configured threshold is kept
    loose = AssessmentSettings(type_watch_factor=3.0, type_retire_factor=6.0)
    assert decide(_record(hdev=worse), TAUS, 60.0, loose, 0.683)[0] == "keep"


def test_step_rules_and_repair():
    s = AssessmentSettings()
    steps = EventSummary(3, 5e-13, 5e-13, 61100.0, "1")
    hist = dataclasses.replace(_record().history, events={"frequency_step": steps})
    verdict, reasons, repair = decide(_record(history=hist), TAUS, 60.0, s, 0.683)
    assert verdict == "watch" and repair
    assert any("3 frequency steps" in r and "repairing" in r for r in reasons)
    two = dataclasses.replace(_record().history,
                              events={"frequency_step": EventSummary(2, 5e-13, 5e-13, 0, "1")})
    assert decide(_record(history=two), TAUS, 60.0, s, 0.683)[0] == "keep"
    out = dataclasses.replace(_record().history, state_days={"active": 20.0, "excluded": 40.0})
    v, reasons, _ = decide(_record(history=out), TAUS, 60.0, s, 0.683)
    assert v == "watch" and any("excluded or removed for 40.0 days" in r for r in reasons)


def test_what_if_roles():
    s = AssessmentSettings()
    small = np.full(3, 0.01)
    assert what_if_role(np.array([0.002, -0.001, 0.004]), small, s) == "not needed"
    assert what_if_role(np.array([0.3, 0.1, 0.05]), small, s) == "leans on"
    assert what_if_role(np.array([-0.05, 0.0, 0.0]), small, s) == "better without"
    # a fall within the uncertainty does not count
    assert what_if_role(np.array([-0.05, 0.0, 0.0]), np.full(3, 0.04), s) == "minor"
