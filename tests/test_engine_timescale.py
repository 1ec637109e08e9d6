"""The ensemble time scale: optimal averaging, continuity, reference invariance, detection,
long-run covariance health."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from ensemble.config import parse_config
from ensemble.engine.timescale import ACTIVE, EXCLUDED, TimeScaleEngine
from ensemble.io.measurements import Measurements
from ensemble.pipeline import form_time_scale
from ensemble.simulate import lab_scenario, simulate
from ensemble.stability import oadev, stability_table


def _white_fm_clocks(n, a=1e-12, days=60.0, seed=3, white_pm=1e-12, **kw):
    clocks = [{"name": f"W{i}", "type": "cesium_standard", "frequency_offset": 0.0,
               "levels": {"white_fm_adev_1s": a, "flicker_fm_adev": 0.0, "rw_fm_adev": 0.0}}
              for i in range(n)]
    return simulate(lab_scenario(clocks, days, seed=seed, white_pm_s=white_pm, **kw))


def _true_scale_error(sim, offset):
    """TA - ideal time, from the reference (its offset carries no measurement noise)."""
    k = np.arange(sim.n_epochs)
    ref = sim.reference.astype(int)
    return sim.true_phase_s[k, ref] - offset[k, ref]


def _config_for(sim, **sections):
    clocks = {c: {"q1_s": sim.noise[c].clock_noise.q1_s, "q2_per_s": 0.0, "r_s2": 1e-24,
                  "drift_state": "no"} for c in sim.clocks}
    return parse_config({"clocks": clocks, **sections})


def test_identical_white_fm_clocks_average_to_one_over_sqrt_n():
    # Source: Tavella & Thomas, Metrologia 28 (1991) 57-63: N independent clocks of equal
    # noise combined with equal weights have sigma/sqrt(N); checked within the 68 % chi-squared
    # interval of the estimate widened to 95 % (Greenhall-Riley EDF for white FM).
    n = 4
    sim = _white_fm_clocks(n)
    res = form_time_scale(sim.measurements(), _config_for(sim), steer=False)
    err = _true_scale_error(sim, res.offset_s)[24 * 5:]
    np.testing.assert_allclose(res.final_weight, 1.0 / n, rtol=0.05)
    rows = stability_table(err, 3600.0, "oadev", taus=[3600.0 * m for m in (4, 16, 64)],
                           alpha=0, confidence=0.95)
    expected = 1e-12 / np.sqrt(np.array([r.tau_s for r in rows])) / np.sqrt(n)
    for row, want in zip(rows, expected):
        assert row.lo <= want <= row.hi, (row.tau_s, row.deviation, want)


def test_scale_is_independent_of_the_measurement_reference():
    # Analytic (derived here): clock - scale must not depend on which clock the comparisons
    # were made against.  Re-expressing data against another clock moves the reference's
    # measurement noise into every channel, so the check uses noise-free comparisons (white PM
    # 1e-16 s, 1e-4 of a clock's hourly noise); the offsets then agree to 1 fs.
    sim = _white_fm_clocks(4, days=20.0, white_pm=1e-16)
    meas = sim.measurements()
    res_a = form_time_scale(meas, _config_for(sim), steer=False)
    new_ref = 2
    phase = meas.phase_s - meas.phase_s[:, [new_ref]]
    other = Measurements(meas.clocks, meas.mjd, meas.elapsed_s, phase,
                         np.full(meas.n_epochs, new_ref), meas.tau0_s)
    res_b = form_time_scale(other, _config_for(sim), steer=False)
    np.testing.assert_allclose(res_b.offset_s, res_a.offset_s, rtol=0, atol=1e-15)
    np.testing.assert_allclose(res_b.frequency, res_a.frequency, rtol=0, atol=1e-18)


def test_continuity_when_a_clock_leaves_and_joins():
    # Analytic (BTSE property, derived here; docs/engine.md): weight changes move the scale only by
    # prediction errors; a clock leaving (gap) or joining must not step the scale by more than
    # the one-step prediction noise of the scale.
    sim = _white_fm_clocks(5, days=40.0, anomalies=[
        {"kind": "leave", "clock": "W1", "day": 15.0},
        {"kind": "join", "clock": "W4", "day": 25.0}])
    cfg = _config_for(sim, ensemble={"probation_days": 2.0})
    res = form_time_scale(sim.measurements(), cfg, steer=False)
    err = _true_scale_error(sim, res.offset_s)
    steps = np.diff(err)
    one_step = 1e-12 * np.sqrt(3600.0) / np.sqrt(4)    # four clocks carry the scale
    for day in (15.0, 25.0, 27.0):                       # leave, join, end of probation
        k = int(day * 24)
        window = np.abs(steps[k - 2:k + 3])
        assert window.max() < 5 * one_step, (day, window.max() / one_step)
    assert res.weight[int(20 * 24), 1] == 0.0          # gone
    assert res.weight[int(26 * 24), 4] == 0.0          # in probation
    assert res.weight[-1, 4] > 0.1                      # admitted


@pytest.mark.parametrize("kind, size, key", [
    ("outlier", 40e-9, "size_s"), ("phase_step", 40e-9, "size_s"),
    ("frequency_step", 3e-12, "size")])
def test_second_difference_signatures_are_classified(kind, size, key):
    # Cross-check: the second-difference signatures derived here (outlier +a,-2a,+a; phase step
    # +b,-b,0; frequency step 0,c tau,0 in the second differences) must be told apart and sized
    # within 20 % (the accuracy of our own seeded GLR checks).
    sim = _white_fm_clocks(4, days=20.0, anomalies=[
        {"kind": kind, "clock": "W2", "day": 12.0, key: size}])
    res = form_time_scale(sim.measurements(), _config_for(sim), steer=False)
    found = [e for e in res.events if e.clock == "W2"]
    assert [e.kind for e in found] == [kind]
    assert found[0].magnitude == pytest.approx(size, rel=0.2)
    assert abs(found[0].mjd - (sim.mjd[0] + 12.0)) <= 3 / 24 + 1e-9
    assert len(res.events) == 1


def test_reference_phase_step_is_attributed_to_the_reference():
    # Cross-check (analytic): a step of the reference shows in every channel; it must be
    # found in the reference itself, and the scale must not follow it.
    sim = _white_fm_clocks(5, days=20.0, anomalies=[
        {"kind": "phase_step", "clock": "W0", "day": 10.0, "size_s": 30e-9}])
    res = form_time_scale(sim.measurements(), _config_for(sim), steer=False)
    assert [(e.clock, e.kind) for e in res.events] == [("W0", "phase_step")]
    err = _true_scale_error(sim, res.offset_s)
    k = int(10 * 24)
    assert np.abs(np.diff(err)[k - 2:k + 3]).max() < 3e-10


def test_long_run_covariance_stays_symmetric_positive_definite():
    # Numerical health (Joseph form and symmetrisation, docs/engine.md): P symmetric, positive
    # definite on the active states, bounded, finite, over two years of hourly steps with drift
    # states and a reference change.
    sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 2}, 730.0, seed=5,
                                reference_changes=[{"day": 400.0, "clock": "H02"}]))
    meas = sim.measurements()
    # start-up on the default 10-day stretch, then step the engine by hand
    res = form_time_scale(meas.select(slice(0, 240)), steer=False)
    eng = res.engine
    largest = []
    for k in range(240, meas.n_epochs):
        eng.step(float(meas.elapsed_s[k]), float(meas.mjd[k]), meas.phase_s[k],
                 int(meas.reference[k]))
        if k % 500 == 0:
            p = eng.filter.P
            assert np.array_equal(p, p.T)
            assert np.isfinite(p).all()
            assert eng.filter.min_eigenvalue() > -1e-12 * np.abs(p).max()
            largest.append(np.abs(np.diag(p)).max())
    assert max(largest[len(largest) // 2:]) < 10 * max(largest[:len(largest) // 2])


def test_excluded_clock_is_readmitted_when_back_in_family():
    sim = _white_fm_clocks(4, days=20.0, anomalies=[
        {"kind": "frequency_step", "clock": "W3", "day": 8.0, "size": 3e-12}])
    cfg = _config_for(sim, ensemble={"relearn_days": 2.0})
    res = form_time_scale(sim.measurements(), cfg, steer=False)
    states = res.state[:, 3]
    k = int(8.5 * 24)
    assert (states[k:k + 24] == EXCLUDED).all()
    assert states[-1] == ACTIVE and res.final_weight[3] > 0.1


def test_startup_levels_ignore_missing_epochs():
    # Epochs missing altogether (no row) must be gaps for the start-up's pair variances, not
    # joins: with clocks 1e-12 apart in frequency, a join of two rows 3 h apart would add a
    # 7 ns jump to a pair difference.  The levels estimated with four epochs dropped must stay
    # those of the complete stretch (within the change four fewer terms can make).
    from ensemble.engine.settings import EnsembleSettings
    from ensemble.engine.startup import build_setups

    sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 3}, 10.0, seed=8))
    meas = sim.measurements()
    keep = np.ones(meas.n_epochs, dtype=bool)
    keep[[40, 41, 130, 200]] = False

    def levels(m):
        _, report = build_setups(m.phase_s, m.elapsed_s, m.reference, m.tau0_s, m.clocks, {},
                                 EnsembleSettings())
        return np.array([n.q1_s for n in report.noise])

    full, gapped = levels(meas), levels(meas.select(keep))
    np.testing.assert_allclose(gapped, full, rtol=0.1)
