"""Internal: maximum-likelihood refinement of the random-walk FM level at start-up.

Over the averaging times of a short start-up stretch the Hadamard variance separates white FM
well but random-walk FM (and the flicker floor it must stand for) poorly: one high point at the
longest averaging time can overstate q2 tenfold, and a filter with too large a q2 follows every
frequency step as if it were wander.  The Kalman-filter likelihood of each clock's difference to
the quietest clock (Tryon & Jones 1983, "estimation of parameters in models for cesium beam
atomic clocks", J. Res. NBS 88(1), 3-16: parameters by maximum likelihood from the
innovations) picks the q2 that makes the innovations white at the sampling interval, which is
the effective level the filter needs.  The profile over q2 (q1 and r held at the hat's values)
is evaluated on a logarithmic grid for every clock at once.
"""

from __future__ import annotations

import numpy as np

from ..model.clockmodel import ClockNoise

#: Multipliers of the start-up q2 tried (log grid, from 1/1000 to 100 times).
GRID = 10.0 ** np.linspace(-3.0, 2.0, 26)


def profile_loglik(diff_s: np.ndarray, t_s: np.ndarray, q1_s: np.ndarray, q2_grid: np.ndarray,
                   r_s2: np.ndarray, drift: np.ndarray) -> np.ndarray:
    """Log-likelihood of difference series under a clock model, for a grid of q2.

    Parameters
    ----------
    diff_s : ndarray, shape (n_epochs, n_series)
        Phase differences [s], NaN where missing.
    t_s : ndarray, shape (n_epochs,)
        Times [s].
    q1_s, r_s2 : ndarray, shape (n_series,)
        White FM level [s] and white PM variance [s^2] of each difference series.
    q2_grid : ndarray, shape (n_series, n_grid)
        Random-walk FM levels to evaluate [1/s].
    drift : ndarray of bool, shape (n_series,)
        Series with an unknown constant drift (a third state with a diffuse prior).

    Returns
    -------
    ndarray, shape (n_series, n_grid)
        Gaussian log-likelihood of the innovations (up to a constant), -1/2 sum(log S + nu^2/S).
    """
    n_s, n_g = q2_grid.shape
    # scaled units (ns, days) keep the 3x3 covariances well conditioned
    ns, day = 1e9, 86400.0
    z = diff_s * ns
    t = t_s / day
    q1 = (q1_s * ns * ns * day)[:, None] * np.ones((1, n_g))
    q2 = q2_grid * ns * ns * day ** 3
    r = (r_s2 * ns * ns)[:, None] * np.ones((1, n_g))
    x = np.zeros((n_s, n_g, 3))
    p = np.zeros((n_s, n_g, 3, 3))
    started = np.zeros(n_s, dtype=bool)
    loglik = np.zeros((n_s, n_g))
    big_y = 1e6      # (ns/d)^2: a diffuse prior on the frequency
    big_d = (1e6 * np.asarray(drift, dtype=float))[:, None]
    last_t = np.full(n_s, np.nan)
    for k in range(t.size):
        zk = z[k]
        ok = np.isfinite(zk)
        if not ok.any():
            continue
        first = ok & ~started
        if first.any():
            x[first] = 0.0
            x[first, :, 0] = zk[first, None]
            p[first] = 0.0
            p[first, :, 0, 0] = r[first]
            p[first, :, 1, 1] = big_y
            p[first, :, 2, 2] = big_d[first]
            started |= first
            last_t[first] = t[k]
        go = ok & started & ~first
        if not go.any():
            continue
        dt = (t[k] - last_t[go])[:, None]
        last_t[go] = t[k]
        xs, ps = x[go], p[go]
        # predict with the exact Phi and Q of the clock model (q3 = 0)
        h = 0.5 * dt * dt
        xs[..., 0] += dt * xs[..., 1] + h * xs[..., 2]
        xs[..., 1] += dt * xs[..., 2]
        phi = np.zeros(dt.shape + (3, 3))
        phi[..., 0, 0] = phi[..., 1, 1] = phi[..., 2, 2] = 1.0
        phi[..., 0, 1] = dt
        phi[..., 0, 2] = h
        phi[..., 1, 2] = dt
        ps = phi @ ps @ np.swapaxes(phi, -1, -2)
        q1g, q2g = q1[go], q2[go]
        ps[..., 0, 0] += q1g * dt + q2g * dt ** 3 / 3.0
        ps[..., 0, 1] += q2g * dt * dt / 2.0
        ps[..., 1, 0] += q2g * dt * dt / 2.0
        ps[..., 1, 1] += q2g * dt
        # update with the phase measurement
        s = ps[..., 0, 0] + r[go]
        nu = zk[go][:, None] - xs[..., 0]
        loglik[go] -= 0.5 * (np.log(s) + nu * nu / s)
        kg = ps[..., :, 0] / s[..., None]
        xs += kg * nu[..., None]
        ps -= kg[..., :, None] * ps[..., 0, :][..., None, :]
        x[go], p[go] = xs, 0.5 * (ps + np.swapaxes(ps, -1, -2))
    return loglik


