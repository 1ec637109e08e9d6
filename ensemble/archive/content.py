"""Internal: the :class:`~ensemble.archive.writer.ArchiveWriter` methods for tables and groups.

Events, steering rows, the saved engine state, free groups and tables (``/assessment``), and
the provenance record of the run.  A base class of ``ArchiveWriter``; it uses the writer's open
file ``_f``, its tables ``_tables`` (path -> spec, dataset, pending rows), ``_clocks``, the run
counters and ``_require_open``.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence

import numpy as np

from .. import __version__
from . import schema
from .h5io import get_attr, rows_to_table, set_attr
from .layout import check_event_rows, ensure_group, new_table, to_archive_units, utc_now, write_tree
from .schema import TableField, TableSpec


class ContentWriting:
    """Tables, groups and the run record of an archive being written (see ArchiveWriter)."""

    def _rows(self, path: str, rows, what: str) -> np.ndarray:
        self._require_open()
        data = rows_to_table(rows, self._tables[path][0], what)
        if len(data) and not np.all(np.isfinite(data["mjd"])):
            raise ValueError(f"{what}: mjd must be finite")
        return data

    def append_events(self, rows) -> None:
        """Add detected events to ``/events`` (kept sorted by mjd on commit).

        Parameters
        ----------
        rows : mapping of columns, or iterable of mappings
            Fields ``mjd`` [d, MJD UTC], ``clock`` (a clock of :attr:`clocks`), ``kind``
            (``outlier``, ``phase_step``, ``frequency_step``, ``drift_change`` or
            ``reference_*``), ``magnitude`` in SI (phase kinds [s], ``frequency_step`` [1],
            ``drift_change`` [1/s], stored per day [1/d]), ``score`` [1]; plus the declared
            extra fields.
        """
        data = self._rows(schema.EVENTS.path, rows, "append_events")
        kinds = check_event_rows(data, self._clocks)
        drift = np.array([k == "drift_change" for k in kinds], dtype=bool)
        if drift.any():
            data["magnitude"][drift] = to_archive_units(schema.DRIFT, data["magnitude"][drift])
        self._tables[schema.EVENTS.path][2].append(data)

    def append_steering(self, rows) -> None:
        """Add steering rows to ``/steering`` (kept sorted by mjd on commit).

        Parameters
        ----------
        rows : mapping of columns, or iterable of mappings
            Fields ``mjd`` [d, MJD UTC], ``frequency_correction`` (commanded fractional
            frequency change of the steered output, > 0 makes it run faster) [1],
            ``phase_error`` (steered output - target) [s], plus the declared extra fields.
        """
        data = self._rows(schema.STEERING.path, rows, "append_steering")
        self._tables[schema.STEERING.path][2].append(data)

    def write_group(self, path: str, content: Mapping, *, units: Mapping[str, str] | None = None,
                    descriptions: Mapping[str, str] | None = None,
                    description: str | None = None) -> None:
        """Replace the group ``path`` by ``content`` (numeric arrays and JSON values only).

        Parameters
        ----------
        path : str
            Absolute group path outside the contract groups, e.g. ``"/assessment"``.
        content : mapping
            name -> value.  A numpy array of bools or numbers becomes a dataset (exact dtype and
            shape); a mapping becomes a subgroup; anything else must be JSON-serialisable
            (str, int, float, bool, None, lists and dicts of those) and is stored as a JSON-text
            attribute of the group.  Never pickled.  Names: A-Z a-z 0-9 _ . - only.
        units : mapping, optional
            Relative dataset path (``"name"`` or ``"sub/name"``) -> ``units`` attribute
            (default ``"SI"``: the package's SI units).
        descriptions : mapping, optional
            Relative dataset path -> ``description`` attribute.
        description : str, optional
            Description of the group itself.
        """
        self._require_open()
        if (not isinstance(path, str) or not path.startswith("/") or path == "/"
                or any(path == p or path.startswith(p + "/") for p in schema.RESERVED_PATHS)):
            raise ValueError(f"write_group: {path!r} is not a group path outside the groups "
                             f"reserved by the format {list(schema.RESERVED_PATHS)}")
        parent, name = path.rsplit("/", 1)
        group = ensure_group(self._f, parent)
        if name in group:
            del group[name]
        new = group.create_group(name, track_order=True)
        set_attr(new, "description", description or schema.default_description(path))
        write_tree(new, content, dict(units or {}), dict(descriptions or {}))

    def write_state(self, state: Mapping, *, units: Mapping[str, str] | None = None,
                    descriptions: Mapping[str, str] | None = None) -> None:
        """Replace ``/state``, the saved engine state for the next incremental run.

        Same rules as :meth:`write_group`: numeric arrays become datasets, mappings subgroups,
        other values JSON-text attributes.  :attr:`Archive.engine_state` gives it back.
        """
        self.write_group("/state", state, units=units, descriptions=descriptions,
                         description=schema.GROUPS["/state"])

    def write_table(self, path: str, rows, fields: Sequence[TableField], description: str) -> None:
        """Create or replace a table outside the contract paths (e.g. ``/assessment/clocks``).

        Parameters
        ----------
        path : str
            Absolute dataset path.
        rows : mapping of columns, or iterable of mappings
            The records.
        fields : sequence of TableField
            The columns, their units and meanings.
        description : str
            One line.
        """
        self._require_open()
        if (not isinstance(path, str) or not path.startswith("/") or path.count("/") < 1
                or any(path == p or path.startswith(p + "/")
                       for p in schema.RESERVED_PATHS + ("/state",))):
            raise ValueError(f"write_table: {path!r} is not a table path outside the groups "
                             f"reserved by the format")
        spec = TableSpec(path, tuple(fields), description)
        new_table(self._f, spec, rows_to_table(rows, spec, f"write_table {path}"))

    def add_run_record(self, input_name: str, *, input_sha256: str | None = None,
                       config_toml: str | None = None, time_utc: str | None = None,
                       mode: str | None = None) -> None:
        """Describe this run for ``/provenance`` (written on commit; required before it).

        Parameters
        ----------
        input_name : str
            The measurement file as named by the user (at most 255 bytes of UTF-8).
        input_sha256 : str, optional
            SHA-256 (hex) of that file; default the root attribute ``input_sha256``.
        config_toml : str, optional
            Effective configuration; its SHA-256 is recorded.  Default the root attribute.
        time_utc : str, optional
            Time of the run, ISO 8601 UTC; default the time of the call.
        mode : str, optional
            What the run did, for the ``mode`` field; default ``create`` or ``append`` as the
            writer was opened.  ``assess`` marks a run that only wrote assessment results.
        """
        self._require_open()
        if mode is not None and mode not in schema.RUN_MODES:
            raise ValueError(f"add_run_record: mode must be one of {schema.RUN_MODES}, "
                             f"got {mode!r}")
        self._run = {"input_name": input_name, "input_sha256": input_sha256,
                     "config_toml": config_toml, "time_utc": time_utc or utc_now(),
                     "mode": mode}

    def add_previous_runs(self, rows) -> None:
        """Carry over the ``/provenance`` rows of an archive this one replaces.

        Used when an archive is re-formed from its own measurements plus new ones (while its
        start-up stretch is still incomplete): the earlier runs stay on record, in order, before
        this run's own row.

        Parameters
        ----------
        rows : mapping of columns, or iterable of mappings
            Rows as :attr:`ensemble.archive.Archive.provenance` gives them.
        """
        self._require_open()
        spec, ds, _ = self._tables[schema.PROVENANCE.path]
        data = rows_to_table(rows, spec, "add_previous_runs")
        n = ds.shape[0]
        ds.resize((n + len(data),))
        ds[n:] = data

    def _write_run_record(self) -> None:
        run = self._run
        f = self._f
        config = run["config_toml"]
        if config is None:
            config = get_attr(f, "config_toml", "")
        row = {
            "time_utc": run["time_utc"],
            "software_version": get_attr(f, "software_version", __version__),
            "mode": run["mode"] or self._mode,
            "input_name": run["input_name"],
            "input_sha256": (run["input_sha256"] if run["input_sha256"] is not None
                             else get_attr(f, "input_sha256", "")),
            "config_sha256": hashlib.sha256(config.encode("utf-8")).hexdigest(),
            "epochs_added": self._epochs_added,
            "first_mjd": np.nan if self._first_new is None else self._first_new,
            "last_mjd": np.nan if self._first_new is None else self._last_mjd,
        }
        spec, ds, _ = self._tables[schema.PROVENANCE.path]
        data = rows_to_table([row], spec, "add_run_record")
        n = ds.shape[0]
        ds.resize((n + 1,))
        ds[n:] = data

