"""Internal: the archive layout in one place (datasets, units, descriptions, state codes, tables).

Format version 1 of the HDF5 archive (docs/archive.md) plus the project's own additions
(``/filter``, ``/state``, ``/provenance``, ``/assessment``).  The writer, the reader, the
verifier, ``ensemble inspect`` and docs/archive.md all take names, dtypes, units and wording from
here; nothing else spells a dataset path.

Units strings used in ``units`` attributes: ``s`` (seconds), ``1`` (dimensionless number),
``1/d`` (per day), ``d`` (days; MJD), ``none`` (text or code, no physical unit).  Tables carry a
JSON object ``units`` mapping each field to its unit.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from ..units import SECONDS_PER_DAY

#: Archive format version written by this software (docs/archive.md).
FORMAT_VERSION = 1

#: Units string of text fields and codes.
NO_UNIT = "none"

# ---------------------------------------------------------------------------------------------
# Standing of a clock in the ensemble: /scale/state codes (our own; listed in docs/archive.md).
ABSENT = 0
PROBATION = 1
ACTIVE = 2
EXCLUDED = 3
REMOVED = 4
MONITOR = 5

#: Code -> name, stored as the JSON attribute ``codes`` of /scale/state.
STATE_CODES: dict[int, str] = {
    ABSENT: "absent",
    PROBATION: "probation",
    ACTIVE: "active",
    EXCLUDED: "excluded",
    REMOVED: "removed",
    MONITOR: "monitor",
}

#: Code -> one-line meaning (documentation and ``ensemble inspect``).
STATE_MEANINGS: dict[int, str] = {
    ABSENT: "no measurement of the clock at this epoch, or the clock not yet known (weight 0)",
    PROBATION: "measured and predicted, weight 0 while its noise and frequency are learned",
    ACTIVE: "contributes to the scale with its weight",
    EXCLUDED: "weight 0 after an anomaly, still measured, until relearned",
    REMOVED: "taken out of the ensemble (weight 0)",
    MONITOR: "measured against the scale, never weighted (for example the steered output)",
}

# ---------------------------------------------------------------------------------------------
# Event kinds of /events.
#: Kinds every archive reader must expect.
EVENT_KINDS = ("outlier", "phase_step", "frequency_step", "drift_change")
#: Prefix of the measurement-reference kinds (for example ``reference_change``).
REFERENCE_KIND_PREFIX = "reference_"
_KIND_RE = re.compile(r"^[a-z][a-z0-9_]*$")

#: Clock identifier rule (docs/input.md): 1 to 32 characters from A-Z a-z 0-9 _ . -
CLOCK_NAME_RE = re.compile(r"^[A-Za-z0-9_.\-]{1,32}$")
#: Storage size of a clock identifier [bytes].
CLOCK_NAME_BYTES = 32


def is_event_kind(kind: str) -> bool:
    """True for the kinds of format version 1: :data:`EVENT_KINDS` and ``reference_*``."""
    if kind in EVENT_KINDS:
        return True
    return (kind.startswith(REFERENCE_KIND_PREFIX) and len(kind) > len(REFERENCE_KIND_PREFIX)
            and bool(_KIND_RE.match(kind)))


# ---------------------------------------------------------------------------------------------
# Root attributes.
#: Root attribute -> meaning.  All required.
ROOT_ATTRS: dict[str, str] = {
    "format_version": "archive format version (int); readers refuse a newer one",
    "software_version": "version of ensemble that last wrote the archive",
    "created_utc": "time the archive was first written, ISO 8601 UTC",
    "config_toml": "effective configuration of the latest run, as TOML text",
    "input_sha256": "SHA-256 (hex) of the latest run's measurement file",
}


# ---------------------------------------------------------------------------------------------
# Per-epoch datasets.
@dataclass(frozen=True)
class EpochDataset:
    """Declaration of a dataset with one row per epoch, shape (T,) or (T, N).

    Parameters
    ----------
    path : str
        Absolute HDF5 path, e.g. ``"/filter/scale_uncertainty"``; parent groups are created.
    dtype : str
        numpy dtype code of the stored values: ``"f8"``, ``"f4"``, ``"i1"``, ``"i4"``, ``"i8"``
        or ``"u1"``.
    per_clock : bool
        True for shape (T, N), one column per clock in ``/clocks/name`` order; False for (T,).
    units : str
        The ``units`` attribute (``s``, ``1``, ``1/d``, ``d``, ``none`` ...).
    description : str
        One line saying what the values are.
    fill : float or int, optional
        Value of cells never written (rows before a clock was added, rows before the dataset was
        declared).  Default NaN for floats, 0 for integers.
    key : str, optional
        Key of the values in the blocks given to ``ArchiveWriter.append_epochs``.  Default: the
        path without its leading ``/`` (``"filter/scale_uncertainty"``).
    to_archive : float
        Factor applied by the writer to the block values before storing (1 except for the drift,
        whose block values are SI [1/s] and whose archive values are per day).
    """

    path: str
    dtype: str
    per_clock: bool
    units: str
    description: str
    fill: float | int | None = None
    key: str | None = None
    to_archive: float = 1.0

    @property
    def block_key(self) -> str:
        """Key of this dataset's values in an ``append_epochs`` block."""
        return self.key if self.key is not None else self.path.lstrip("/")

    @property
    def fill_value(self):
        """The HDF5 fill value (NaN for float dtypes, 0 for integer dtypes unless declared)."""
        if self.fill is not None:
            return np.array(self.fill, dtype=self.dtype)[()]
        return np.array(np.nan if np.dtype(self.dtype).kind == "f" else 0, dtype=self.dtype)[()]

    @property
    def dimensions(self) -> str:
        """Value of the ``dimensions`` attribute: ``"epoch"`` or ``"epoch,clock"``."""
        return "epoch,clock" if self.per_clock else "epoch"


