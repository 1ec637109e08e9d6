"""Clock-type presets: typical power-law noise levels of generic atomic-clock types.

Each preset describes a *type* of clock (never a product) by the levels of its own frequency
noise, in the terms a data sheet or a stability plot uses:

* white FM: Allan deviation ``white_fm_adev_1s`` at tau = 1 s, sigma_y(tau) = a (tau / 1 s)^-1/2;
* flicker FM: the Allan-deviation floor ``flicker_fm_adev`` (constant in tau);
* random-walk FM: Allan deviation ``rw_fm_adev`` reached at ``rw_fm_tau_s``, growing as tau^1/2;
* random-run FM: Hadamard deviation ``rr_fm_hdev`` at ``rr_fm_tau_s``, growing as tau^3/2;
* the typical magnitude of the linear frequency drift ``drift_per_day`` [1/d] and of the
  frequency offset from nominal ``frequency_offset`` [1] (scales for drawing random values, not
  properties every clock of the type has).

White PM is not a clock property: it belongs to the measurement system (``white_pm_s`` arguments
below, the ``[measurement]`` table of a simulator scenario).

The presets map to the power-law spectrum S_y(f) = sum h_alpha f^alpha (IEEE Std 1139-2008;
Riley, Handbook of Frequency Stability Analysis, NIST SP 1065, 2008; the AVAR constants recalled
from memory and reproduced by our own computation, the h_-4 line derived here)::

    h_0  = 2 a^2 * (1 s)                   AVAR_WFM  = h_0 / (2 tau)
    h_-1 = floor^2 / (2 ln 2)              AVAR_FFM  = 2 ln 2 h_-1
    h_-2 = 3 b^2 / (2 pi^2 tau_b)          AVAR_RWFM = (2 pi^2 / 3) h_-2 tau
    h_-4 = q3 / (8 pi^4)                   HVAR_RRFM = (11 pi^4 / 15) h_-4 tau^3

and to the Kalman clock model (our own mapping, :func:`~ensemble.model.clockmodel.q_from_h`):
q1 = h_0 / 2 = a^2 [s], q2 = 2 pi^2 h_-2 = 3 b^2 / tau_b [1/s], q3 = 8 pi^4 h_-4 = 120 c^2 /
(11 tau_c^3) [1/s^3].  The q3 <-> h_-4 relation is our own derivation: a drift performing a
random walk of diffusion q3 has the one-sided spectrum S_y(f) = 2 q3 / (2 pi f)^4; with
HVAR = 11 q3 tau^3 / 120 (:func:`~ensemble.model.clockmodel.hadamard_variance`) it gives the
HVAR constant above.  Flicker FM has no finite-state Markov form (it can only be approximated by
Gauss-Markov states: Davis, Greenhall & Stacey 2005, Metrologia), so
:meth:`ClockPreset.clock_noise` leaves it out; callers that need effective q's near their update
interval must fit them (:mod:`ensemble.stability.fit`).

Values: **typical values** for generic clock types, not any data sheet.  The comment beside each
value in :data:`PRESETS` says where it comes from: a typical level found in published material
(the individual sources were not recorded), a level recalled from memory (not confirmed in a
source), the worked holdover examples of tests/test_holdover.py (our own choice, no source), or
an assumption of common practice with no source.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from .clockmodel import (ClockNoise, q1_from_white_fm, q2_from_random_walk_fm,
                         q3_from_random_run_fm)

#: Seconds per day [s/d].
_DAY_S = 86400.0

#: AVAR / h_-1 of flicker FM, 2 ln 2 (IEEE Std 1139-2008; SP 1065; recalled, reproduced here).
FLICKER_FM_AVAR_FACTOR = 2.0 * math.log(2.0)
#: HVAR / h_-1 of flicker FM, 4 ln 2 - (3/2) ln 3 = 1.124670 (closed form identified numerically
#: here; the value recalled from memory).
FLICKER_FM_HVAR_FACTOR = 4.0 * math.log(2.0) - 1.5 * math.log(3.0)
#: AVAR / (h_-2 tau) of random-walk FM, 2 pi^2 / 3 (IEEE Std 1139-2008; SP 1065; recalled,
#: reproduced here).
RW_FM_AVAR_FACTOR = 2.0 * math.pi ** 2 / 3.0
#: HVAR / (h_-2 tau) of random-walk FM, pi^2 / 3 (half the AVAR factor; recalled, reproduced
#: here).
RW_FM_HVAR_FACTOR = math.pi ** 2 / 3.0
#: HVAR / (h_-4 tau^3) of random-run FM, 11 pi^4 / 15 (derived here from HVAR = 11 q3 tau^3 / 120
#: and q3 = 8 pi^4 h_-4).
RR_FM_HVAR_FACTOR = 11.0 * math.pi ** 4 / 15.0

#: The level fields of a preset that a scenario may override (name -> unit).
LEVEL_FIELDS = {
    "white_fm_adev_1s": "1",
    "flicker_fm_adev": "1",
    "rw_fm_adev": "1",
    "rw_fm_tau_s": "s",
    "rr_fm_hdev": "1",
    "rr_fm_tau_s": "s",
}


@dataclass(frozen=True)
class ClockPreset:
    """Typical noise levels of one clock type (frequency noise of the clock itself).

    Attributes
    ----------
    key : str
        Identifier used in scenarios (``"cesium_standard"``, ...).
    label : str
        Plain-words name of the type.
    white_fm_adev_1s : float
        White-FM Allan deviation at tau = 1 s; sigma_y(tau) = a (tau / 1 s)^-1/2. [1]
    flicker_fm_adev : float
        Flicker-FM floor of the Allan deviation. [1]
    rw_fm_adev : float
        Random-walk-FM Allan deviation reached at ``rw_fm_tau_s``. [1]
    rw_fm_tau_s : float
        Averaging time at which ``rw_fm_adev`` is stated. [s]
    rr_fm_hdev : float
        Random-run-FM Hadamard deviation at ``rr_fm_tau_s`` (0: none). [1]
    rr_fm_tau_s : float
        Averaging time at which ``rr_fm_hdev`` is stated. [s]
    drift_per_day : float
        Typical magnitude of the linear frequency drift. [1/d]
    frequency_offset : float
        Typical magnitude of the frequency offset from nominal. [1]
    """

    key: str
    label: str
    white_fm_adev_1s: float
    flicker_fm_adev: float
    rw_fm_adev: float
    rw_fm_tau_s: float
    rr_fm_hdev: float = 0.0
    rr_fm_tau_s: float = _DAY_S
    drift_per_day: float = 0.0
    frequency_offset: float = 0.0

    def __post_init__(self):
        for name in ("white_fm_adev_1s", "flicker_fm_adev", "rw_fm_adev", "rr_fm_hdev",
                     "drift_per_day", "frequency_offset"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"ClockPreset.{name} must be finite and >= 0, got {value!r}")
        for name in ("rw_fm_tau_s", "rr_fm_tau_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"ClockPreset.{name} must be finite and > 0, got {value!r}")

    @property
    def drift_per_s(self) -> float:
        """Typical magnitude of the linear frequency drift. [1/s]"""
        return self.drift_per_day / _DAY_S

    def with_levels(self, **levels: float) -> "ClockPreset":
        """A copy with some levels replaced (keys of :data:`LEVEL_FIELDS`, same units)."""
        unknown = sorted(set(levels) - set(LEVEL_FIELDS))
        if unknown:
            raise ValueError(f"unknown level(s) {', '.join(unknown)}; known: "
                             f"{', '.join(LEVEL_FIELDS)}")
        return dataclasses.replace(self, **levels)

    def h_coefficients(self) -> dict[int, float]:
        """Power-law coefficients h_alpha of S_y(f) = sum h_alpha f^alpha (one-sided).

        Returns
        -------
        dict
            ``{0: h_0 [s], -1: h_-1 [1], -2: h_-2 [1/s], -4: h_-4 [1/s^3]}``; white PM (alpha = 2)
            and flicker PM (alpha = 1) are measurement noise and are not included.

        Notes
        -----
        From the level definitions and the power-law formulas (module docstring):
        h_0 = 2 a^2 (1 s), h_-1 = floor^2 / (2 ln 2), h_-2 = 3 b^2 / (2 pi^2 tau_b),
        h_-4 = q3 / (8 pi^4) with q3 = 120 c^2 / (11 tau_c^3).
        """
        q3 = q3_from_random_run_fm(self.rr_fm_hdev, self.rr_fm_tau_s)
        return {
            0: 2.0 * self.white_fm_adev_1s ** 2 * 1.0,          # h0 = 2 tau sigma^2 at tau = 1 s
            -1: self.flicker_fm_adev ** 2 / FLICKER_FM_AVAR_FACTOR,
            -2: self.rw_fm_adev ** 2 / (RW_FM_AVAR_FACTOR * self.rw_fm_tau_s),
            -4: q3 / (8.0 * math.pi ** 4),
        }

    def clock_noise(self, white_pm_s: float = 0.0) -> ClockNoise:
        """The Kalman-model noise parameters of this type (mapping in the module docstring).

        Parameters
        ----------
        white_pm_s : float
            Standard deviation of the white PM of the measurement channel, if the caller wants
            it in ``r_s2`` (r = white_pm_s^2); 0 by default (white PM is not a clock property). [s]

        Returns
        -------
        ClockNoise
            q1 = a^2 [s], q2 = 3 b^2 / tau_b [1/s], q3 = 120 c^2 / (11 tau_c^3) [1/s^3].

        Notes
        -----
        Flicker FM cannot be represented by the three-state model and is left out: the q's
        describe white FM, random-walk FM and random-run FM only.  Near the flicker floor the
        model under-predicts the Allan variance by 2 ln 2 h_-1 (use :func:`expected_adev`).
        """
        return ClockNoise(q1_s=q1_from_white_fm(self.white_fm_adev_1s),
                          q2_per_s=q2_from_random_walk_fm(self.rw_fm_adev, self.rw_fm_tau_s),
                          q3_per_s3=q3_from_random_run_fm(self.rr_fm_hdev, self.rr_fm_tau_s),
                          r_s2=float(white_pm_s) ** 2)

    def adev(self, tau_s, white_pm_s: float = 0.0, drift_per_s: float = 0.0) -> np.ndarray:
        """Expected Allan deviation of this type at tau (see :func:`expected_adev`)."""
        return np.sqrt(allan_variance_from_h(self.h_coefficients(), tau_s, white_pm_s,
                                             drift_per_s))

    def hdev(self, tau_s, white_pm_s: float = 0.0) -> np.ndarray:
        """Expected Hadamard deviation of this type at tau (see :func:`expected_hdev`)."""
        return np.sqrt(hadamard_variance_from_h(self.h_coefficients(), tau_s, white_pm_s))


def allan_variance_from_h(h: Mapping[int, float], tau_s, white_pm_s: float = 0.0,
                          drift_per_s: float = 0.0) -> np.ndarray:
    """Allan variance of a power-law clock: the sum of the power-law terms (module docstring).

    sigma_y^2(tau) = 3 s_x^2 / tau^2 + h_0 / (2 tau) + 2 ln 2 h_-1 + (2 pi^2 / 3) h_-2 tau
    + D^2 tau^2 / 2.

    Parameters
    ----------
    h : mapping
        h_alpha by alpha: 0 [s], -1 [1], -2 [1/s]; missing keys count as 0.  Random-run FM
        (alpha = -4) has no stationary Allan variance (it grows with the record length; derived
        here) and is ignored here: use :func:`hadamard_variance_from_h`.
    tau_s : float or ndarray
        Averaging time. [s]
    white_pm_s : float
        Per-sample white-PM standard deviation s_x of the phase data (discrete relation
        3 s_x^2 / tau^2, valid at every tau). [s]
    drift_per_s : float
        Deterministic linear frequency drift D. [1/s]

    Returns
    -------
    ndarray
        Allan variance. [1]
    """
    tau = np.asarray(tau_s, dtype=float)
    return (3.0 * white_pm_s ** 2 / tau ** 2 + h.get(0, 0.0) / (2.0 * tau)
            + FLICKER_FM_AVAR_FACTOR * h.get(-1, 0.0) + RW_FM_AVAR_FACTOR * h.get(-2, 0.0) * tau
            + 0.5 * drift_per_s ** 2 * tau ** 2)


def hadamard_variance_from_h(h: Mapping[int, float], tau_s, white_pm_s: float = 0.0) -> np.ndarray:
    """Hadamard variance of a power-law clock: the sum of the power-law terms (module docstring).

    H sigma_y^2(tau) = 10 s_x^2 / (3 tau^2) + h_0 / (2 tau) + (4 ln 2 - 1.5 ln 3) h_-1
    + (pi^2 / 3) h_-2 tau + (11 pi^4 / 15) h_-4 tau^3.  A linear drift does not contribute.

    Parameters
    ----------
    h : mapping
        h_alpha by alpha: 0 [s], -1 [1], -2 [1/s], -4 [1/s^3]; missing keys count as 0.
    tau_s : float or ndarray
        Averaging time. [s]
    white_pm_s : float
        Per-sample white-PM standard deviation of the phase data. [s]

    Returns
    -------
    ndarray
        Hadamard variance. [1]
    """
    tau = np.asarray(tau_s, dtype=float)
    return (10.0 * white_pm_s ** 2 / (3.0 * tau ** 2) + h.get(0, 0.0) / (2.0 * tau)
            + FLICKER_FM_HVAR_FACTOR * h.get(-1, 0.0) + RW_FM_HVAR_FACTOR * h.get(-2, 0.0) * tau
            + RR_FM_HVAR_FACTOR * h.get(-4, 0.0) * tau ** 3)


# Typical levels for generic types, not any data sheet.  "published" marks a typical level found
# in published material (the individual sources were not recorded); "from memory" a level
# recalled from the literature, not confirmed in a source; "holdover example" a level of our own
# worked holdover examples (tests/test_holdover.py; our choice, no source); the others are
# assumptions of common practice with no source, and say so.
PRESETS: dict[str, ClockPreset] = {
    "hydrogen_maser": ClockPreset(
        key="hydrogen_maser", label="active hydrogen maser",
        white_fm_adev_1s=1.0e-13,     # published: 1-2e-13 at 1 s (our q1 worked example too)
        flicker_fm_adev=1.0e-15,      # published: ~3e-15 at 1e3-1e4 s in total,
                                      # best 4-6e-16 near 1e4 s
        rw_fm_adev=1.0e-15,           # holdover example: RW FM reaching 1e-15 at 10 d
        rw_fm_tau_s=10 * _DAY_S,
        drift_per_day=1.0e-15,        # published: spec < 1e-15/d, observed < 1e-16/d,
                                      # a fleet from -0.2 to +9.6e-15/d
        frequency_offset=1.0e-13,     # assumption (common practice, no source): tuning offset
    ),
    "cesium_standard": ClockPreset(
        key="cesium_standard", label="cesium beam, standard tube",
        white_fm_adev_1s=1.0e-11,     # from memory: ~1e-11 tau^-1/2
        flicker_fm_adev=7.0e-14,      # from memory: floor 5e-14-1e-13
        rw_fm_adev=1.0e-14,           # holdover example: RW FM 1e-14 at 30 d (cesium)
        rw_fm_tau_s=30 * _DAY_S,
        drift_per_day=0.0,            # from memory: no significant drift
        frequency_offset=1.0e-12,     # from memory: accuracy ~1e-12
    ),
    "cesium_high_performance": ClockPreset(
        key="cesium_high_performance", label="cesium beam, high-performance tube",
        white_fm_adev_1s=7.0e-12,     # from memory: 5-8e-12 tau^-1/2
        flicker_fm_adev=1.0e-14,      # published: floor ~1e-14 (< 2e-14 at 5 d)
        rw_fm_adev=1.0e-14,           # holdover example: RW FM 1e-14 at 30 d (cesium)
        rw_fm_tau_s=30 * _DAY_S,
        drift_per_day=0.0,            # published levels give no drift
        frequency_offset=1.0e-12,     # published: accuracy 1e-12
    ),
    "rubidium": ClockPreset(
        key="rubidium", label="rubidium vapour cell (commercial)",
        white_fm_adev_1s=2.0e-11,     # from memory: 1-3e-11 at 1 s
        flicker_fm_adev=3.0e-13,      # from memory: floor 1e-13-1e-12
        rw_fm_adev=3.0e-13,           # assumption (no source): reaches the floor at 10 d
        rw_fm_tau_s=10 * _DAY_S,
        drift_per_day=1.0e-12,        # from memory: 1e-11-5e-11 per month
                                      # (3e-13-1.7e-12 per day)
        frequency_offset=1.0e-11,     # assumption (common practice, no source): calibration offset
    ),
    "chip_scale": ClockPreset(
        key="chip_scale", label="chip-scale atomic clock",
        white_fm_adev_1s=3.0e-10,     # published: 2-6e-10 tau^-1/2
        flicker_fm_adev=8.0e-12,      # published: ~1e-11 at 1 h in total (design target)
        rw_fm_adev=1.0e-11,           # assumption (no source): random walk of 1e-11 at 1 d
        rw_fm_tau_s=_DAY_S,
        drift_per_day=3.0e-11,        # published: ~1e-9 per month
        frequency_offset=5.0e-10,     # assumption (common practice, no source): set-up offset
    ),
}


def get_preset(key: str | ClockPreset) -> ClockPreset:
    """The preset of a clock type (a :class:`ClockPreset` is returned unchanged).

    Raises
    ------
    KeyError
        Unknown key; the message lists the known ones.
    """
    if isinstance(key, ClockPreset):
        return key
    try:
        return PRESETS[key]
    except KeyError:
        raise KeyError(f"unknown clock type {key!r}; known: {', '.join(PRESETS)}") from None


def expected_adev(preset: str | ClockPreset, tau_s, white_pm_s: float = 0.0,
                  drift_per_s: float = 0.0) -> np.ndarray:
    """Expected Allan deviation of a clock of the given type at tau.

    The square root of the sum of the power-law terms (:func:`allan_variance_from_h`):
    white FM, flicker FM and random-walk FM of the type, plus optionally the white PM of the
    measurement and a deterministic drift.  Random-run FM is left out (no stationary AVAR).

    Parameters
    ----------
    preset : str or ClockPreset
        Clock type key (see :data:`PRESETS`) or a preset object.
    tau_s : float or ndarray
        Averaging time. [s]
    white_pm_s : float
        Per-sample white PM of the phase data. [s]
    drift_per_s : float
        Deterministic linear frequency drift. [1/s]

    Returns
    -------
    ndarray
        Allan deviation. [1]

    Examples
    --------
    >>> round(float(expected_adev("cesium_standard", 1.0)) / 1e-11, 6)  # white FM dominates
    1.000024
    """
    return get_preset(preset).adev(tau_s, white_pm_s, drift_per_s)


def expected_hdev(preset: str | ClockPreset, tau_s, white_pm_s: float = 0.0) -> np.ndarray:
    """Expected Hadamard deviation of a clock of the given type at tau.

    The square root of the sum of the power-law terms (:func:`hadamard_variance_from_h`),
    including random-run FM; insensitive to linear drift.

    Parameters
    ----------
    preset : str or ClockPreset
        Clock type key or preset object.
    tau_s : float or ndarray
        Averaging time. [s]
    white_pm_s : float
        Per-sample white PM of the phase data. [s]

    Returns
    -------
    ndarray
        Hadamard deviation. [1]
    """
    return get_preset(preset).hdev(tau_s, white_pm_s)
