"""Clock assessment: the evidence for keeping, watching or retiring each clock of an archive.

Public names:

    assess_archive(path, settings=None, *, what_if=False, config=None, progress=False)
        -> Assessment (records: one ClockAssessment per clock)
    Assessment, ClockAssessment, Deviation, NoiseLevels, Holdover, WhatIf   (result objects)
    AssessmentSettings                                       (the [assessment] section)

Building blocks used by the assessment: :mod:`ensemble.assess.holdover` (time error of a
free-running clock) and :mod:`ensemble.assess.trend` (trend test of windowed statistics).
"""

from __future__ import annotations

import importlib

__all__ = ["assess_archive", "Assessment", "ClockAssessment", "Deviation", "NoiseLevels",
           "Holdover", "WhatIf", "AssessmentSettings"]

_LAZY = {"assess_archive": "core", "Assessment": "records", "ClockAssessment": "records",
         "Deviation": "records", "NoiseLevels": "records", "Holdover": "records",
         "WhatIf": "records", "AssessmentSettings": "settings"}


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
