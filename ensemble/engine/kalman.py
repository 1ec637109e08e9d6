"""Internal: the one Kalman filter over all clocks (Jones-Tryon form, projected frame).

State: for clock i the triple (x_i, y_i, d_i) at positions 3i, 3i+1, 3i+2, held in *scaled
units* (phase in ns, frequency in ns/d, drift in ns/d^2, time in days; units.py), so that the
covariance entries stay within a few decades of each other.  Clocks that do not use a drift state
keep d_i = 0 with zero variance and q3 = 0 (the filter then behaves as a two-state model).

Measurements at one epoch are the differences z_i = x_i - x_R (clock i - reference R) of the
measured clocks, with independent white PM of variance r_i per channel.

Symbols (used in this module only): x state estimate, P its covariance, Phi transition, Q process
noise, H measurement matrix, R measurement noise, S innovation covariance, K gain, nu innovation.

Why not filterpy's ``KalmanFilter.update`` on the hot path: it forms the dense n x n matrix
I - K H and two dense n^3 products, and inverts S explicitly.  Here H is a difference of two unit
rows, so P H^T and A H^T are column differences, and the Joseph product form costs two n x m x n
products; S is factorised by Cholesky instead of inverted.  The result is the same Joseph update
(tests compare with filterpy to 1e-12).  The structure pays off as the ensemble grows: the
benchmark (``benchmarks/bench_engine.py``) measured it 2.3-2.5 x faster than filterpy's update at
100 clocks and 1.2 x at 30, but 0.6-0.9 x (slower, call overhead) at 10 clocks.

Frame.  The common phase, frequency and drift of all clocks are unobservable (Chaffee 1992;
Breakiron 2001; Wright 2008): after every update the state is re-referenced to the v-weighted
mean clock, x -> A x, P -> A P A^T with A = (I - 1 v^T) (x) I_3 over the active clocks.
Because A commutes with Phi and H A = H, this projection is transparent: the estimated
differences between clocks are exactly those of the unprojected filter, while P stays bounded.
The weights v choose which mean clock the frame follows (the time scale's long-term frequency
reference).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg.lapack import dpotrf, dpotrs

from ..units import NS_PER_S, SECONDS_PER_DAY, scale_diffusion

#: Up to this many clocks the prediction and the projection use dense products (faster than
#: strided row and column operations for small matrices).
_DENSE_CLOCKS = 16
#: Scaled-unit factors for (phase, frequency, drift): SI value * factor = scaled value.
SCALE = np.array([NS_PER_S, NS_PER_S * SECONDS_PER_DAY, NS_PER_S * SECONDS_PER_DAY ** 2])


@dataclass
class UpdateResult:
    """Innovations of one measurement update (scaled units: ns)."""

    clocks: np.ndarray          # (m,) column indices of the measured clocks (reference excluded)
    innovation_ns: np.ndarray   # (m,) z - H x_prior
    covariance_ns2: np.ndarray | None  # (m, m) S = H P H^T + R when computed here
    gain: np.ndarray            # (3N, m) Kalman gain used


class EnsembleFilter:
    """Kalman filter over all clocks of an ensemble, in scaled units.

    Parameters
    ----------
    n_clocks : int
        Number of clock columns; every clock starts inactive (no state).
    """

    def __init__(self, n_clocks: int):
        n = 3 * n_clocks
        self.n_clocks = n_clocks
        self.x = np.zeros(n)
        self.P = np.zeros((n, n))
        self.active = np.zeros(n_clocks, dtype=bool)
        #: diffusion coefficients per clock, scaled units (ns^2/d, ns^2/d^3, ns^2/d^5)
        self.q = np.zeros((n_clocks, 3))
        #: white PM variance of each clock's channel, scaled units (ns^2)
        self.r = np.zeros(n_clocks)
        self._q_cache: dict = {}
        self._projector = None
        self._difference_rows: dict = {}  # recent channel sets -> T (dense path, see _rows)

    # ------------------------------------------------------------------ set-up and SI helpers
    def set_noise(self, i: int, q1_s: float, q2_per_s: float, q3_per_s3: float,
                  r_s2: float) -> None:
        """Set clock i's diffusion coefficients and channel noise (SI in, scaled inside)."""
        self.q[i] = [scale_diffusion(q1_s, 1), scale_diffusion(q2_per_s, 2),
                     scale_diffusion(q3_per_s3, 3)]
        self.r[i] = r_s2 * NS_PER_S ** 2
        self._q_cache.clear()

    def activate(self, i: int, state_si: np.ndarray, cov_si: np.ndarray,
                 phase_link: int | None = None) -> None:
        """Give clock i a state.

        Parameters
        ----------
        i : int
            Clock column.
        state_si : ndarray, shape (3,)
            Initial (phase [s], frequency [1], drift [1/s]) in the filter's frame.
        cov_si : ndarray, shape (3, 3)
            Initial covariance of that state, SI units; no correlation with other clocks, except
            when ``phase_link`` is given.
        phase_link : int, optional
            If the initial phase was derived from clock ``phase_link``'s phase estimate plus a
            measured difference, its error is that clock's phase error: the cross-covariance is
            copied from it (the measurement noise is in ``cov_si``).
        """
        s = slice(3 * i, 3 * i + 3)
        self.x[s] = np.asarray(state_si, dtype=float) * SCALE
        self.P[s, :] = 0.0
        self.P[:, s] = 0.0
        self.P[s, s] = np.asarray(cov_si, dtype=float) * np.outer(SCALE, SCALE)
        self._q_cache.clear()
        if phase_link is not None:
            j = 3 * phase_link
            row = self.P[j, :].copy()
            row[s] = 0.0
            self.P[3 * i, :] += row
            self.P[:, 3 * i] += row
            self.P[3 * i, 3 * i] += self.P[j, j]
        self.active[i] = True

    def deactivate(self, i: int) -> None:
        """Remove clock i's state (exact marginalisation: drop its rows and columns)."""
        s = slice(3 * i, 3 * i + 3)
        self.x[s] = 0.0
        self.P[s, :] = 0.0
        self.P[:, s] = 0.0
        self.active[i] = False
        self._q_cache.clear()

    def state_si(self, i: int) -> np.ndarray:
        """Clock i's (phase [s], frequency [1], drift [1/s]) in the filter's frame."""
        return self.x[3 * i:3 * i + 3] / SCALE

    def states_si(self) -> np.ndarray:
        """All states, shape (n_clocks, 3), SI units (zeros for inactive clocks)."""
        return self.x.reshape(-1, 3) / SCALE

    def cov_si(self, i: int, j: int | None = None) -> np.ndarray:
        """The 3x3 covariance block (i, j) in SI units."""
        j = i if j is None else j
        block = self.P[3 * i:3 * i + 3, 3 * j:3 * j + 3]
        return block / np.outer(SCALE, SCALE)

    # ------------------------------------------------------------------------------- predict
    def predict(self, dt_s: float) -> None:
        """Propagate state and covariance over dt with the exact Phi and Q (model/clockmodel.py).

        Small ensembles use dense products with the whole-ensemble Phi and Q (cached per
        interval); larger ones apply Phi by row and column operations, O(n^2).
        """
        t = dt_s / SECONDS_PER_DAY
        if self.n_clocks <= _DENSE_CLOCKS:
            phi, q_full = self._dense_model(dt_s)
            self.x = phi @ self.x
            self.P = phi @ self.P @ phi.T + q_full
            return
        h = 0.5 * t * t
        x3 = self.x.reshape(-1, 3)
        x3[:, 0] += t * x3[:, 1] + h * x3[:, 2]
        x3[:, 1] += t * x3[:, 2]
        n = self.n_clocks
        p4 = self.P.reshape(n, 3, n, 3)
        # P <- Phi P (rows), then (Phi P) Phi^T (columns); rows 1 and 2 are read before they change.
        p4[:, 0] += t * p4[:, 1] + h * p4[:, 2]
        p4[:, 1] += t * p4[:, 2]
        p4[:, :, :, 0] += t * p4[:, :, :, 1] + h * p4[:, :, :, 2]
        p4[:, :, :, 1] += t * p4[:, :, :, 2]
        # Phi P Phi^T is symmetric up to round-off; the update and the projection that follow
        # every prediction re-symmetrise P.
        cached = self._q_cache.get(dt_s)
        if cached is None:
            act = np.flatnonzero(self.active)
            cached = (act, _q_blocks(self.q[act], t))
            if len(self._q_cache) > 32:
                self._q_cache.clear()
            self._q_cache[dt_s] = cached
        act, blocks = cached
        if act.size:
            p4[act, :, act, :] += blocks

    def _dense_model(self, dt_s: float):
        key = ("dense", dt_s)
        cached = self._q_cache.get(key)
        if cached is None:
            t = dt_s / SECONDS_PER_DAY
            n = self.n_clocks
            phi1 = np.array([[1.0, t, 0.5 * t * t], [0.0, 1.0, t], [0.0, 0.0, 1.0]])
            phi = np.kron(np.eye(n), phi1)
            q_full = np.zeros((3 * n, 3 * n))
            act = np.flatnonzero(self.active)
            q4 = q_full.reshape(n, 3, n, 3)
            q4[act, :, act, :] = _q_blocks(self.q[act], t)
            if len(self._q_cache) > 32:
                self._q_cache.clear()
            cached = self._q_cache[key] = (phi, q_full)
        return cached

    # -------------------------------------------------------------------------------- update
    def innovation_covariance(self, clocks: np.ndarray, ref: int) -> np.ndarray:
        """S = H P H^T + R for the channels clock - ref of ``clocks`` (scaled units, ns^2)."""
        clocks = np.asarray(clocks)
        if self.n_clocks <= _DENSE_CLOCKS:
            # S = T Pxx T^T with T the difference rows on the phase states
            t = self._rows(clocks, ref)
            pxx = self.P[::3, ::3]
            s = t @ pxx @ t.T
        else:
            px = 3 * clocks
            pr = 3 * ref
            s = (self.P[np.ix_(px, px)] - self.P[px, pr][:, None] - self.P[pr, px][None, :]
                 + self.P[pr, pr])
        s.flat[::clocks.size + 1] += self.r[clocks]
        return s

    def _rows(self, clocks: np.ndarray, ref: int) -> np.ndarray:
        """T, shape (m, n_clocks): row k is +1 at clocks[k], -1 at ref (dense path).

        The channel set rarely changes from one epoch to the next, so the few recent ones are
        kept.  With T, H P = T P[::3] and P H^T = P[:, ::3] T^T: products instead of gathers.
        """
        key = (clocks.tobytes(), int(ref))
        t = self._difference_rows.get(key)
        if t is None:
            if len(self._difference_rows) >= 8:
                self._difference_rows.clear()
            t = np.zeros((clocks.size, self.n_clocks))
            t[np.arange(clocks.size), clocks] = 1.0
            t[:, ref] -= 1.0
            self._difference_rows[key] = t
        return t

    def innovations(self, z_s: np.ndarray, clocks: np.ndarray, ref: int):
        """Innovations and their covariance for measurements z (SI, clock - reference).

        Parameters
        ----------
        z_s : ndarray, shape (m,)
            Measured clock - reference [s] of the clocks in ``clocks``.
        clocks : ndarray of int, shape (m,)
            Measured clocks (reference excluded), all active.
        ref : int
            Reference clock (active).

        Returns
        -------
        nu : ndarray (m,) [ns];  S : ndarray (m, m) [ns^2]
        """
        px = 3 * np.asarray(clocks)
        nu = z_s * NS_PER_S - (self.x[px] - self.x[3 * ref])
        return nu, self.innovation_covariance(clocks, ref)

    def update(self, z_s: np.ndarray, clocks: np.ndarray, ref: int,
               chol: np.ndarray | None = None, symmetrize: bool = True) -> UpdateResult | None:
        """Measurement update with the Joseph form (structured for difference rows).

        P+ = (I - K H) P (I - K H)^T + K R K^T, evaluated as A + (K R - A H^T) K^T with
        A = P - K (P H^T)^T, exact for any gain K.

        Parameters
        ----------
        z_s, clocks, ref
            As for :meth:`innovations`.
        chol : ndarray, optional
            Lower Cholesky factor of S (scaled units) for exactly these channels, when the caller
            has it.
        symmetrize : bool
            Re-symmetrise P afterwards (a caller that projects next, which symmetrises, may skip
            it).
        """
        clocks = np.asarray(clocks, dtype=int)
        if clocks.size == 0:
            return None
        px = 3 * clocks
        pr = 3 * ref
        nu = z_s * NS_PER_S - (self.x[px] - self.x[pr])
        dense = self.n_clocks <= _DENSE_CLOCKS
        if dense:
            t = self._rows(clocks, ref)
            b = self.P[:, ::3] @ t.T                                    # P H^T
        else:
            b = self.P[:, px] - self.P[:, [pr]]
        if chol is None:
            s = b[px, :] - b[pr, :]
            s = 0.5 * (s + s.T)
            s.flat[::clocks.size + 1] += self.r[clocks]
            chol = cholesky(s)
        k, info = dpotrs(chol, b.T, lower=1)                            # K^T = S^-1 H P
        if info:
            raise np.linalg.LinAlgError(f"Cholesky solve failed (info {info})")
        k = k.T
        self.x += k @ nu
        a = self.P - k @ b.T                                            # (I - K H) P
        ah = a[:, ::3] @ t.T if dense else a[:, px] - a[:, [pr]]        # A H^T
        self.P = a + (k * self.r[clocks] - ah) @ k.T
        if symmetrize:
            self._symmetrize()
        return UpdateResult(clocks, nu, None, k)

    def relative_gains(self, result: UpdateResult, ref: int, v: np.ndarray) -> np.ndarray:
        """Correction of each clock's state relative to the v-mean clock per unit residual.

        For a measured clock i (channel i) the unit residual is a unit innovation in its
        channel; for the reference it is -1 in every channel.  Returns (n_clocks, 3) in SI
        units (phase per phase: 1; frequency per phase: 1/s; drift per phase: 1/s^2).
        """
        out = np.zeros((self.n_clocks, 3))
        if result is None:
            return out
        k3 = result.gain.reshape(self.n_clocks, 3, -1)
        rel = k3 - (v @ result.gain.reshape(self.n_clocks, -1)).reshape(1, 3, -1)
        cols = np.arange(result.clocks.size)
        out[result.clocks] = rel[result.clocks, :, cols]
        out[ref] = -rel[ref].sum(axis=1)
        # scaled (ns -> ns, ns/d per ns, ns/d^2 per ns) to SI per s of phase
        return out * (1.0 / SCALE) * SCALE[0]

    # ---------------------------------------------------------------------------- the frame
    def project(self, v: np.ndarray) -> np.ndarray:
        """Re-reference the state to the v-weighted mean clock of the active clocks.

        Parameters
        ----------
        v : ndarray, shape (n_clocks,)
            Non-negative frame weights, zero for inactive clocks, summing to 1.

        Returns
        -------
        ndarray, shape (3,)
            The shift removed, i.e. the v-mean clock's (phase [s], frequency [1], drift [1/s])
            in the frame before the projection.
        """
        n = self.n_clocks
        v = np.asarray(v, dtype=float) * self.active
        if n <= _DENSE_CLOCKS:
            x3 = self.x.reshape(n, 3)
            shift = v @ x3
            key = v.tobytes() + self.active.tobytes()
            if self._projector is None or self._projector[0] != key:
                a = np.eye(3 * n) - np.kron(np.outer(self.active, v), np.eye(3))   # I - U V^T
                self._projector = (key, a)
            a = self._projector[1]
            self.x = a @ self.x
            self.P = a @ self.P @ a.T
            self._symmetrize()
            return shift / SCALE
        everyone = np.count_nonzero(self.active) == n
        act = slice(None) if everyone else np.flatnonzero(self.active)
        x3 = self.x.reshape(n, 3)
        shift = v @ x3
        x3[act] -= shift
        p3 = self.P.reshape(n, 3, 3 * n)
        rows = (v @ self.P.reshape(n, 9 * n)).reshape(3, 3 * n)     # V^T P
        p3[act] -= rows[None]
        pc = self.P.reshape(3 * n, n, 3)
        cols = np.stack([self.P[:, b::3] @ v for b in range(3)], axis=1)   # (A P) V
        pc[:, act, :] -= cols[:, None, :]
        self._symmetrize()
        return shift / SCALE

    # ------------------------------------------------------------------------ corrections
    def correct(self, i: int, delta_si: np.ndarray, inflate_si: np.ndarray | None = None) -> None:
        """Add a step to clock i's state (absorbing a detected jump) and inflate its variance.

        Parameters
        ----------
        delta_si : ndarray, shape (3,)
            Step to add to (phase [s], frequency [1], drift [1/s]).
        inflate_si : ndarray, shape (3,), optional
            Variances added to the diagonal of clock i's block [s^2, 1, 1/s^2].
        """
        s = slice(3 * i, 3 * i + 3)
        self.x[s] += np.asarray(delta_si, dtype=float) * SCALE
        if inflate_si is not None:
            idx = np.arange(3 * i, 3 * i + 3)
            self.P[idx, idx] += np.asarray(inflate_si, dtype=float) * SCALE ** 2

    def min_eigenvalue(self) -> float:
        """Smallest eigenvalue of P restricted to the active states (scaled units)."""
        idx = np.flatnonzero(np.repeat(self.active, 3))
        sub = self.P[np.ix_(idx, idx)]
        keep = np.diag(sub) > 0
        if not keep.any():
            return 0.0
        return float(np.linalg.eigvalsh(sub[np.ix_(keep, keep)])[0])

    def _symmetrize(self) -> None:
        self.P += self.P.T
        self.P *= 0.5

    # ------------------------------------------------------------------------- persistence
    def state_dict(self) -> dict:
        """Everything needed to continue the filter later (arrays only)."""
        return {"x": self.x.copy(), "P": self.P.copy(), "active": self.active.copy(),
                "q": self.q.copy(), "r": self.r.copy()}

    @classmethod
    def from_state(cls, state: dict) -> "EnsembleFilter":
        """Rebuild a filter saved with :meth:`state_dict`."""
        f = cls(len(state["active"]))
        f.x = np.array(state["x"], dtype=float)
        f.P = np.array(state["P"], dtype=float)
        f.active = np.array(state["active"], dtype=bool)
        f.q = np.array(state["q"], dtype=float)
        f.r = np.array(state["r"], dtype=float)
        return f