MJD = EpochDataset("/epochs/mjd", "f8", False, "d",
                   "epoch of each row, Modified Julian Date in UTC", key="mjd")
OFFSET = EpochDataset("/scale/offset", "f8", True, "s",
                      "clock - ensemble time scale; NaN where the clock has no value",
                      key="offset_s")
FREQUENCY = EpochDataset("/scale/frequency", "f8", True, "1",
                         "fractional frequency of the clock relative to the scale",
                         key="frequency")
#: Drift: the writer receives SI [1/s] and stores per day (x 86400).
DRIFT = EpochDataset("/scale/drift", "f8", True, "1/d",
                     "frequency drift of the clock relative to the scale, per day",
                     key="drift_per_s", to_archive=SECONDS_PER_DAY)
WEIGHT = EpochDataset("/scale/weight", "f8", True, "1",
                      "the clock's weight in the scale at that epoch; each row sums to 1",
                      fill=0.0, key="weight")
STATE = EpochDataset("/scale/state", "i1", True, NO_UNIT,
                     "the clock's standing in the ensemble (attribute codes: code -> name)",
                     fill=ABSENT, key="state")

#: The per-epoch datasets of the contract, in archive order.
CONTRACT_EPOCH_DATASETS: tuple[EpochDataset, ...] = (MJD, OFFSET, FREQUENCY, DRIFT, WEIGHT, STATE)

#: Per-epoch figures of the filter the engine is expected to add (declare them when creating).
FILTER_SCALE_UNCERTAINTY = EpochDataset(
    "/filter/scale_uncertainty", "f8", False, "s",
    "estimated standard uncertainty (1 sigma) of the scale's time at that epoch")
FILTER_INNOVATION = EpochDataset(
    "/filter/innovation", "f8", True, "1",
    "standardised innovation of each clock (innovation / its predicted standard deviation); "
    "NaN where not measured")
FILTER_DATASETS: tuple[EpochDataset, ...] = (FILTER_SCALE_UNCERTAINTY, FILTER_INNOVATION)

#: /clocks/name: clock identifiers, the column order of every (T, N) dataset.
CLOCKS_PATH = "/clocks/name"
CLOCKS_UNITS = NO_UNIT
CLOCKS_DESCRIPTION = "clock identifiers, the column order of every (T,N) dataset"


# ---------------------------------------------------------------------------------------------
# Tables (HDF5 compound datasets of one row per record).
@dataclass(frozen=True)
class TableField:
    """One field (column) of a table.

    Parameters
    ----------
    name : str
        Field name.
    dtype : str
        ``"f8"``, ``"f4"``, ``"i8"``, ``"i4"``, ``"i1"``, ``"u1"``, ``"bool"`` or ``"str"``.
    units : str
        Unit of the field (``none`` for text).
    description : str
        One line.
    length : int
        Storage size of a ``"str"`` field in bytes of UTF-8 (ignored for numbers).
    """

    name: str
    dtype: str
    units: str
    description: str
    length: int = 0

    def numpy_dtype(self) -> np.dtype:
        """The numpy dtype of the field as stored in HDF5."""
        if self.dtype == "str":
            if self.length < 1:
                raise ValueError(f"table field '{self.name}': a str field needs length >= 1")
            import h5py
            return h5py.string_dtype("utf-8", self.length)
        if self.dtype == "bool":
            return np.dtype("?")
        return np.dtype(self.dtype)


