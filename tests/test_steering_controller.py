"""The steering controller: analytic closed-loop responses, limits, dead band, schedule, state."""

import dataclasses
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from ensemble.errors import ConfigError
from ensemble.model import ClockNoise, process_noise
from ensemble.settings import build_section
from ensemble.steering.controller import REASONS, SteeringController, apply_limits, in_dead_band
from ensemble.steering.gains import closed_loop_matrix, critical_gains, lqg_gains
from ensemble.steering.settings import SteeringSettings, load_steering_settings

DAY = 86400.0
MJD0 = 61000.0
# Limits wide enough never to bind, no dead band, no settling: the linear loop.
LINEAR = dict(anchor="first-epoch", settle_d=0.0, dead_band_phase_ns=0.0, max_step=1e-9,
              max_total=1e-6)


def _virtual_loop(settings, master_x0, master_y0, n, drift_per_s=0.0, tau=DAY):
    """Run the controller in virtual mode on an exactly known, noise-free master."""
    ctl = SteeringController(settings)
    x, y = master_x0, master_y0
    out = []
    for k in range(n):
        out.append(ctl.step(MJD0 + k * tau / DAY, tau, (x, y, drift_per_s)))
        x, y = x + tau * y + 0.5 * tau * tau * drift_per_s, y + tau * drift_per_s
    return ctl, out


@pytest.mark.parametrize("T_d", [5.0, 10.0, 30.0])
def test_phase_offset_follows_critically_damped_response(T_d):
    # Cross-check (analytic): closed loop of the critically damped policy with double pole p.
    # With X0 = (x0, 0): x_k = (c0 + c1 k) p^k (repeated root); x_1 = x0 (1 - tau g_x) =
    # x0 p (2 - p) gives c0 = x0, c1 = x0 (1 - p):  x_k = x0 (1 + k (1 - p)) p^k.
    settings = SteeringSettings(time_constant_d=T_d, **LINEAR)
    x0 = 2e-9
    n = int(8 * T_d) + 1
    _, recs = _virtual_loop(settings, x0, 0.0, n)
    k = np.arange(n)
    p = math.exp(-1.0 / T_d)
    err = np.array([r.phase_error_s for r in recs])
    np.testing.assert_allclose(err, x0 * (1 + k * (1 - p)) * p ** k, rtol=1e-11, atol=1e-22)
    # Cross-check (analytic): the continuous critically damped response (1 + t/T) e^(-t/T).
    # k (1 - p) differs from k tau/T by about k (tau/T)^2 / 2, at most tau/(2 e T) x0 near
    # t = T: 3.7 % for T = 5 d, 1.8 % for 10 d, 0.6 % for 30 d; "a few percent" = 4 %.
    t = k / T_d
    assert np.max(np.abs(err / x0 - (1 + t) * np.exp(-t))) < 0.04
    # removed in the chosen time constant: the first-order error term is the pole's
    assert np.max(np.abs(err / x0 - (1 + t) * np.exp(-t))) < 1.05 / (2 * math.e * T_d)
    assert abs(err[-1]) < 0.01 * x0
    assert all(r.reason == "command" and r.clipped == 0 for r in recs)


def test_lqg_response_is_closed_loop_matrix_power():
    # Cross-check (analytic): with exact state the LQG loop is X_k = (Phi - B G)^k X0.
    settings = SteeringSettings(policy="lqg", effort_weight_d2=100.0, **LINEAR)
    x0, y0 = -3e-9, 4e-15
    _, recs = _virtual_loop(settings, x0, y0, 60)
    g_x, g_y = lqg_gains(DAY, 100.0)
    a = closed_loop_matrix(DAY, g_x, g_y)
    state = np.array([x0, y0])
    for r in recs:
        assert r.phase_error_s == pytest.approx(state[0], rel=1e-10, abs=1e-22)
        assert r.frequency_error == pytest.approx(state[1], rel=1e-10, abs=1e-28)
        state = a @ state