def cholesky(s: np.ndarray) -> np.ndarray:
    """Lower Cholesky factor of a symmetric positive definite matrix (LAPACK dpotrf).

    Raises numpy.linalg.LinAlgError when the matrix is not positive definite.
    """
    c, info = dpotrf(s, lower=1, clean=1)
    if info:
        raise np.linalg.LinAlgError(f"matrix not positive definite (dpotrf info {info})")
    return c


def cholesky_inverse(c: np.ndarray) -> np.ndarray:
    """Inverse of S from its lower Cholesky factor (full symmetric matrix)."""
    inv, info = dpotrs(c, np.eye(c.shape[0]), lower=1)
    if info:
        raise np.linalg.LinAlgError(f"Cholesky solve failed (info {info})")
    return inv


def _q_blocks(q: np.ndarray, t: float) -> np.ndarray:
    """Exact Q(t) blocks for scaled diffusion coefficients q (k, 3) and t in days."""
    q1, q2, q3 = q[:, 0], q[:, 1], q[:, 2]
    out = np.empty((q.shape[0], 3, 3))
    t2, t3, t4, t5 = t * t, t ** 3, t ** 4, t ** 5
    out[:, 0, 0] = q1 * t + q2 * t3 / 3.0 + q3 * t5 / 20.0
    out[:, 0, 1] = out[:, 1, 0] = q2 * t2 / 2.0 + q3 * t4 / 8.0
    out[:, 1, 1] = q2 * t + q3 * t3 / 3.0
    out[:, 0, 2] = out[:, 2, 0] = q3 * t3 / 6.0
    out[:, 1, 2] = out[:, 2, 1] = q3 * t2 / 2.0
    out[:, 2, 2] = q3 * t
    return out


def reference_filterpy_step(x: np.ndarray, P: np.ndarray, phi: np.ndarray, q: np.ndarray,
                            z: np.ndarray, H: np.ndarray, R: np.ndarray):
    """One predict + update with filterpy's KalmanFilter (dense Joseph form).

    The independent route the tests and the benchmark compare :class:`EnsembleFilter` with.
    All arrays in consistent (scaled) units; returns (x_post, P_post).
    """
    from filterpy.kalman import KalmanFilter

    kf = KalmanFilter(dim_x=len(x), dim_z=len(z))
    kf.x = x.copy()
    kf.P = P.copy()
    kf.predict(F=phi, Q=q)
    kf.update(np.asarray(z, dtype=float), R=R, H=H)
    return kf.x.copy(), kf.P.copy()
