"""Clock-type presets: levels, power-law coefficients, Kalman q's and expected deviations."""

import math

import numpy as np
import pytest

from ensemble.model import (ClockNoise, allan_variance, hadamard_variance, q_from_h)
from ensemble.model.presets import (FLICKER_FM_AVAR_FACTOR, FLICKER_FM_HVAR_FACTOR, PRESETS,
                                    RR_FM_HVAR_FACTOR, RW_FM_AVAR_FACTOR, RW_FM_HVAR_FACTOR,
                                    allan_variance_from_h, expected_adev, expected_hdev,
                                    get_preset, hadamard_variance_from_h)

DAY = 86400.0
MONTH = 30 * DAY
TAUS = np.array([1.0, 100.0, 3600.0, DAY, 10 * DAY, 100 * DAY])


def test_five_types_with_the_agreed_keys():
    assert list(PRESETS) == ["hydrogen_maser", "cesium_standard", "cesium_high_performance",
                             "rubidium", "chip_scale"]
    for key, preset in PRESETS.items():
        assert preset.key == key


def test_power_law_constants():
    # Cross-check: IEEE Std 1139-2008 and Riley SP 1065 (2008) power-law AVAR/HVAR constants,
    # recalled (not read in the source) and reproduced by our own computation (the FFM HVAR
    # closed form identified numerically): FFM AVAR 1.386294 h_-1, FFM HVAR 1.124670 h_-1,
    # RWFM AVAR 6.579736 h_-2 tau, RWFM HVAR half of it.
    assert FLICKER_FM_AVAR_FACTOR == pytest.approx(1.386294, abs=5e-7)
    assert FLICKER_FM_HVAR_FACTOR == pytest.approx(1.124670, abs=5e-7)
    assert RW_FM_AVAR_FACTOR == pytest.approx(6.579736, abs=5e-7)
    assert RW_FM_HVAR_FACTOR == pytest.approx(6.579736 / 2, abs=5e-7)


@pytest.mark.parametrize("key", list(PRESETS))
def test_levels_are_reproduced_by_the_expected_deviation(key):
    # Cross-check: the definitions of the levels (sigma_y = a tau^-1/2 at 1 s, the flicker floor,
    # b at tau_b), each term isolated by zeroing the others.
    p = get_preset(key)
    zero = dict(white_fm_adev_1s=0.0, flicker_fm_adev=0.0, rw_fm_adev=0.0)
    only_white = p.with_levels(**{**zero, "white_fm_adev_1s": p.white_fm_adev_1s})
    only_floor = p.with_levels(**{**zero, "flicker_fm_adev": p.flicker_fm_adev})
    only_rw = p.with_levels(**{**zero, "rw_fm_adev": p.rw_fm_adev})
    assert expected_adev(only_white, 1.0) == pytest.approx(p.white_fm_adev_1s, rel=1e-14)
    assert expected_adev(only_white, 400.0) == pytest.approx(p.white_fm_adev_1s / 20, rel=1e-14)
    np.testing.assert_allclose(expected_adev(only_floor, TAUS), p.flicker_fm_adev, rtol=1e-14)
    assert expected_adev(only_rw, p.rw_fm_tau_s) == pytest.approx(p.rw_fm_adev, rel=1e-14)
    assert expected_adev(only_rw, 4 * p.rw_fm_tau_s) == pytest.approx(2 * p.rw_fm_adev, rel=1e-14)


@pytest.mark.parametrize("key", list(PRESETS))
def test_h_coefficients_agree_with_the_kalman_model(key):
    # Cross-check: two independent routes for the same variance.  Power-law route (IEEE Std
    # 1139-2008, recalled: h0/(2 tau) + (2 pi^2/3) h_-2 tau) against the clock-model route
    # (derived here: q1/tau + q2 tau/3 with q1 = h0/2, q2 = 2 pi^2 h_-2, clockmodel.q_from_h),
    # without flicker.
    p = get_preset(key).with_levels(flicker_fm_adev=0.0)
    h = p.h_coefficients()
    q1, q2 = q_from_h(h[0], h[-2])
    noise = p.clock_noise()
    assert noise.q1_s == pytest.approx(q1, rel=1e-14)
    assert noise.q2_per_s == pytest.approx(q2, rel=1e-14)
    np.testing.assert_allclose(allan_variance_from_h(h, TAUS), allan_variance(noise, TAUS),
                               rtol=1e-13)
    np.testing.assert_allclose(hadamard_variance_from_h(h, TAUS), hadamard_variance(noise, TAUS),
                               rtol=1e-13)


