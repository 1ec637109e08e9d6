"""Each clock's own stability from its pair differences (ensemble/assess/ownstability.py)."""

import numpy as np
import pytest

from ensemble.assess.ownstability import own_stability
from ensemble.model.presets import expected_hdev
from ensemble.simulate import lab_scenario, simulate
from ensemble.stability import overlapping_avar_hvar

TAU0 = 3600.0
CLOCKS = [{"name": "CA", "type": "cesium_standard"},
          {"name": "CB", "type": "cesium_high_performance"},
          {"name": "CC", "type": "cesium_standard"},
          {"name": "RB", "type": "rubidium"}]


def _simulation(seed, days=40.0, clocks=CLOCKS):
    return simulate(lab_scenario(clocks, days, seed=seed, white_pm_s=3e-12))


def test_three_clocks_reproduce_the_three_cornered_hat():
    # Cross-check: Gray & Allan 1974, sigma_A^2 = (s_AB + s_AC - s_BC) / 2 and cyclically
    # (cyclic form re-derived here), from the pair variances computed here independently; with
    # three clocks the hat is exactly determined, so the inverse-variance weights cannot change it.
    sim = _simulation(3, days=20.0, clocks=CLOCKS[:3])
    x = sim.phase_s
    m = [1, 4, 16]
    own = own_stability(x, TAU0, m, "hadamard", clocks=sim.clocks, confidence=0.683)
    pairs = {(a, b): overlapping_avar_hvar(x[:, a] - x[:, b], TAU0, m).hvar
             for a in range(3) for b in range(a + 1, 3)}
    s01, s02, s12 = pairs[(0, 1)], pairs[(0, 2)], pairs[(1, 2)]
    expected = np.array([(s01 + s02 - s12) / 2, (s01 + s12 - s02) / 2, (s02 + s12 - s01) / 2])
    np.testing.assert_allclose(own.variance, expected, rtol=1e-9)


def test_hat_levels_match_the_simulated_clocks_within_their_intervals():
    # Source: the simulator's truth -- each clock's typical levels (expected_hdev of its preset;
    # power-law constants of IEEE Std 1139-2008 and Riley, NIST SP 1065, recalled from memory and
    # reproduced numerically) -- separated with the N-cornered hat (Gray & Allan 1974; the
    # N-clock least-squares form derived here).
    # 10 seeded ensembles x 4 clocks x 3 averaging times.  At tau0 itself the simulated
    # discrete flicker and random-walk FM exceed the continuous formulas by up to 24 %, so the
    # check starts at 4 tau0 (where they agree within a few %).
    covered, z = [], []
    for seed in range(10):
        sim = _simulation(seed)
        own = own_stability(sim.phase_s, TAU0, [4, 24, 96], "hadamard", clocks=sim.clocks,
                            confidence=0.95)
        for i, spec in enumerate(sim.scenario.clocks):
            truth = expected_hdev(spec.preset, own.tau_s, white_pm_s=3e-12)
            covered.append((own.lo[i] <= truth) & (truth <= own.hi[i]))
            z.append((own.variance[i] - truth ** 2) / own.std[i])
    covered, z = np.array(covered), np.array(z)
    # 95 % intervals: at least 85 % of 120 must cover (binomial 2.5 sigma below 95 %).
    assert covered.mean() >= 0.85
    # Standardised errors: no bias beyond 0.35 sigma (0.35 ~ 3.8 / sqrt(120)), spread near 1.
    assert abs(z.mean()) < 0.35
    assert 0.6 < z.std() < 1.5


def test_uncertainty_and_covariance_are_consistent():
    sim = _simulation(1, days=20.0)
    own = own_stability(sim.phase_s, TAU0, [1, 8], "allan", clocks=sim.clocks,
                        confidence=0.683)
    # Regression: the full covariance B C B^T has the hat's own std^2 on its diagonal.
    diag = np.stack([np.diag(c) for c in own.covariance], axis=1)
    np.testing.assert_allclose(diag, own.std ** 2, rtol=1e-10)
    assert np.all(own.resolved[:, 0])
    # a working value never exceeds the quietest pair (the estimate itself may, by chance)
    assert np.all(own.working <= own.upper_bound ** 2 * (1 + 1e-12))


def test_two_quiet_clocks_among_noisy_ones_are_not_resolved():
    # Two masers beside two cesium beams: their pair fixes the sum of their variances, not the
    # split (the pairs with the cesiums carry cross terms ~100 times larger).
    clocks = [{"name": "H1", "type": "hydrogen_maser"}, {"name": "H2", "type": "hydrogen_maser"},
              {"name": "C1", "type": "cesium_standard"}, {"name": "C2", "type": "cesium_standard"}]
    sim = _simulation(2, days=20.0, clocks=clocks)
    own = own_stability(sim.phase_s, TAU0, [24], "hadamard", clocks=sim.clocks,
                        confidence=0.683)
    assert not own.resolved[0, 0] and not own.resolved[1, 0]
    assert own.resolved[2, 0] and own.resolved[3, 0]
    # the working value of an unresolved clock is half its quietest pair (the H1 - H2 pair)
    pair = overlapping_avar_hvar(sim.phase_s[:, 0] - sim.phase_s[:, 1], TAU0, [24]).hvar[0]
    assert own.working[0, 0] == pytest.approx(pair / 2, rel=1e-12)
    assert own.upper_bound[0, 0] == pytest.approx(np.sqrt(pair), rel=1e-12)


def test_gaps_and_too_few_clocks():
    sim = _simulation(4, days=10.0, clocks=CLOCKS[:3])
    x = sim.phase_s.copy()
    x[100:130, 1] = np.nan
    own = own_stability(x, TAU0, [1, 2], "hadamard", clocks=sim.clocks, confidence=0.683)
    assert np.all(np.isfinite(own.variance))
    two = own_stability(x[:, :2], TAU0, [1], "hadamard", clocks=sim.clocks[:2],
                        confidence=0.683)
    assert np.all(np.isnan(two.variance))
