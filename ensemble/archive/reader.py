"""Reading the archive: :class:`Archive`, returned by :func:`ensemble.open_archive`.

The file is opened read-only and stays open until :meth:`Archive.close` (or the end of a
``with`` block).  Everything read comes from that one open file, a consistent snapshot even if a
writer renames a newer archive over the path meanwhile.  Values are in the archive's units
(``Archive.units``): offsets [s], frequencies [1], drift [1/d] (per day, unlike the package's SI
inside), weights [1], epochs [MJD, d].
"""

from __future__ import annotations

import json
import os
import pathlib
import tomllib

import h5py
import numpy as np

from ..errors import InputError
from . import schema
from .h5io import decode_strings, describe_hdf5_failure, get_attr, open_h5, table_columns
from .verify import check_readable


class Archive:
    """A read-only view of one archive.

    Parameters
    ----------
    path : path-like
        The archive.

    Raises
    ------
    InputError
        The file is missing, not HDF5, truncated or damaged, not an archive, of a newer
        ``format_version``, or missing a contract dataset.

    Examples
    --------
    >>> from ensemble import open_archive
    >>> with open_archive("lab.h5") as a:          # doctest: +SKIP
    ...     print(a.clocks, a.offset.tail(2))
    """

    def __init__(self, path: str | os.PathLike):
        self.path = pathlib.Path(path)
        self._f = open_h5(self.path, "r")
        try:
            check_readable(self._f, str(self.path))
            self._clocks = tuple(decode_strings(self._read(schema.CLOCKS_PATH)).tolist())
            self._mjd = self._read(schema.MJD.path)
        except BaseException:
            self._f.close()
            raise

    # ------------------------------------------------------------------ plumbing
    def close(self) -> None:
        """Close the file (idempotent)."""
        if self._f.id.valid:
            self._f.close()

    @property
    def closed(self) -> bool:
        """True after :meth:`close`."""
        return not self._f.id.valid

    def __enter__(self) -> "Archive":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        if self.closed:
            return f"<Archive {self.path} (closed)>"
        span = (f"MJD {self._mjd[0]:.6f} to {self._mjd[-1]:.6f}" if len(self._mjd) else "empty")
        return f"<Archive {self.path}: {len(self._mjd)} epochs, {len(self._clocks)} clocks, {span}>"

    def _object(self, path: str):
        if self.closed:
            raise ValueError(f"archive {self.path} is closed")
        if path not in self._f:
            raise KeyError(f"{path} is not in the archive {self.path}")
        return self._f[path]

    def _read(self, path: str, selection=()) -> np.ndarray:
        ds = self._object(path)
        try:
            return ds[selection] if selection != () else ds[()]
        except OSError as exc:
            raise InputError(f"cannot read {path}: {describe_hdf5_failure(exc)}",
                             path=str(self.path)) from None

    # ------------------------------------------------------------------ metadata
    @property
    def attrs(self) -> dict:
        """Root attributes: ``format_version`` (int), ``software_version``, ``created_utc``,
        ``config_toml``, ``input_sha256`` (str), and any extra ones."""
        f = self._object("/")
        return {name: get_attr(f, name) for name in f.attrs}

    @property
    def format_version(self) -> int:
        """Archive format version (1)."""
        return int(get_attr(self._object("/"), "format_version"))

    @property
    def config_toml(self) -> str:
        """Effective configuration of the latest run, TOML text."""
        return get_attr(self._object("/"), "config_toml", "")

    @property
    def config(self) -> dict:
        """:attr:`config_toml` parsed into a dict."""
        return tomllib.loads(self.config_toml)

    @property
    def clocks(self) -> tuple[str, ...]:
        """Clock identifiers, the column order of every (T, N) dataset."""
        return self._clocks

    @property
    def mjd(self) -> np.ndarray:
        """Epochs, MJD UTC, shape (T,). [d]"""
        return self._mjd.copy()

    @property
    def n_epochs(self) -> int:
        """Number of epochs T."""
        return len(self._mjd)

    @property
    def epochs_utc(self):
        """Epochs as a pandas DatetimeIndex in UTC (MJD 40587 = 1970-01-01)."""
        import pandas as pd

        from ..units import MJD_UNIX_EPOCH, SECONDS_PER_DAY
        seconds = (self._mjd - MJD_UNIX_EPOCH) * SECONDS_PER_DAY
        return pd.to_datetime(np.round(seconds * 1e6).astype("i8"), unit="us", utc=True)

    @property
    def datasets(self) -> tuple[str, ...]:
        """Paths of every dataset in the archive."""
        found: list[str] = []
        self._object("/").visititems(
            lambda name, obj: found.append("/" + name) if isinstance(obj, h5py.Dataset) else None)
        return tuple(found)

    @property
    def units(self) -> dict:
        """Dataset path -> its ``units`` attribute (for a table: a dict field -> unit).

        ``s`` seconds, ``1`` dimensionless, ``1/d`` per day, ``d`` days (MJD), ``none`` text or
        code.
        """
        out = {}
        for path in self.datasets:
            ds = self._object(path)
            value = get_attr(ds, "units")
            if ds.dtype.names is not None and isinstance(value, str):
                try:
                    value = json.loads(value)
                except ValueError:
                    pass
            out[path] = value
        return out

    @property
    def descriptions(self) -> dict[str, str]:
        """Dataset path -> its one-line ``description``."""
        return {p: get_attr(self._object(p), "description") for p in self.datasets}

    @property
    def state_codes(self) -> dict[int, str]:
        """Code -> name of ``/scale/state`` (from its ``codes`` attribute)."""
        text = get_attr(self._object(schema.STATE.path), "codes", "{}")
        return {int(k): v for k, v in json.loads(text).items()}

    # ------------------------------------------------------------------ per-epoch data
    def _rows(self, start_mjd: float | None, stop_mjd: float | None) -> slice:
        lo = 0 if start_mjd is None else int(np.searchsorted(self._mjd, start_mjd, side="left"))
        hi = (len(self._mjd) if stop_mjd is None
              else int(np.searchsorted(self._mjd, stop_mjd, side="right")))
        return slice(lo, max(lo, hi))

    def array(self, path: str, start_mjd: float | None = None,
              stop_mjd: float | None = None) -> np.ndarray:
        """A per-epoch dataset as a numpy array, optionally the rows start_mjd <= mjd <= stop_mjd.

        Parameters
        ----------
        path : str
            e.g. ``"/scale/offset"`` or ``"/filter/innovation"``.
        start_mjd, stop_mjd : float, optional
            Inclusive epoch range [MJD, d].

        Returns
        -------
        ndarray, shape (T,) or (T, N)
            In the dataset's units (:attr:`units`).
        """
        rows = self._rows(start_mjd, stop_mjd)
        ds = self._object(path)
        if "dimensions" not in ds.attrs:
            raise KeyError(f"{path} is not a per-epoch dataset")
        return self._read(path, (rows,) if ds.ndim == 1 else (rows, slice(None)))

    def frame(self, path: str, start_mjd: float | None = None, stop_mjd: float | None = None):
        """A per-epoch dataset as a pandas DataFrame (T, N) or Series (T,) indexed by MJD."""
        import pandas as pd

        rows = self._rows(start_mjd, stop_mjd)
        values = self.array(path, start_mjd, stop_mjd)
        index = pd.Index(self._mjd[rows], name="mjd")
        if values.ndim == 1:
            return pd.Series(values, index=index, name=path.rsplit("/", 1)[-1])
        return pd.DataFrame(values, index=index, columns=pd.Index(self._clocks, name="clock"))

    @property
    def offset(self):
        """Clock - ensemble time scale, DataFrame indexed by MJD, one column per clock. [s]"""
        return self.frame(schema.OFFSET.path)

    @property
    def frequency(self):
        """Fractional frequency of each clock relative to the scale, DataFrame. [1]"""
        return self.frame(schema.FREQUENCY.path)

    @property
    def drift(self):
        """Frequency drift of each clock relative to the scale, DataFrame, per day. [1/d]"""
        return self.frame(schema.DRIFT.path)

    @property
    def weight(self):
        """Weight of each clock in the scale, DataFrame; rows sum to 1. [1]"""
        return self.frame(schema.WEIGHT.path)

    @property
    def state(self):
        """Standing of each clock (int8 codes, see :attr:`state_codes`), DataFrame."""
        return self.frame(schema.STATE.path)

    # ------------------------------------------------------------------ tables and groups
    def table(self, path: str):
        """A table (``/events``, ``/steering``, ``/provenance``, ...) as a pandas DataFrame.

        Text fields are str; units per field in ``units[path]``.
        """
        import pandas as pd

        data = self._read(path)
        if data.dtype.names is None:
            raise KeyError(f"{path} is not a table")
        return pd.DataFrame(table_columns(data), columns=list(data.dtype.names))

    @property
    def events(self):
        """Detected anomalies: mjd [d], clock, kind, magnitude (s for phase kinds, 1 for
        frequency_step, 1/d for drift_change), score [1]; sorted by mjd."""
        return self.table(schema.EVENTS.path)

    @property
    def steering(self):
        """Steering commands: mjd [d], frequency_correction [1] (> 0 makes the output faster),
        phase_error (steered output - target) [s], plus extra fields; sorted by mjd."""
        return self.table(schema.STEERING.path)

    @property
    def provenance(self):
        """One row per run that wrote the archive (time_utc, software_version, mode,
        input_name, input_sha256, config_sha256, epochs_added, first_mjd, last_mjd)."""
        if schema.PROVENANCE.path not in self._object("/"):
            import pandas as pd
            return pd.DataFrame(columns=[f.name for f in schema.PROVENANCE.fields])
        return self.table(schema.PROVENANCE.path)

    def group(self, path: str) -> dict:
        """A group written with ``write_group`` as a dict: arrays as numpy arrays (exact dtype
        and shape), subgroups as dicts, JSON-text attributes as Python values."""
        obj = self._object(path)
        if not isinstance(obj, h5py.Group):
            raise KeyError(f"{path} is not a group")
        return self._tree(obj)

    def _tree(self, group: h5py.Group) -> dict:
        out: dict = {}
        for name, obj in group.items():
            if isinstance(obj, h5py.Group):
                out[name] = self._tree(obj)
            else:
                out[name] = self._read(obj.name)
        for name in group.attrs:
            if name not in schema.RESERVED_ATTRS:
                out[name] = json.loads(get_attr(group, name))
        return out

    @property
    def engine_state(self) -> dict:
        """The saved engine state (``/state``) as a dict; empty if none was saved."""
        if "/state" not in self._object("/"):
            return {}
        return self.group("/state")
