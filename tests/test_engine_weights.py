"""Weights: inverse variance, the A/N cap by water-filling, self-inclusion."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from ensemble.engine.weights import cap_weights, inverse_variance_weights, relative_cap_weights


def test_inverse_variance_is_optimal():
    # Analytic: the combination variance 1/sum(1/s_i^2) is the minimum over all weight sets
    # summing to 1 (Tavella & Thomas 1991); check against random alternatives.
    rng = np.random.default_rng(3)
    var = np.array([1.0, 4.0, 9.0, 0.5])
    w = inverse_variance_weights(var, np.ones(4, bool))
    best = float(w ** 2 @ var)
    assert best == pytest.approx(1.0 / (1.0 / var).sum(), rel=1e-14)
    for _ in range(200):
        alt = rng.dirichlet(np.ones(4))
        assert alt ** 2 @ var >= best - 1e-15


def test_water_filling_example():
    # Analytic: w = (0.7, 0.2, 0.1) with cap 0.5 -> (0.5, 2/3 * 0.5, 1/3 * 0.5).
    w = cap_weights(np.array([0.7, 0.2, 0.1]), 0.5)
    np.testing.assert_allclose(w, [0.5, 1 / 3, 1 / 6], rtol=1e-14)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(1e-3, 1e3), min_size=2, max_size=12), st.floats(1.0, 4.0))
def test_cap_properties(raw, a):
    w0 = np.array(raw) / np.sum(raw)
    cap = a / len(raw)
    w = cap_weights(w0, cap)
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert (w >= 0).all()
    assert (w <= cap * (1 + 1e-9)).all()
    free = w < cap * (1 - 1e-9)
    if free.sum() >= 2:  # proportional among the uncapped clocks
        ratio = w[free] / w0[free]
        np.testing.assert_allclose(ratio, ratio[0], rtol=1e-9)


def test_self_inclusion_undoes_the_bias():
    # Analytic (derived here): against an optimal scale, clock i shows sigma_i^2 (1 - w_i).
    var = np.array([1.0, 2.0, 4.0, 8.0])
    w_true = inverse_variance_weights(var, np.ones(4, bool))
    seen = var * (1 - w_true)
    w = relative_cap_weights(seen, np.ones(4, bool), cap_factor=4.0,
                             self_inclusion_iterations=60)
    np.testing.assert_allclose(w, w_true, rtol=1e-6)


def test_ineligible_get_zero():
    w = relative_cap_weights(np.array([1.0, 1.0, 1.0]), np.array([True, False, True]), 2.5)
    np.testing.assert_allclose(w, [0.5, 0.0, 0.5])