def test_random_run_hadamard_term_agrees_with_the_kalman_model():
    # Cross-check: HVAR of random-run FM, 11 q3 tau^3 / 120 (derived here, clockmodel), against
    # (11 pi^4 / 15) h_-4 tau^3 with h_-4 = q3 / (8 pi^4); and the level definition c at tau_c.
    p = get_preset("hydrogen_maser").with_levels(white_fm_adev_1s=0.0, flicker_fm_adev=0.0,
                                                 rw_fm_adev=0.0, rr_fm_hdev=3e-15,
                                                 rr_fm_tau_s=30 * DAY)
    noise = p.clock_noise()
    assert RR_FM_HVAR_FACTOR == pytest.approx(11 * math.pi ** 4 / 15, rel=1e-15)
    np.testing.assert_allclose(hadamard_variance_from_h(p.h_coefficients(), TAUS),
                               hadamard_variance(noise, TAUS), rtol=1e-13)
    assert expected_hdev(p, 30 * DAY) == pytest.approx(3e-15, rel=1e-13)
    # Random-run FM has no stationary AVAR (its AVAR grows with elapsed time, derived here):
    # left out of expected_adev.
    np.testing.assert_array_equal(expected_adev(p, TAUS), 0.0)


def test_white_pm_and_drift_terms():
    # Cross-check: discrete white PM AVAR 3 s_x^2/tau^2, HVAR 10 s_x^2/(3 tau^2); drift AVAR
    # D^2 tau^2/2 and no HVAR (derived here).
    p = get_preset("cesium_standard").with_levels(white_fm_adev_1s=0.0, flicker_fm_adev=0.0,
                                                  rw_fm_adev=0.0)
    sx, d = 5e-12, 1e-18
    assert expected_adev(p, 10.0, white_pm_s=sx) == pytest.approx(math.sqrt(3) * sx / 10, rel=1e-14)
    assert expected_hdev(p, 10.0, white_pm_s=sx) == pytest.approx(math.sqrt(10 / 3) * sx / 10,
                                                                   rel=1e-14)
    assert expected_adev(p, DAY, drift_per_s=d) == pytest.approx(d * DAY / math.sqrt(2), rel=1e-14)


def test_clock_noise_has_no_white_pm_unless_asked():
    p = get_preset("rubidium")
    assert p.clock_noise().r_s2 == 0.0
    assert p.clock_noise(white_pm_s=4e-12).r_s2 == pytest.approx(1.6e-23, rel=1e-14)
    assert isinstance(p.clock_noise(), ClockNoise)


def test_typical_levels_lie_in_the_typical_ranges():
    # Typical values for generic types, not any data sheet: common practice with no single
    # source (partly from memory, partly from published descriptions of generic types).
    m, c, hp, rb, cs = (get_preset(k) for k in PRESETS)
    assert 1e-13 <= expected_adev(m, 1.0) <= 2e-13                        # 1-2e-13 at 1 s
    assert 1e-15 <= expected_adev(m, 1e3) <= 4e-15                        # ~3e-15 at 1e3-1e4 s
    assert 1e-15 <= expected_adev(m, 1e4) <= 4e-15
    assert 1e-16 <= m.drift_per_day <= 1e-14                              # spec/observed/fleet
    assert 0.8e-11 <= c.white_fm_adev_1s <= 1.2e-11                       # ~1e-11 tau^-1/2
    assert 5e-14 <= c.flicker_fm_adev <= 1e-13                            # floor 5e-14-1e-13
    assert 5e-12 <= hp.white_fm_adev_1s <= 8e-12                          # 5-8e-12 tau^-1/2
    assert expected_adev(hp, 5 * DAY) < 2e-14                             # < 2e-14 at 5 d
    assert 1e-11 <= rb.white_fm_adev_1s <= 3e-11                          # 1-3e-11 at 1 s
    assert 1e-13 <= rb.flicker_fm_adev <= 1e-12                           # floor 1e-13-1e-12
    assert 1e-11 <= rb.drift_per_day * 30 <= 5e-11                        # 1-5e-11 per month
    assert 2e-10 <= cs.white_fm_adev_1s <= 6e-10                          # 2-6e-10 tau^-1/2
    assert expected_adev(cs, 3600.0) == pytest.approx(1e-11, rel=0.3)     # ~1e-11 at 1 h
    assert cs.drift_per_day * 30 == pytest.approx(1e-9, rel=0.3)          # ~1e-9 per month
    assert c.drift_per_day == 0.0 and hp.drift_per_day == 0.0             # no significant drift


@pytest.mark.parametrize("tau", [1.0, 3600.0, DAY])
def test_types_are_ordered_by_stability(tau):
    # Typical levels (common practice, no single source), in order (maser < high-performance
    # cesium < standard cesium < rubidium < chip-scale) at 1 s, 1 h and 1 d.
    adev = [float(expected_adev(k, tau)) for k in PRESETS]
    order = [adev[0], adev[2], adev[1], adev[3], adev[4]]
    assert order == sorted(order)


def test_unknown_keys_are_refused_with_the_known_ones():
    with pytest.raises(KeyError, match="known: hydrogen_maser, cesium_standard"):
        get_preset("quartz")
    with pytest.raises(ValueError, match="unknown level"):
        get_preset("rubidium").with_levels(white_pm_s=1e-12)
    with pytest.raises(ValueError, match="rw_fm_tau_s"):
        get_preset("rubidium").with_levels(rw_fm_tau_s=0.0)