def refine_q2(stretch_s: np.ndarray, t_s: np.ndarray, noises: dict, drift: np.ndarray) -> dict:
    """Maximum-likelihood q2 of each estimated clock from its difference to the quietest.

    Parameters
    ----------
    stretch_s : ndarray, shape (n_epochs, n_clocks)
        Clock - reference over the start-up stretch [s].
    t_s : ndarray, shape (n_epochs,)
        Times [s].
    noises : dict column -> ClockNoise
        The hat's estimates (None entries are skipped).
    drift : ndarray of bool, shape (n_clocks,)
        Clocks with a drift state.

    Returns
    -------
    dict column -> ClockNoise with q2 replaced for the clocks well above the quietest.
    """
    cols = [i for i, nz in noises.items() if nz is not None]
    if len(cols) < 2 or t_s.size < 48:
        return dict(noises)
    q1 = np.array([noises[i].q1_s for i in cols])
    order = np.argsort(q1)
    best, second = cols[order[0]], cols[order[1]]
    partner = {i: best for i in cols}
    partner[best] = second
    series = np.stack([stretch_s[:, i] - stretch_s[:, partner[i]] for i in cols], axis=1)
    pq1 = np.array([noises[i].q1_s + noises[partner[i]].q1_s for i in cols])
    pr = np.array([noises[i].r_s2 + noises[partner[i]].r_s2 for i in cols])
    pq2 = np.array([noises[i].q2_per_s + noises[partner[i]].q2_per_s for i in cols])
    pdrift = np.array([bool(drift[i] or drift[partner[i]]) for i in cols])
    grid = np.maximum(pq2, 1e-300)[:, None] * GRID[None, :]
    ll = profile_loglik(series, t_s, pq1, grid, pr, pdrift)
    k = np.argmax(ll, axis=1)
    # keep the hat's level unless the data prefer another one significantly (likelihood-ratio
    # test at 1 %: 2 (l_max - l_hat) > chi2_1(0.99) = 6.63)
    at_hat = int(np.argmin(np.abs(np.log10(GRID))))
    keep_hat = 2.0 * (ll[np.arange(len(cols)), k] - ll[:, at_hat]) < 6.63
    # parabolic refinement of the maximum in log q2
    logq = np.log(grid)
    best_q2 = np.exp(logq[np.arange(len(cols)), k])
    inner = (k > 0) & (k < GRID.size - 1)
    for row in np.flatnonzero(inner):
        j = k[row]
        y0, y1, y2 = ll[row, j - 1], ll[row, j], ll[row, j + 1]
        den = y0 - 2 * y1 + y2
        if den < 0:
            shift = 0.5 * (y0 - y2) / den
            step = logq[row, j + 1] - logq[row, j]
            best_q2[row] = np.exp(logq[row, j] + np.clip(shift, -1, 1) * step)
    pair_q2 = dict(zip(cols, best_q2))
    out = dict(noises)
    top = q1.min()
    for i in cols:
        nz = noises[i]
        # Clocks within a factor 10 of the quietest in white FM carry the scale; their pairs
        # are each other, so the likelihood cannot attribute the random walk to one of them:
        # they keep the hat's levels.
        if nz.q1_s < 10.0 * top or keep_hat[cols.index(i)]:
            continue
        q2 = max(pair_q2[i] - noises[partner[i]].q2_per_s, 0.0)
        out[i] = ClockNoise(nz.q1_s, q2, nz.q3_per_s3, nz.r_s2)
    return out
