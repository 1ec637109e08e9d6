"""Test oracles for the overlapping Hadamard variance: its brute-force definition and its exact
equivalent degrees of freedom.

For a Gaussian phase record with covariance Sigma, the OHVAR at factor m is a quadratic form
d^T d / (6 tau^2 n) of the third differences d = D x, so its EDF is (tr G)^2 / sum G^2 with
G = D Sigma D^T (our own derivation; the usual moment-matching of a quadratic form to a scaled
chi-square).  Used by tests/test_fit.py and tests/test_hat.py.
"""

import numpy as np


def ohvar(x, m, tau0_s):
    """Overlapping Hadamard variance, brute-force definition (Riley, NIST SP 1065, 2008)."""
    d = x[..., 3 * m:] - 3 * x[..., 2 * m:-m] + 3 * x[..., m:-2 * m] - x[..., :-3 * m]
    return np.mean(d * d, axis=-1) / (6.0 * (m * tau0_s) ** 2)


class ExactEdf:
    """Exact EDF of the OHVAR, (tr G)^2 / sum G^2 with G = D Sigma D^T (our own oracle).

    Sigma of the sampled model with x(0) = 0: white FM q1 min(s, t); RW FM
    q2 (s t m - (s + t) m^2 / 2 + m^3 / 3), m = min(s, t); white PM r on the diagonal.
    """

    def __init__(self, n, tau0_s, ms):
        t = np.arange(n) * tau0_s
        s, u = np.meshgrid(t, t, indexing="ij")
        mn = np.minimum(s, u)
        parts = [mn, s * u * mn - (s + u) * mn ** 2 / 2 + mn ** 3 / 3, np.eye(n)]
        self.moments = {}
        for m in ms:
            gs = [self._third_diff(self._third_diff(p, m).T, m) for p in parts]
            self.moments[m] = (np.array([np.trace(g) for g in gs]),
                               np.array([[np.sum(a * b) for b in gs] for a in gs]))

    @staticmethod
    def _third_diff(a, m):
        return a[3 * m:] - 3 * a[2 * m:-m] + 3 * a[m:-2 * m] - a[:-3 * m]

    def __call__(self, m, q1_s, q2_per_s, r_s2=0.0):
        tr, inner = self.moments[m]
        q = np.array([q1_s, q2_per_s, r_s2])
        return float((tr @ q) ** 2 / (q @ inner @ q))