@pytest.mark.parametrize("policy", ["critical", "lqg"])
def test_frequency_offset_removed_exactly(policy):
    # Cross-check (analytic): a constant master frequency offset y0 is cancelled exactly:
    # the total correction tends to -y0 and the phase error to 0.  For the critical policy
    # x_k = tau y0 k p^(k+1) (repeated root, x_0 = 0, x_1 = tau y0 (1 - g_y) = tau y0 p^2).
    settings = SteeringSettings(policy=policy, time_constant_d=5.0, **LINEAR)
    y0 = 7e-15
    ctl, recs = _virtual_loop(settings, 0.0, y0, 200)
    assert ctl.total_correction == pytest.approx(-y0, rel=1e-9)
    assert abs(recs[-1].phase_error_s) < 1e-20
    if policy == "critical":
        p = math.exp(-1 / 5.0)
        k = np.arange(len(recs))
        np.testing.assert_allclose([r.phase_error_s for r in recs], DAY * y0 * k * p ** (k + 1),
                                   rtol=1e-10, atol=1e-22)


def test_frequency_offset_removed_under_step_limit():
    # Cross-check (analytic steady state): with the default step limit the same offset is still
    # removed exactly, only more slowly; no change exceeds the limit.
    settings = SteeringSettings(anchor="first-epoch", settle_d=0.0, dead_band_phase_ns=0.0)
    y0 = 2e-14                                   # g_y y0 = 3.6e-15: clipped at first
    ctl, recs = _virtual_loop(settings, 0.0, y0, 400)
    assert ctl.total_correction == pytest.approx(-y0, rel=1e-9)
    assert abs(recs[-1].phase_error_s) < 1e-15
    assert max(abs(r.frequency_correction) for r in recs) <= settings.max_step
    assert sum(r.clipped != 0 for r in recs) > 0


def test_constant_drift_removed_at_command_epochs():
    # Cross-check (analytic, gains.py): drift feed-forward g_d = tau (1 - g_y/2) leaves no phase
    # error at the command epochs; the total correction then ramps by -tau d per command.
    settings = SteeringSettings(**LINEAR)
    d = 2e-16 / DAY
    ctl, recs = _virtual_loop(settings, 1e-9, 1e-15, 300, drift_per_s=d)
    assert abs(recs[-1].phase_error_s) < 1e-15
    assert recs[-1].frequency_correction == pytest.approx(-DAY * d, rel=1e-6)


def test_prediction_and_uncertainty_match_clock_model():
    # Cross-check: predicted phase error and its variance at the next command (derived here,
    # [Phi P Phi^T + Q]_11 of the clock model), recomputed with matrices: h P h^T + Q(h)[0, 0]
    # from ensemble.model.process_noise.
    noise = ClockNoise(q1_s=1e-26, q2_per_s=1e-35, q3_per_s3=1e-48)
    settings = SteeringSettings(anchor="time-of-day", time_of_day_h=0.0, settle_d=0.0)
    ctl = SteeringController(settings, noise=noise)
    state = np.array([1.5e-9, -2e-15, 3e-21])
    cov = np.diag([1e-20, 1e-30, 1e-42])
    cov[0, 1] = cov[1, 0] = 3e-26
    cov[1, 2] = cov[2, 1] = 1e-37
    rec = ctl.step(MJD0 + 0.25, 0.0, state, cov)      # 06:00: between commands
    assert rec.reason == "between-commands" and rec.next_command_mjd == MJD0 + 1.0
    h = 0.75 * DAY
    hv = np.array([1.0, h, 0.5 * h * h])
    assert rec.predicted_phase_error_s == pytest.approx(hv @ state, rel=1e-12)
    var = hv @ cov @ hv + process_noise(noise, h)[0, 0]
    assert rec.predicted_sd_s == pytest.approx(math.sqrt(var), rel=1e-12)


def test_measured_mode_equals_virtual_mode():
    # Cross-check (identity): measuring the output directly (master + accumulated steer) gives
    # the same commands as the virtual synthesizer built on the master.
    base = dict(anchor="first-epoch", settle_d=0.0)
    virt = SteeringController(SteeringSettings(**base))
    meas = SteeringController(SteeringSettings(output="measured", output_channel="OUT", **base))
    x, y, d = 4e-9, -3e-15, 1e-21
    tau = 3600.0
    for k in range(24 * 30):
        rv = virt.step(MJD0 + k / 24, tau, (x, y, d))
        out = (x + virt.steer_phase_s, y + virt.total_correction - rv.frequency_correction, d)
        rm = meas.step(MJD0 + k / 24, tau, out)
        assert rm.frequency_correction == pytest.approx(rv.frequency_correction, rel=1e-9,
                                                        abs=1e-30)
        assert rm.phase_error_s == pytest.approx(rv.phase_error_s, rel=1e-9, abs=1e-21)
        x, y = x + tau * y + 0.5 * tau * tau * d, y + tau * d


