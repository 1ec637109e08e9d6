"""External reference: CSV reader, flywheel filter, steering onto the external target."""

import json

import numpy as np
import pytest
import scipy.linalg

from ensemble.errors import InputError
from ensemble.model import ClockNoise, process_noise, transition_matrix
from ensemble.steering.controller import SteeringController
from ensemble.steering.external import ExternalFlywheel, ExternalSeries, read_external
from ensemble.steering.settings import SteeringSettings
from ensemble.units import state_scale

DAY = 86400.0
MJD0 = 61000.0


def _write(tmp_path, text, name="ref.csv"):
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def test_reader_accepts_missing_cells_and_unsorted_rows(tmp_path):
    path = _write(tmp_path, "mjd,offset,uncertainty\n61010,1.5e-08,\n61005.0,1.2e-08,1e-09\n"
                            "61007,,\n\n61012.5,-3e-09,2e-09\n")
    s = read_external(path)
    np.testing.assert_array_equal(s.mjd, [61005.0, 61010.0, 61012.5])
    np.testing.assert_array_equal(s.offset_s, [1.2e-8, 1.5e-8, -3e-9])
    assert s.uncertainty_s[0] == 1e-9 and np.isnan(s.uncertainty_s[1])
    two = read_external(_write(tmp_path, "offset,mjd\n1e-9,61000\n", "two.csv"))
    assert two.mjd.tolist() == [61000.0] and np.isnan(two.uncertainty_s[0])


@pytest.mark.parametrize("text, match", [
    ("mjd,offst\n61000,1e-9\n", r"ref\.csv:1: column 'offst': unknown column"),
    ("mjd,uncertainty\n61000,1e-9\n", r"ref\.csv:1: column 'offset': the header lacks"),
    ("mjd,offset\n61000,1e-9\n61001,1,2e-9\n", r"ref\.csv:3: expected 2 cells"),
    ("mjd,offset\n61000,1e-9\n61001,'1,2e-9'\n", r"ref\.csv:3: expected 2 cells"),
    ("mjd,offset\n61000,abc\n", r"ref\.csv:2: column 'offset': 'abc' is not a number"),
    ("mjd,offset\n,1e-9\n", r"ref\.csv:2: column 'mjd': the epoch is missing"),
    ("mjd,offset\n2460000.5,1e-9\n", r"ref\.csv:2: column 'mjd': MJD .* outside"),
    ("mjd,offset\n61000,12.5\n", r"ref\.csv:2: column 'offset': .*not nanoseconds"),
    ("mjd,offset,uncertainty\n61000,1e-9,-1e-9\n", r"ref\.csv:2: column 'uncertainty': .*> 0"),
    ("mjd,offset\n61000,1e-9\n61001,2e-9\n61000,3e-9\n",
     r"ref\.csv:4: column 'mjd': epoch 61000.0 appears twice \(also on line 2\)"),
    ("mjd,offset\n61000,nan\n", r"ref\.csv:2: column 'offset': 'nan' is not a finite"),
    ("", r"ref\.csv: the file is empty"),
    ("mjd,offset\n61000,\n", r"ref\.csv: no data rows"),
])
def test_reader_errors_name_file_row_column(tmp_path, text, match):
    with pytest.raises(InputError, match=match) as info:
        read_external(_write(tmp_path, text))
    assert "\n" not in str(info.value)


def test_reader_missing_file(tmp_path):
    with pytest.raises(InputError, match="cannot read"):
        read_external(str(tmp_path / "absent.csv"))


def _flywheel(series, q1=1e-27, q2=3e-37, unc=2e-9, rate_sd=1e-13):
    return ExternalFlywheel(series, q1_s=q1, q2_per_s=q2, default_uncertainty_s=unc,
                            rate_sd=rate_sd)


