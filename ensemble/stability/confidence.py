"""Chi-squared confidence intervals of stability deviations (internal module).

A variance estimate s^2 with nu equivalent degrees of freedom is modelled as
s^2 = sigma^2 chi^2_nu / nu (Lesage & Audoin 1973; Howe, Allan & Barnes 1981; both recalled from
memory, the interval table checked with scipy in tests/test_edf.py).  For a two-sided interval
of probability C, p_lo = (1 - C)/2 and p_hi = (1 + C)/2::

    var_lo = nu s^2 / chi2.ppf(p_hi, nu)        var_hi = nu s^2 / chi2.ppf(p_lo, nu)

and the deviation bounds are their square roots.  Quantiles from :data:`scipy.stats.chi2`.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

#: Probability of the one-sigma interval of a normal distribution, erf(1/sqrt(2)): the
#: contract's "68.3 %" interval.
CONFIDENCE_68 = 0.6826894921


def check_confidence(confidence: float) -> float:
    """Validate a two-sided confidence level (0 < C < 1); returns it as float."""
    try:
        c = float(confidence)
    except (TypeError, ValueError):
        raise InputError(f"confidence must be a number between 0 and 1, got {confidence!r}") \
            from None
    if not 0.0 < c < 1.0:
        raise InputError(f"confidence must be between 0 and 1 (e.g. 0.95), got {confidence!r}")
    return c


def chi2_factors(edf, confidence: float = CONFIDENCE_68):
    """Multipliers of a variance estimate giving its confidence bounds.

    Parameters
    ----------
    edf : float or array_like
        Equivalent degrees of freedom nu (> 0).
    confidence : float
        Two-sided probability C of the interval.

    Returns
    -------
    (ndarray, ndarray)
        nu / chi2.ppf((1 + C)/2, nu) and nu / chi2.ppf((1 - C)/2, nu): multiply a variance by
        them for its lower and upper bound.
    """
    from scipy.stats import chi2

    c = check_confidence(confidence)
    nu = np.asarray(edf, dtype=float)
    if np.any(~np.isfinite(nu)) or np.any(nu <= 0):
        raise InputError(f"degrees of freedom must be finite and > 0, got {edf!r}")
    return nu / chi2.ppf(0.5 * (1.0 + c), nu), nu / chi2.ppf(0.5 * (1.0 - c), nu)


def deviation_interval(deviation, edf, confidence: float = CONFIDENCE_68):
    """Confidence interval of a deviation (square root of the variance interval).

    Parameters
    ----------
    deviation : float or array_like
        The estimated deviation (same unit as the bounds).
    edf : float or array_like
        Equivalent degrees of freedom.
    confidence : float
        Two-sided probability (default 0.6826894921, the 68.3 % interval).

    Returns
    -------
    (ndarray, ndarray)
        Lower and upper bound.

    Examples
    --------
    >>> lo, hi = deviation_interval(1.0, 10)
    >>> round(float(lo), 6), round(float(hi), 6)
    (0.835497, 1.32679)
    """
    f_lo, f_hi = chi2_factors(edf, confidence)
    dev = np.asarray(deviation, dtype=float)
    return dev * np.sqrt(f_lo), dev * np.sqrt(f_hi)