def test_schedule_time_of_day_and_settling():
    settings = SteeringSettings(time_of_day_h=6.0, settle_d=2.0)
    ctl = SteeringController(settings)
    start = MJD0 + 0.5                                   # 12:00
    recs = [ctl.step(start + k / 24, 3600.0, (1e-9, 0.0)) for k in range(24 * 5)]
    cmd = [r for r in recs if r.command_epoch]
    # boundaries every day at 06:00 UTC, the first one after the start
    assert [r.mjd for r in cmd] == pytest.approx([MJD0 + 1.25, MJD0 + 2.25, MJD0 + 3.25,
                                                  MJD0 + 4.25, MJD0 + 5.25], rel=0, abs=1e-9)
    assert [r.reason for r in cmd] == ["settling", "settling", "command", "command", "command"]
    assert all(r.frequency_correction == 0 for r in recs if not r.command_epoch)


def test_schedule_with_missing_epochs_and_short_interval():
    settings = SteeringSettings(interval_d=0.25, anchor="first-epoch", settle_d=0.0,
                                time_constant_d=2.0)
    ctl = SteeringController(settings)
    hours = [0, 1, 2, 7, 8, 13, 30, 31]                 # gaps across several boundaries
    recs = []
    last = 0
    for h in hours:
        recs.append(ctl.step(MJD0 + h / 24, (h - last) * 3600.0, (1e-9, 0.0)))
        last = h
    assert [r.command_epoch for r in recs] == [True, False, False, True, False, True, True, False]
    assert recs[-1].next_command_mjd == pytest.approx(MJD0 + 36 / 24, rel=0, abs=1e-9)


def test_no_estimate_holds_and_synthesizer_keeps_running():
    settings = SteeringSettings(anchor="first-epoch", settle_d=0.0)
    ctl = SteeringController(settings)
    r0 = ctl.step(MJD0, 0.0, (5e-9, 0.0))
    r1 = ctl.step(MJD0 + 1, DAY, (math.nan, math.nan))
    assert r1.reason == "hold-no-estimate" and r1.frequency_correction == 0.0
    assert ctl.steer_phase_s == pytest.approx(r0.total_correction * DAY)


def test_bad_call_sequences():
    ctl = SteeringController()
    ctl.step(MJD0, 0.0, (0.0, 0.0))
    with pytest.raises(ValueError, match="increase"):
        ctl.step(MJD0, 0.0, (0.0, 0.0))
    with pytest.raises(ValueError, match="dt_s"):
        ctl.step(MJD0 + 1 / 24, 60.0, (0.0, 0.0))
    ctl.step(MJD0 + 1 / 24, 3601.0, (0.0, 0.0))          # a leap second is accepted


def test_split_run_equals_one_run():
    # Invariant: state_dict -> JSON -> from_state continues exactly where the first part stopped.
    noise = ClockNoise(q1_s=1e-26, q2_per_s=1e-35)
    settings = SteeringSettings(settle_d=1.0, time_of_day_h=3.0)
    rng = np.random.default_rng(7)
    n = 24 * 20
    mjd = MJD0 + 0.3 + np.arange(n) / 24
    states = np.column_stack([2e-9 + np.cumsum(rng.normal(0, 3e-11, n)),
                              4e-15 + rng.normal(0, 1e-16, n), np.full(n, 1e-21)])
    covs = np.repeat(np.diag([1e-21, 1e-32, 1e-44])[None], n, axis=0)
    dt = np.full(n, 3600.0)
    whole = SteeringController(settings, noise=noise).run(mjd, dt, states, covs)
    first = SteeringController(settings, noise=noise)
    part = first.run(mjd[:200], dt[:200], states[:200], covs[:200])
    saved = json.loads(json.dumps(first.state_dict()))
    second = SteeringController.from_state(saved, noise=noise)
    part += second.run(mjd[200:], dt[200:], states[200:], covs[200:])
    assert part == whole
    assert second.state_dict() == json.loads(json.dumps(second.state_dict()))


