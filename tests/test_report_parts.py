"""The report's computations: pair Hadamard variances, the hat estimates, the scale estimate,
cleaning, thinning for plots, and the generic assessment view."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from ensemble.report import clockstability as cs
from ensemble.report import assessment as asm
from ensemble.report.decimate import bucket_means, envelope, spans
from ensemble.report.style import time_unit


def brute_hadamard(x, tau0_s, m):
    """Overlapping Hadamard variance by its definition, term by term (SP 1065, 2008):
    sum (x[i+3m] - 3x[i+2m] + 3x[i+m] - x[i])^2 / (6 tau^2 n) over the terms with all four
    points present."""
    total, n = 0.0, 0
    for i in range(len(x) - 3 * m):
        d = x[i + 3 * m] - 3 * x[i + 2 * m] + 3 * x[i + m] - x[i]
        if np.isfinite(d):
            total += d * d
            n += 1
    return total / (6.0 * (m * tau0_s) ** 2 * n), n


def white_fm_clocks(rng, levels, n, tau0_s=3600.0):
    """Independent white-FM clocks (fractional-frequency samples of std ``levels``) as phase,
    all seen against one common noisy 'scale' series."""
    y = rng.standard_normal((n, len(levels))) * np.asarray(levels)
    x = np.vstack([np.zeros(len(levels)), tau0_s * np.cumsum(y, axis=0)])
    scale = tau0_s * np.cumsum(np.concatenate([[0.0], 3e-13 * rng.standard_normal(n)]))
    return x - scale[:, None]


def test_pair_variances_equal_the_definition_with_gaps(rng):
    x = np.cumsum(rng.standard_normal((400, 4)), axis=0) * 1e-9
    x[rng.random(x.shape) < 0.03] = np.nan
    x[100:120, 2] = np.nan
    for m in (1, 3, 16):
        s, count = cs.pair_hadamard(x, 60.0, m)
        for i in range(4):
            for j in range(i + 1, 4):
                want, n = brute_hadamard(x[:, i] - x[:, j], 60.0, m)
                # Cross-check: brute-force definition; relative 1e-9 allows the cancellation
                # of the expanded quadratic form (E_ij + E_ji - 2 G_ij)
                assert count[i, j] == count[j, i] == n
                assert s[i, j] == pytest.approx(want, rel=1e-9)
                assert s[j, i] == pytest.approx(want, rel=1e-9)
        assert np.isnan(np.diag(s)).all()


def test_pair_variances_equal_the_package_statistic():
    from ensemble.stability import overlapping_avar_hvar

    rng = np.random.default_rng(5)
    x = np.cumsum(rng.standard_normal((300, 3)), axis=0) * 1e-9
    s, count = cs.pair_hadamard(x, 1.0, 4)
    ref = overlapping_avar_hvar(x[:, 0] - x[:, 2], 1.0, [4])
    # Cross-check: the package's overlapping Hadamard variance of the explicit difference
    assert s[0, 2] == pytest.approx(ref.hvar[0], rel=1e-10)
    assert count[0, 2] == ref.n_hvar[0]


LEVELS = (1e-13, 2e-13, 4e-13, 8e-13, 1.6e-12)


def _check_white_fm(st, levels, tau0_s):
    """Every resolved estimate near the white-FM truth; the intervals cover it usually."""
    covered = total = 0
    for i, level in enumerate(levels):
        for k, tau in enumerate(st.tau_s):
            m = tau / tau0_s
            if m > 64:                     # few terms: too loose to say much
                continue
            truth = level * level / m      # Cross-check: analytic, white FM: Hvar = sigma_y^2 tau0/tau
            var, sd = st.variance[i, k], st.variance_sd[i, k]
            assert abs(var - truth) < 4.5 * sd, (i, k, var, truth, sd)
            if np.isfinite(st.deviation[i, k]):
                total += 1
                covered += st.lo[i, k] <= np.sqrt(truth) <= st.hi[i, k]
    assert total >= 20
    assert covered / total > 0.5           # 68.3 % intervals, correlated across tau


def test_hat_recovers_white_fm_levels(rng):
    tau0 = 3600.0
    x = white_fm_clocks(rng, LEVELS, 6000, tau0)
    mjd = 61000.0 + np.arange(x.shape[0]) / 24.0
    st = cs.clock_stability(x, mjd, [f"K{i}" for i in range(5)], tau0)
    assert st.method == "all pairs"
    _check_white_fm(st, LEVELS, tau0)


def test_hat_with_panels_recovers_white_fm_levels(rng, monkeypatch):
    levels = LEVELS + (1.2e-13, 3e-13)
    monkeypatch.setattr(cs, "ALL_PAIRS_MAX", 4)
    monkeypatch.setattr(cs, "PANEL_SIZE", 4)
    tau0 = 3600.0
    x = white_fm_clocks(rng, levels, 6000, tau0)
    mjd = 61000.0 + np.arange(x.shape[0]) / 24.0
    st = cs.clock_stability(x, mjd, [f"K{i}" for i in range(len(levels))], tau0)
    assert st.method.startswith("each clock with the 4 most stable")
    _check_white_fm(st, levels, tau0)


def test_scale_estimate_is_the_weighted_sum(rng):
    tau0 = 3600.0
    x = white_fm_clocks(rng, LEVELS, 3000, tau0)
    mjd = 61000.0 + np.arange(x.shape[0]) / 24.0
    w = np.tile([0.4, 0.3, 0.2, 0.1, 0.0], (x.shape[0], 1))
    st = cs.clock_stability(x, mjd, [f"K{i}" for i in range(5)], tau0, weights=w)
    for k in range(st.tau_s.size):
        want = np.sum(w[0] ** 2 * np.maximum(st.variance[:, k], 0.0))
        want_sd = np.sqrt(np.sum((w[0] ** 2 * st.variance_sd[:, k]) ** 2))
        # Cross-check: sigma_scale^2 = sum_j w_j^2 sigma_j^2 for independent clocks (variance
        # of a weighted sum of independent variables)
        if want > want_sd:
            assert st.scale_deviation[k] ** 2 == pytest.approx(want, rel=1e-12)
        else:
            assert np.isnan(st.scale_deviation[k])
            assert st.scale_hi[k] == pytest.approx(np.sqrt(want + want_sd), rel=1e-12)


def test_two_quiet_clocks_among_noisy_ones_are_bounded_by_their_pair(rng):
    # Two equal quiet clocks beside three noisy ones: the hat cannot split the quiet pair, so
    # each is shown as an upper bound no higher than the pair's own deviation (sigma_i^2 <=
    # sigma_ij^2 for independent clocks, since sigma_j^2 >= 0), and the scale of the two at
    # 0.5 / 0.5 uses half the pair variance each.  Analytic cross-check: for two equal white-FM
    # clocks the true scale variance is 0.25 (s^2 + s^2) = Var(a - b) / 4, exactly what the
    # working values give.
    tau0 = 3600.0
    levels = (1e-15, 1e-15, 1e-13, 2e-13, 4e-13)
    x = white_fm_clocks(rng, levels, 4000, tau0)
    mjd = 61000.0 + np.arange(x.shape[0]) / 24.0
    w = np.tile([0.5, 0.5, 0.0, 0.0, 0.0], (x.shape[0], 1))
    st = cs.clock_stability(x, mjd, [f"K{i}" for i in range(5)], tau0, weights=w)
    k = 0                                                     # tau = tau0
    pair = cs.pair_hadamard(x, tau0, int(st.tau_s[k] / tau0))[0][0, 1]
    assert st.pair_bound[0, k] == pytest.approx(pair, rel=1e-9)
    for i in (0, 1):
        assert np.isnan(st.deviation[i, k])                   # not resolved
        assert st.hi[i, k] <= np.sqrt(pair) * (1 + 1e-9)      # bounded by the pair
    # the noisy clocks are resolved, with their white-FM levels (analytic: Hvar = s^2 at tau0)
    for i in (2, 3, 4):
        assert st.deviation[i, k] == pytest.approx(levels[i], rel=0.15)
    assert st.scale_deviation[k] == pytest.approx(np.sqrt(pair / 4.0), rel=1e-9)
    assert np.sqrt(pair / 4.0) == pytest.approx(np.sqrt(0.5) * 1e-15, rel=0.1)


def test_missing_epochs_become_gaps_not_joins(rng):
    # An epoch missing from the archive (no row at all) must not join its neighbours: with the
    # elapsed times the rows go on the sampling grid, and the pair statistics equal those of the
    # series with a NaN in the missing slot.  Cross-check: the package's overlapping Hadamard
    # variance, whose gap rule skips every term that touches a NaN (SP 1065 gap handling).
    from ensemble.stability import overlapping_avar_hvar

    tau0 = 3600.0
    x = white_fm_clocks(rng, LEVELS[:3], 2000, tau0)
    x[:, 1] += 1e-12 * tau0 * np.arange(x.shape[0])        # a frequency offset between clocks
    keep = np.ones(x.shape[0], dtype=bool)
    keep[[500, 1200]] = False                              # two epochs without a row
    elapsed = tau0 * np.arange(x.shape[0])
    mjd = 61000.0 + elapsed / 86400.0
    st = cs.clock_stability(x[keep], mjd[keep], ["A", "B", "C"], tau0, elapsed_s=elapsed[keep])
    gapped = x.copy()
    gapped[~keep] = np.nan
    want = cs.clock_stability(gapped, mjd, ["A", "B", "C"], tau0)
    np.testing.assert_allclose(st.variance, want.variance, rtol=1e-12)
    direct = overlapping_avar_hvar(gapped[:, 0] - gapped[:, 1], tau0, [1]).hvar[0]
    assert st.pair_bound[0, 0] == pytest.approx(direct, rel=1e-9)


def test_too_few_clocks_give_no_estimate(rng):
    x = white_fm_clocks(rng, LEVELS[:2], 500)
    assert cs.clock_stability(x, np.arange(501.0), ["A", "B"], 3600.0) is None


def test_cleaning_takes_out_steps_and_outliers():
    mjd = 61000.0 + np.arange(10) / 24.0
    x = np.zeros((10, 2))
    x[5:, 1] += 4e-9                          # a step of 4 ns at the sixth epoch
    x[3, 0] = 7e-9                            # a bad reading
    events = pd.DataFrame({"mjd": [mjd[5], mjd[3]], "clock": ["B", "A"],
                           "kind": ["phase_step", "outlier"], "magnitude": [4e-9, 7e-9],
                           "score": [20.0, 30.0]})
    clean = cs.clean_offsets(x, mjd, ["A", "B"], events)
    assert np.isnan(clean[3, 0]) and np.nansum(np.abs(clean[:, 0])) == 0
    np.testing.assert_allclose(clean[:, 1], 0.0, atol=1e-24)
    assert x[3, 0] == 7e-9                    # the input is not changed


def test_extra_taus_replace_nearby_octaves():
    m = cs.factors_for(24 * 400, 3600.0)
    assert {24, 240, 2400} <= set(m.tolist())
    assert 256 not in m and 2048 not in m and 16 in m and 32 in m


# ------------------------------------------------------------------------------ thinning
def test_envelope_keeps_every_runs_extremes(rng):
    t = np.arange(100_000, dtype=float)
    y = rng.standard_normal((100_000, 2))
    y[12_345, 0] = 50.0                       # a single outlier must survive
    y[50_000:52_000, 1] = np.nan              # a gap longer than a run breaks the line
    td, yd = envelope(t, y, 500)
    assert td.size <= 1000 and yd.shape == (td.size, 2)
    assert np.nanmax(yd[:, 0]) == 50.0
    assert np.nanmin(yd[:, 0]) == np.nanmin(y[:, 0])
    assert np.isnan(yd[:, 1]).any()
    assert np.all(np.diff(td) >= 0)
    small_t, small_y = envelope(t[:50], y[:50, 0], 500)
    np.testing.assert_array_equal(small_y, y[:50, 0])


def test_bucket_means_keep_weights_summing_to_one(rng):
    w = rng.random((10_001, 4))
    w /= w.sum(axis=1, keepdims=True)
    td, wm = bucket_means(np.arange(10_001.0), w, 300)
    assert td.size <= 300
    np.testing.assert_allclose(wm.sum(axis=1), 1.0, rtol=1e-12)


def test_spans_find_runs_at_full_resolution():
    codes = np.array([2, 3, 3, 2, 2, 3, 2, 1, 1])
    mjd = np.arange(9.0)
    assert spans(mjd, codes, 3, 1.0) == [(1.0, 3.0), (5.0, 6.0)]
    assert spans(mjd, codes, 1, 0.5) == [(7.0, 8.5)]
    assert spans(mjd, codes, 4, 1.0) == []


def test_time_units():
    assert time_unit([3e-9, -2e-10]) == (1e-9, "ns")
    assert time_unit([4e-4]) == (1e-6, "\u00b5s")
    assert time_unit([np.nan]) == (1e-9, "ns")


# ------------------------------------------------------------------------------ assessment
def test_reasons_in_every_form():
    assert asm.reasons_list('["a", "b"]') == ["a", "b"]
    assert asm.reasons_list("noise grew; steps") == ["noise grew", "steps"]
    assert asm.reasons_list(["x"]) == ["x"]
    assert asm.reasons_list("") == [] and asm.reasons_list(None) == []


def test_group_view_finds_the_verdicts():
    table = np.array([(b"H1", b"keep", b'["fine"]'), (b"C1", b"watch", b"drift")],
                     dtype=[("clock", "S8"), ("verdict", "S8"), ("reasons", "S32")])
    tree = {"clocks": table, "horizon_d": np.array([30.0, 2.0, 1.0]),
            "summary": {"method": "leave-one-out"}, "run": "2026-01-01"}
    view = asm.from_group(tree, ["H1", "C1", "R1"], {"/assessment/horizon_d": "d"}, {})
    assert view.verdicts.columns == ["clock", "verdict", "reasons"]
    assert view.verdicts.rows[0] == ["H1", "keep", ["fine"]]
    assert view.counts() == {"keep": 1, "watch": 1}
    per_clock = view.tables[0]
    assert per_clock.columns == ["clock", "horizon_d"] and per_clock.units["horizon_d"] == "d"
    assert ("/assessment/run", "2026-01-01") in view.values


def test_results_of_the_assessment_api_in_several_forms():
    @dataclasses.dataclass
    class Verdict:
        clock: str
        verdict: str
        reasons: list

    rows = [Verdict("H1", "keep", ["ok"])]
    assert asm.records(rows) == [{"clock": "H1", "verdict": "keep", "reasons": ["ok"]}]
    assert asm.records([{"clock": "H1"}]) == [{"clock": "H1"}]
    assert asm.records(pd.DataFrame({"clock": ["H1"], "verdict": ["keep"]})) == [
        {"clock": "H1", "verdict": "keep"}]
    assert asm.records({"clocks": [{"clock": "H1"}]}) == [{"clock": "H1"}]
    assert asm.records(42) is None
