"""Clock assessment: the evidence for keeping, watching or retiring each clock of an archive.

Public names:

    assess_archive(path, settings=None, *, what_if=False, config=None, progress=False)
        -> Assessment (records: one ClockAssessment per clock)
    Assessment, ClockAssessment, Deviation, NoiseLevels, Holdover, WhatIf   (result objects)
    AssessmentSettings                                       (the [assessment] section)

Building blocks used by the assessment: :mod:`ensemble.assess.holdover` (time error of a
free-running clock) and :mod:`ensemble.assess.trend` (trend test of windowed statistics).
The command is ``ensemble assess`` (docs/assessment.md).  The heavy modules load on first use,
so that reading a configuration (which needs :class:`AssessmentSettings`) stays fast.
"""

from __future__ import annotations

import importlib

__all__ = ["assess_archive", "Assessment", "ClockAssessment", "Deviation", "NoiseLevels",
           "Holdover", "WhatIf", "AssessmentSettings"]

_LAZY = {"Assessment": "records", "ClockAssessment": "records", "Deviation": "records",
         "NoiseLevels": "records", "Holdover": "records", "WhatIf": "records",
         "AssessmentSettings": "settings"}


def assess_archive(path, settings=None, *, what_if: bool = False, config=None,
                   progress: bool = False):
    """Assess every clock of an archive (see :func:`ensemble.assess.core.assess_archive`).

    Parameters
    ----------
    path : path-like
        Archive written by ``ensemble run``.
    settings : AssessmentSettings, optional
        Thresholds and choices (default: the [assessment] section of ``config``, else of the
        archive's configuration).
    what_if : bool
        Re-form the scale without each member clock (one ensemble run per clock, in parallel).
    config : Config or path-like, optional
        Configuration whose [assessment] and [clocks.NAME] types replace the archive's.
    progress : bool
        Progress bar for the what-if runs (on a terminal only).

    Returns
    -------
    Assessment
        One :class:`ClockAssessment` per clock in ``records``; nothing is written.
    """
    from .core import assess_archive as _assess

    return _assess(path, settings, what_if=what_if, config=config, progress=progress)


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