def test_apply_limits_cases():
    # Analytic cases of the clipping rules.
    assert apply_limits(0.5e-15, 0.0, 1e-15, 3e-13) == (0.5e-15, 0.5e-15, 0)
    assert apply_limits(-4e-15, 0.0, 1e-15, 3e-13) == (-1e-15, -1e-15, 1)
    u, total, clip = apply_limits(0.8e-15, 2.995e-13, 1e-15, 3e-13)
    assert clip == 2 and total == 3e-13 and u == pytest.approx(0.5e-15)
    u, total, clip = apply_limits(5e-15, 2.995e-13, 1e-15, 3e-13)
    assert clip == 3 and total == 3e-13
    # total beyond a lowered limit: only reductions pass, nothing is forced
    assert apply_limits(0.5e-15, 4e-13, 1e-15, 3e-13) == (0.0, 4e-13, 2)
    assert apply_limits(-0.5e-15, 4e-13, 1e-15, 3e-13) == (-0.5e-15, 4e-13 - 0.5e-15, 0)
    assert apply_limits(0.0, 4e-13, 1e-15, 3e-13) == (0.0, 4e-13, 0)


def test_dead_band_definition():
    assert in_dead_band(0.05e-9, 5e-18, 0.1e-9, 1e-17)
    assert not in_dead_band(0.2e-9, 5e-18, 0.1e-9, 1e-17)     # phase too large
    assert not in_dead_band(0.05e-9, 2e-17, 0.1e-9, 1e-17)    # change too large
    assert not in_dead_band(0.0, 0.0, 0.0, 1e-17)             # switched off


finite = dict(allow_nan=False, allow_infinity=False)


@hsettings(max_examples=200, deadline=None)
@given(max_step=st.floats(1e-17, 1e-13), total_factor=st.floats(1.0, 300.0),
       db_phase_ns=st.floats(0.0, 5.0), db_step=st.floats(0.0, 1e-15),
       init_frac=st.floats(-1.0, 1.0), policy=st.sampled_from(["critical", "lqg"]),
       seed=st.integers(0, 2 ** 32 - 1), scale_x=st.floats(1e-12, 1e-5),
       scale_y=st.floats(1e-17, 1e-10))
def test_limits_and_dead_band_hold_for_random_inputs(max_step, total_factor, db_phase_ns, db_step,
                                                     init_frac, policy, seed, scale_x, scale_y):
    # Invariant: whatever the estimates, no change exceeds max_step and no total exceeds
    # max_total (1e-12 relative slack for the rounding of total + change); inside the dead band
    # nothing is commanded; an unclipped command is exactly the proposal.
    max_total = max_step * total_factor
    settings = SteeringSettings(policy=policy, max_step=max_step, max_total=max_total,
                                dead_band_phase_ns=db_phase_ns, dead_band_step=db_step,
                                initial_total_correction=init_frac * max_total,
                                anchor="first-epoch", settle_d=0.0, interval_d=0.5,
                                time_constant_d=3.0)
    ctl = SteeringController(settings)
    rng = np.random.default_rng(seed)
    n = 40
    states = np.column_stack([rng.normal(0, scale_x, n), rng.normal(0, scale_y, n),
                              rng.normal(0, scale_y / DAY, n)])
    for k in range(n):
        r = ctl.step(MJD0 + k / 4, 6 * 3600.0, states[k])
        assert abs(r.frequency_correction) <= max_step * (1 + 1e-12)
        assert abs(r.total_correction) <= max_total * (1 + 1e-12)
        if r.command_epoch and r.reason in ("command", "dead-band"):
            inside = in_dead_band(r.phase_error_s, r.proposed_correction,
                                  db_phase_ns * 1e-9, db_step)
            assert inside == (r.reason == "dead-band")
            if inside:
                assert r.frequency_correction == 0.0
            elif r.clipped == 0:
                assert r.frequency_correction == r.proposed_correction
        else:
            assert r.frequency_correction == 0.0
        assert r.reason in REASONS


