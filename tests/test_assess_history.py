"""Records, cleaning, the regular grid and the window layout (ensemble/assess/history.py,
windows.py)."""

import numpy as np
import pandas as pd
import pytest

from ensemble.assess.history import clean_offsets, clock_histories
from ensemble.stability.grid import on_grid
from ensemble.assess.windows import window_layout

DAY = 86400.0
TAU0 = 3600.0


def _events(rows):
    return pd.DataFrame(rows, columns=["mjd", "clock", "kind", "magnitude", "score"])


def test_cleaning_drops_outliers_and_takes_out_steps():
    # Analytic: a phase step b from t_k adds b, a frequency step c adds c (t - t_k).
    mjd = 61000.0 + np.arange(10) / 24
    x = np.zeros((10, 2))
    x[4, 0] = 5e-9                       # outlier reading
    x[6:, 1] += 3e-9                     # phase step from epoch 6
    x[2:, 1] += 1e-13 * 3600.0 * np.arange(8)   # frequency step from epoch 2
    ev = _events([(mjd[4], "A", "outlier", 5e-9, 50.0), (mjd[6], "B", "phase_step", 3e-9, 30.0),
                  (mjd[2], "B", "frequency_step", 1e-13, 20.0)])
    out = clean_offsets(x, mjd, ("A", "B"), ev)
    assert np.isnan(out[4, 0]) and np.count_nonzero(np.isnan(out)) == 1
    np.testing.assert_allclose(out[:, 1], 0.0, atol=1e-18)   # MJD tags resolve ~1 us
    assert x[4, 0] == 5e-9               # the input is not modified


def test_histories_count_states_weights_and_events():
    n = 48
    mjd = 61000.0 + np.arange(n) / 24
    state = np.full((n, 2), 2, dtype=np.int8)
    state[10:22, 1] = 3                  # half a day excluded
    state[30:33, 1] = 3
    weight = np.column_stack([np.full(n, 0.7), np.full(n, 0.3)])
    weight[state[:, 1] == 3] = [1.0, 0.0]
    phase = np.zeros((n, 2))
    phase[:6, 1] = np.nan
    ev = _events([(mjd[3], "B", "outlier", -2e-9, 40.0), (mjd[9], "B", "outlier", 4e-9, 41.0),
                  (mjd[20], "B", "frequency_step", 2e-13, 22.0)])
    a, b = clock_histories(("A", "B"), mjd, np.full(n, TAU0), phase, weight, state, ev)
    assert a.events == {} and a.availability == 1.0
    assert b.availability == pytest.approx(42 / 48)
    assert b.state_days["excluded"] == pytest.approx(15 / 24)
    assert b.longest_exclusion_days == pytest.approx(0.5)
    assert b.excluded_days == pytest.approx(15 / 24)
    assert b.count("outlier") == 2 and b.count("frequency_step", "drift_change") == 1
    assert b.events["outlier"].largest == 4e-9
    assert b.events["outlier"].median == pytest.approx(3e-9, rel=1e-12)
    assert b.mean_weight == pytest.approx(np.mean(weight[:, 1]))
    assert b.final_weight == 0.3


def test_grid_places_rows_and_leaves_gaps():
    elapsed = np.array([0.0, 1.0, 2.0, 5.0, 6.0]) * TAU0
    values = np.arange(10.0).reshape(5, 2)
    slot, misfit, (g,) = on_grid(elapsed, TAU0, values)
    assert slot.tolist() == [0, 1, 2, 5, 6] and misfit == 0.0
    assert g.shape == (7, 2) and np.all(np.isnan(g[3:5]))
    np.testing.assert_array_equal(g[[0, 1, 2, 5, 6]], values)


def test_window_layout_full_and_shortened():
    t = np.arange(0, 120 * DAY + 1, TAU0)
    mjd = 61000.0 + t / DAY
    lay = window_layout(mjd, t, 30.0, 7.0, 8, 2.0)
    assert not lay.shortened and lay.n_windows == 13
    assert lay.stops[-1] == t.size and lay.overlap == pytest.approx(23 / 30)
    assert lay.centre_mjd[-1] == pytest.approx(mjd[-1] - 15.0)
    short = window_layout(mjd[:24 * 20 + 1], t[:24 * 20 + 1], 30.0, 7.0, 8, 2.0)
    # 20 days: L = 20 / (1 + 7 x 7/30) = 7.59 d, step 1.77 d, still 8 windows, same overlap
    assert short.shortened and short.n_windows == 8
    assert short.length_days == pytest.approx(20 / (1 + 7 * 7 / 30))
    assert short.overlap == pytest.approx(23 / 30)
    none = window_layout(mjd[:24 * 5], t[:24 * 5], 30.0, 7.0, 8, 2.0)
    assert none.n_windows == 0 and "too short" in none.note