def _dense_filter(series, q1, q2, unc, rate_sd, query):
    """Textbook Kalman filter with matrices (Phi, Q from ensemble.model, scaled by state_scale)."""
    scale = state_scale(2)
    noise = ClockNoise(q1_s=q1, q2_per_s=q2)
    x = p = t = None
    for m, z, u in zip(series.mjd, series.offset_s, series.uncertainty_s):
        if m > query:
            break
        r = (unc if np.isnan(u) else u) ** 2 * 1e18
        if x is None:
            x = np.array([z * 1e9, 0.0])
            p = np.diag([r, (rate_sd * scale[1]) ** 2])
        else:
            dt = (m - t) * DAY
            phi = np.diag(scale) @ transition_matrix(dt, 2) @ np.diag(1 / scale)
            q = process_noise(noise, dt, 2) * np.outer(scale, scale)
            x, p = phi @ x, phi @ p @ phi.T + q
            h = np.array([[1.0, 0.0]])
            k = p @ h.T / (h @ p @ h.T + r)
            x = x + (k * (z * 1e9 - x[0])).ravel()
            p = (np.eye(2) - k @ h) @ p
        t = m
    dt = (query - t) * DAY
    phi = np.diag(scale) @ transition_matrix(dt, 2) @ np.diag(1 / scale)
    q = process_noise(noise, dt, 2) * np.outer(scale, scale)
    return phi @ x / scale, (phi @ p @ phi.T + q) / np.outer(scale, scale)


def test_flywheel_equals_dense_textbook_filter(rng):
    # Cross-check: an independent matrix Kalman filter (Phi, Q from ensemble.model.clockmodel)
    # on irregular points with and without stated uncertainties; agreement to 1e-9 relative.
    mjd = MJD0 + np.cumsum(rng.uniform(0.5, 9.0, 25))
    unc = np.where(rng.random(25) < 0.3, np.nan, rng.uniform(0.5e-9, 3e-9, 25))
    series = ExternalSeries.from_arrays(mjd, 1e-8 + 2e-15 * (mjd - MJD0) * DAY
                                        + rng.normal(0, 1e-9, 25), unc)
    fly = _flywheel(series, q1=1e-26, q2=1e-35)
    for query in (mjd[3] + 0.1, mjd[10], mjd[-1] + 12.0):
        got = fly.estimate(query)
        x_ref, p_ref = _dense_filter(series, 1e-26, 1e-35, 2e-9, 1e-13, query)
        np.testing.assert_allclose(got[:2], x_ref, rtol=1e-9)
        np.testing.assert_allclose([got[2], got[3], got[4]],
                                   [p_ref[0, 0], p_ref[0, 1], p_ref[1, 1]], rtol=1e-9)


def test_flywheel_steady_state_equals_dare():
    # Cross-check: scipy.linalg.solve_discrete_are, the filter as the dual of scipy's control
    # form (filter/control duality, derived here): a-priori
    # P = solve_discrete_are(Phi^T, H^T, Q, R) for regular 5-day points.
    every = 5.0
    q1, q2, unc = 1e-26, 1e-35, 1.5e-9
    mjd = MJD0 + every * np.arange(400)
    fly = _flywheel(ExternalSeries.from_arrays(mjd, np.zeros(mjd.size)), q1, q2, unc)
    fly.advance(mjd[-1])
    _, _, p11, p12, p22, _ = fly.estimate(mjd[-1] + every - 1e-6)
    scale = state_scale(2)
    phi = np.diag(scale) @ transition_matrix(every * DAY, 2) @ np.diag(1 / scale)
    q = process_noise(ClockNoise(q1, q2), every * DAY, 2) * np.outer(scale, scale)
    prior = scipy.linalg.solve_discrete_are(phi.T, np.array([[1.0], [0.0]]), q,
                                            np.array([[unc ** 2 * 1e18]]))
    got = np.array([[p11, p12], [p12, p22]]) * np.outer(scale, scale)
    np.testing.assert_allclose(got, prior, rtol=1e-6)   # 1e-6 d of the query offset