def test_settings_validation_names_the_key(tmp_path):
    with pytest.raises(ConfigError, match=r"steering\.time_of_day_h"):
        build_section(SteeringSettings, {"time_of_day_h": 24.0}, "steering")
    with pytest.raises(ConfigError, match=r"steering\.max_step.*exceeds max_total"):
        build_section(SteeringSettings, {"max_step": 1e-12, "max_total": 1e-13}, "steering")
    with pytest.raises(ConfigError, match=r"steering\.output_channel"):
        build_section(SteeringSettings, {"output": "measured"}, "steering")
    with pytest.raises(ConfigError, match=r"steering\.external_file"):
        build_section(SteeringSettings, {"target": "external"}, "steering")
    with pytest.raises(ConfigError, match=r"steering\.polcy.*known keys"):
        build_section(SteeringSettings, {"polcy": "lqg"}, "steering")
    with pytest.raises(ConfigError, match=r"steering\.time_constant_d.*shorter than the interval"):
        build_section(SteeringSettings, {"time_constant_d": 0.5}, "steering")
    cfg = tmp_path / "lab.toml"
    cfg.write_text('[steering]\ntarget = "external"\nexternal_file = "ref.csv"\n')
    s = load_steering_settings(str(cfg))
    assert s.external_file == str(tmp_path / "ref.csv")
    assert dataclasses.asdict(load_steering_settings()) == dataclasses.asdict(SteeringSettings())
    cfg.write_text("[steering\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_steering_settings(str(cfg))


def test_defaults_and_steered_clock():
    # Regression: the documented defaults (docs/steering.md).
    s = SteeringSettings()
    assert (s.policy, s.time_constant_d, s.interval_d, s.max_step, s.max_total) == (
        "critical", 10.0, 1.0, 1e-15, 3e-13)
    assert s.steered_clock("HM1") == "HM1"
    assert SteeringSettings(master_clock="HM2").steered_clock("HM1") == "HM2"
    assert SteeringSettings(output="measured", output_channel="OUT").steered_clock("HM1") == "OUT"
    g_x, g_y = critical_gains(DAY, 10 * DAY)
    ctl = SteeringController(s)
    assert (ctl.g_x, ctl.g_y) == (g_x, g_y)


def test_anti_windup_no_memory_of_clipped_amounts():
    # Invariant (anti-windup): every proposal is the policy on the current estimate alone, and
    # the virtual synthesizer integrates only the applied (clipped) changes.
    settings = SteeringSettings(anchor="first-epoch", settle_d=0.0, time_constant_d=3.0,
                                max_step=1e-15, max_total=4e-15)
    ctl = SteeringController(settings)
    x, y, tau = 50e-9, 0.0, DAY
    steer = 0.0
    total = 0.0
    kinds = set()
    for k in range(60):
        r = ctl.step(MJD0 + k, tau, (x, y, 0.0))
        kinds.add(r.clipped)
        if k:
            steer += total * tau
        assert ctl.steer_phase_s == pytest.approx(steer, rel=1e-12, abs=1e-24)
        expected = -(ctl.g_x * (x + steer) + ctl.g_y * (y + total))
        assert r.proposed_correction == pytest.approx(expected, rel=1e-12, abs=1e-30)
        total += r.frequency_correction
        assert r.total_correction == pytest.approx(total, rel=1e-12, abs=1e-30)
    assert any(c & 1 for c in kinds) and any(c & 2 for c in kinds)   # both limits bound
    assert abs(total) <= settings.max_total


def test_docstring_example():
    import doctest

    import ensemble.steering.controller as module
    assert doctest.testmod(module).failed == 0


def test_changed_interval_between_runs_starts_at_pending_command():
    first = SteeringController(SteeringSettings(anchor="first-epoch", settle_d=0.0))
    for k in range(30):                                   # hourly epochs, daily commands
        first.step(MJD0 + k / 24, 3600.0, (1e-9, 0.0))
    assert first.state_dict()["next_command_mjd"] == MJD0 + 2.0
    new = SteeringSettings(anchor="first-epoch", settle_d=0.0, interval_d=0.5,
                           time_constant_d=5.0)
    second = SteeringController.from_state(first.state_dict(), settings=new)
    recs = [second.step(MJD0 + k / 24, 3600.0, (1e-9, 0.0)) for k in range(30, 72)]
    assert [r.mjd for r in recs if r.command_epoch] == pytest.approx(
        [MJD0 + 2.0, MJD0 + 2.5], rel=0, abs=1e-9)
