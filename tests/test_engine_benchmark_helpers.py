"""The engine benchmark's own computations (benchmarks/): the windowed GLR of the detection
calibration, the transparent reduction of the Kalman-plus-weights reference, the resized anomaly
scenario.  No timing here: speed figures are printed by benchmarks/bench_engine.py only."""

from __future__ import annotations

import pathlib
import sys

import numpy as np

BENCH = pathlib.Path(__file__).resolve().parents[1] / "benchmarks"
sys.path.insert(0, str(BENCH))

import anomaly_checks  # noqa: E402
import calibrate_detection  # noqa: E402
import reference_kpw  # noqa: E402
from engine_runs import load_scenario, octave_factors  # noqa: E402


def _brute_window_max(r: np.ndarray, window: int) -> np.ndarray:
    """max over onsets theta in the last W epochs of (sum_{theta..k} r)^2 / (k - theta + 1)."""
    out = np.zeros(r.size)
    for k in range(r.size):
        best = 0.0
        for theta in range(max(0, k - window + 1), k + 1):
            s = r[theta:k + 1].sum()
            best = max(best, s * s / (k - theta + 1))
        out[k] = best
    return out


def test_window_maximum_equals_brute_force_across_blocks(rng):
    # Cross-check: the brute-force definition of the windowed mean-shift GLR (double loop),
    # on one series cut into two blocks (the carry of partial sums joins them).
    r = rng.standard_normal(150)
    w = 24
    m1, _, carry = calibrate_detection.window_maximum(r[:70], w)
    m2, stats_at, _ = calibrate_detection.window_maximum(r[70:], w, carry)
    expected = _brute_window_max(r, w)
    # tolerance: round-off of cumulative sums of 150 unit-variance terms
    np.testing.assert_allclose(np.concatenate([m1, m2]), expected, rtol=1e-10, atol=1e-12)
    assert abs(stats_at(5).max() - expected[75]) < 1e-10


def test_formula_rate_matches_its_definition():
    # Cross-check: 0.11 h ln(W) P(chi2_1 > h), with P(chi2_1 > h) = erfc(sqrt(h / 2))
    # (scipy.special); the engine's window_threshold inverts the same formula.
    from scipy.special import erfc

    from ensemble.engine.detect import window_threshold

    h, w = 20.0, 48
    expected = 0.11 * h * np.log(w) * erfc(np.sqrt(h / 2.0))
    assert abs(calibrate_detection.formula_rate(h, w) / expected - 1.0) < 1e-12
    rate = calibrate_detection.formula_rate(window_threshold(1e-5, w), w)
    assert abs(rate / 1e-5 - 1.0) < 1e-6


def test_transparent_reduction_leaves_the_kpw_scale_unchanged():
    # Cross-check (analytic, our own algebra): P -> P - E A E^T with H E = 0 changes no gain and no
    # estimate, so the KPW scale is the same to round-off with and without the reduction.
    from ensemble.simulate import lab_scenario, simulate

    sim = simulate(lab_scenario({"hydrogen_maser": 2, "cesium_standard": 3}, 4.0, seed=3))
    a = reference_kpw.kpw_for_simulation(sim, reduce=True)
    b = reference_kpw.kpw_for_simulation(sim, reduce=False)
    scale = np.nanmax(np.abs(b.offset_s))
    # tolerance: round-off of a filter whose common-mode variance differs by decades
    assert np.nanmax(np.abs(a.offset_s - b.offset_s)) < 1e-9 * scale
    assert a.max_diag_p[-1] < b.max_diag_p[-1]
    np.testing.assert_allclose(a.weights.sum(), 1.0, rtol=1e-15)


def test_resized_scenario_has_the_required_sizes():
    # Regression: the benchmark's anomaly scenario keeps seed, clocks and events of
    # mixed_lab_anomalies.toml and sets phase steps to 20 sigma_1 and frequency steps to
    # 5 ADEV(1 d) (three significant digits, so within 0.5 %).
    base = load_scenario("mixed_lab_anomalies")
    sized = load_scenario("mixed_lab_anomalies_sized")
    assert sized.seed == base.seed
    assert sized.to_dict()["clocks"] == base.to_dict()["clocks"]
    assert len(sized.anomalies) == len(base.anomalies)
    for a in sized.to_dict()["anomalies"]:
        if a["kind"] not in anomaly_checks.REQUIRED:
            continue
        spec = next(c for c in sized.clocks if c.name == a["clock"])
        h = spec.preset.h_coefficients()
        if a["kind"] == "phase_step":
            ref = anomaly_checks.sigma_one_step_s(h, sized.white_pm_of(spec.name) ** 2,
                                                  sized.tau0_s)
            ratio = abs(a["size_s"]) / ref
        else:
            ratio = abs(a["size"]) / anomaly_checks.adev_day(h)
        assert abs(ratio / anomaly_checks.REQUIRED[a["kind"]] - 1.0) < 5e-3


def test_octave_factors_stop_at_a_tenth_of_the_span():
    # Cross-check: m tau0 <= span / 10 with span = (n - 1) tau0, octaves from 1.
    m = octave_factors(8521, 3600.0)
    assert m[0] == 1 and np.all(np.diff(np.log2(m)) == 1)
    assert m[-1] * 10 <= 8520 < m[-1] * 2 * 10