def test_flywheel_recovers_noiseless_line_and_is_causal():
    # Cross-check (analytic): points on an exact line a + b t with tiny noise and q -> 0 give
    # the line back between and beyond the points; a later point is not used before its epoch.
    a, b = 2e-8, 3e-14
    mjd = MJD0 + np.array([0.0, 5.0, 10.0, 15.0, 20.0])
    off = a + b * (mjd - MJD0) * DAY
    fly = _flywheel(ExternalSeries.from_arrays(mjd, off, np.full(5, 1e-13)), q1=0.0, q2=1e-45)
    assert fly.estimate(MJD0 - 1) is None
    est = fly.estimate(MJD0 + 12.5)
    assert est[0] == pytest.approx(a + b * 12.5 * DAY, rel=1e-7)
    assert est[1] == pytest.approx(b, rel=1e-6)
    assert est[5] == pytest.approx(2.5)
    assert fly.n_used == 3


def _external_run(settings, series, days=120, tau=DAY):
    ctl = SteeringController(settings, external=series)
    return ctl, [ctl.step(MJD0 + k * tau / DAY, tau, (0.0, 0.0)) for k in range(int(days * DAY / tau))]


@pytest.mark.parametrize("weight", [1.0, 0.5])
def test_output_follows_blended_external_target(weight):
    # Cross-check (analytic): a master sitting on the scale and an external reference 20 ns
    # ahead of the scale: the output settles at weight * 20 ns from the scale (phase error 0).
    series = ExternalSeries.from_arrays(MJD0 + 5.0 * np.arange(30), np.full(30, 2e-8),
                                        np.full(30, 1e-10))
    settings = SteeringSettings(target="external", external_file="<given>", external_weight=weight,
                                anchor="first-epoch", settle_d=0.0, time_constant_d=5.0,
                                max_step=1e-14, max_total=1e-12, dead_band_phase_ns=0.0)
    ctl, recs = _external_run(settings, series)
    assert abs(recs[-1].phase_error_s) < 1e-12
    assert ctl.steer_phase_s == pytest.approx(weight * 2e-8, rel=1e-3)


def test_holds_before_first_point_and_when_stale():
    series = ExternalSeries.from_arrays([MJD0 + 3.0, MJD0 + 8.0], [1e-9, 1e-9])
    settings = SteeringSettings(target="external", external_file="<given>", anchor="first-epoch",
                                settle_d=0.0, external_max_age_d=10.0)
    _, recs = _external_run(settings, series, days=25)
    reasons = [r.reason for r in recs]
    assert reasons[:3] == ["hold-no-reference"] * 3
    assert np.isnan(recs[0].phase_error_s)
    assert reasons[3] in ("command", "dead-band")
    assert reasons[19:] == ["hold-stale-reference"] * 6        # 8 + 10 days < MJD0 + 19
    assert all(r.frequency_correction == 0 for r in recs if r.reason.startswith("hold"))


def test_split_run_with_external_and_grown_file(rng):
    # Invariant: an incremental run on a grown external series equals one run on it, provided
    # the new points are later than the first run's last epoch.
    mjd = MJD0 + 5.0 * np.arange(12)
    full = ExternalSeries.from_arrays(mjd, rng.normal(1e-8, 1e-9, 12), np.full(12, 1e-9))
    early = ExternalSeries.from_arrays(mjd[:5], full.offset_s[:5], full.uncertainty_s[:5])
    settings = SteeringSettings(target="external", external_file="<given>", settle_d=0.0)
    epochs = MJD0 + 0.25 * np.arange(200)
    states = [(1e-9 * np.sin(k / 9), 1e-15, 0.0) for k in range(200)]
    dt = np.full(200, 6 * 3600.0)
    whole = SteeringController(settings, external=full).run(epochs, dt, states)
    first = SteeringController(settings, external=early)
    part = first.run(epochs[:80], dt[:80], states[:80])          # up to MJD0 + 19.75
    saved = json.loads(json.dumps(first.state_dict()))
    second = SteeringController.from_state(saved, external=full)
    part += second.run(epochs[80:], dt[80:], states[80:])
    assert part == whole