@dataclass(frozen=True)
class TableSpec:
    """A table: its path, fields (contract fields first) and one-line description."""

    path: str
    fields: tuple[TableField, ...]
    description: str

    def with_fields(self, extra: tuple[TableField, ...]) -> "TableSpec":
        """This table with extra fields appended (names must be new)."""
        names = {f.name for f in self.fields}
        for fld in extra:
            if fld.name in names:
                raise ValueError(f"table {self.path}: field '{fld.name}' declared twice")
            names.add(fld.name)
        return TableSpec(self.path, self.fields + tuple(extra), self.description)

    def numpy_dtype(self) -> np.dtype:
        """The compound dtype of the table."""
        return np.dtype([(f.name, f.numpy_dtype()) for f in self.fields])

    def units(self) -> dict[str, str]:
        """Field -> unit (stored as the JSON attribute ``units``)."""
        return {f.name: f.units for f in self.fields}

    def field_descriptions(self) -> dict[str, str]:
        """Field -> meaning (stored as the JSON attribute ``field_descriptions``)."""
        return {f.name: f.description for f in self.fields}


_MJD_FIELD = TableField("mjd", "f8", "d", "epoch of the record, MJD UTC")

EVENTS = TableSpec("/events", (
    _MJD_FIELD,
    TableField("clock", "str", NO_UNIT, "clock the event concerns", CLOCK_NAME_BYTES),
    TableField("kind", "str", NO_UNIT,
               "outlier, phase_step, frequency_step, drift_change or reference_*", 32),
    TableField("magnitude", "f8", "s (outlier, phase_step, reference_*); 1 (frequency_step); "
               "1/d (drift_change)", "estimated size of the anomaly"),
    TableField("score", "f8", "1", "detection statistic (larger is more certain)"),
), "detected anomalies and reference events, sorted by mjd")

STEERING = TableSpec("/steering", (
    _MJD_FIELD,
    TableField("frequency_correction", "f8", "1",
               "commanded fractional-frequency change of the steered output at that epoch; "
               "> 0 makes the output run faster"),
    TableField("phase_error", "f8", "s", "steered output - target"),
), "steering commands of the steered output (advisory), sorted by mjd")

PROVENANCE = TableSpec("/provenance", (
    TableField("time_utc", "str", NO_UNIT, "time of the run, ISO 8601 UTC", 32),
    TableField("software_version", "str", NO_UNIT, "version of ensemble of the run", 32),
    TableField("mode", "str", NO_UNIT, "create, append, or assess (assessment results only)",
               16),
    TableField("input_name", "str", NO_UNIT, "measurement file of the run as named", 255),
    TableField("input_sha256", "str", NO_UNIT, "SHA-256 (hex) of the measurement file", 64),
    TableField("config_sha256", "str", NO_UNIT, "SHA-256 (hex) of the effective config TOML", 64),
    TableField("epochs_added", "i8", "1", "number of epochs the run added"),
    TableField("first_mjd", "f8", "d", "first epoch added (NaN if none), MJD UTC"),
    TableField("last_mjd", "f8", "d", "last epoch added (NaN if none), MJD UTC"),
), "one record per run that wrote the archive, oldest first")

CONTRACT_TABLES: tuple[TableSpec, ...] = (EVENTS, STEERING)

#: Values of the /provenance field ``mode``.
RUN_MODES = ("create", "append", "assess")

#: Group -> description.
GROUPS: dict[str, str] = {
    "/epochs": "epoch tags of the rows of every per-epoch dataset",
    "/clocks": "clock identifiers",
    "/scale": "the ensemble time scale: each clock relative to the scale",
    "/filter": "per-epoch figures of the ensemble filter",
    "/state": "saved engine state for incremental runs (numeric arrays and JSON-text "
              "attributes only)",
    "/assessment": "per-clock assessment written after the run",
}

#: Paths the generic writers (write_group, write_table) must not touch.
RESERVED_PATHS = ("/epochs", "/clocks", "/scale", "/events", "/steering", "/provenance")
#: Attribute names with a fixed meaning on every object (never state keys).
RESERVED_ATTRS = ("units", "description", "dimensions", "codes", "field_descriptions")

#: Tolerance of "each weight row sums to 1" (docs/archive.md), checked on write and verify.
WEIGHT_SUM_TOL = 1e-12

#: Largest JSON text stored as one attribute [bytes] (HDF5 object-header message limit 64 KiB).
MAX_JSON_ATTR_BYTES = 60000


def default_description(group: str) -> str:
    """Description of a group created on the way to a dataset."""
    return GROUPS.get(group, f"group {group}")
