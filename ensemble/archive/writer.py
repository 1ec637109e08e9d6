"""Writing the archive: create or append, always into a temporary copy renamed on commit.

A run never modifies the archive in place.  :meth:`ArchiveWriter.create` writes a new file next to
the archive; :meth:`ArchiveWriter.open_for_append` first makes one byte copy of the archive and
extends the copy.  :meth:`ArchiveWriter.commit` closes the copy, flushes it to disk and renames it
over the archive (:mod:`ensemble.atomic`).  A crash at any moment therefore leaves the previous
archive exactly as it was (and a stale temporary file, which the next writer removes).  A lock
file (:mod:`ensemble.archive.lock`) keeps two runs from writing one archive at once.

Example
-------
>>> import numpy as np, tempfile, pathlib
>>> from ensemble.archive import ArchiveWriter
>>> path = pathlib.Path(tempfile.mkdtemp()) / "lab.h5"
>>> attrs = {"config_toml": "", "input_sha256": "0" * 64}
>>> with ArchiveWriter.create(path, ["HM1", "CS2"], attrs) as w:
...     w.append_epochs({"mjd": np.array([60676.0, 60676.25]),
...                      "offset_s": np.zeros((2, 2)), "frequency": np.zeros((2, 2)),
...                      "drift_per_s": np.zeros((2, 2)), "weight": np.full((2, 2), 0.5),
...                      "state": np.full((2, 2), 2)})
...     w.add_run_record("phase.csv")
>>> sorted(p.name for p in path.parent.iterdir())
['lab.h5', 'lab.h5.lock']
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import pathlib
import shutil
import sys
import time
from collections.abc import Iterable, Mapping, Sequence

import h5py
import numpy as np

from .. import __version__
from ..atomic import atomic_output
from ..errors import InputError
from . import schema
from .h5io import (get_attr, open_h5, rows_to_table, set_attr, set_json_attr,
                   table_spec_from_dataset)
from .lock import ArchiveLock
from .schema import EpochDataset, TableField, TableSpec

_CHUNK_BYTES = 64 * 1024      # target size of one chunk [bytes]
_CHUNK_CLOCKS = 16            # clocks per chunk of a (T, N) dataset
_FLUSH_ROWS = 1024            # epochs buffered before they are written
_WEIGHT_SUM_TOL = 1e-12       # |sum of a weight row - 1| allowed (contract: rows sum to 1)
#: HDF5 settings of every archive file.  Object formats of HDF5 1.10 (so any HDF5 >= 1.10 reads
#: the archive), and free-space tracking that persists between sessions: space freed when /state
#: or a table tail is rewritten is reused by later runs instead of being lost at each close.
_FILE_OPTIONS = {"libver": ("v110", "v110")}
_CREATE_OPTIONS = {"fs_strategy": "fsm", "fs_persist": True, "fs_threshold": 1}
_KEY_CHARS = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_.-")
_NEW = object()


class _Aborted(Exception):
    """Thrown into the atomic-output context to discard the temporary file."""


def utc_now() -> str:
    """The current time as ISO 8601 UTC with a ``Z`` suffix, to the second."""
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _to_archive_units(spec: EpochDataset, values: np.ndarray) -> np.ndarray:
    """The one place where a unit changes on the way into the archive.

    Drift is SI inside the package [1/s] and per day in the archive [1/d]: values are multiplied
    by ``spec.to_archive`` (86400 for ``/scale/drift``; 1 for every other dataset).  The
    magnitude of ``drift_change`` events goes through here too.
    """
    if spec.to_archive == 1.0:
        return values
    return values * spec.to_archive


def _target(path: str | os.PathLike) -> pathlib.Path:
    """The file to replace: a symbolic link is followed, so the link keeps pointing at it."""
    path = pathlib.Path(path)
    return path.resolve() if path.is_symlink() else path


def _chunks(dtype: str, per_clock: bool, n_clocks: int) -> tuple[int, ...]:
    itemsize = np.dtype(dtype).itemsize
    cols = max(1, min(n_clocks, _CHUNK_CLOCKS)) if per_clock else 1
    rows = 2 ** int(np.floor(np.log2(max(1, _CHUNK_BYTES // (itemsize * cols)))))
    rows = int(min(8192, max(64, rows)))
    return (rows, cols) if per_clock else (rows,)


def _table_chunk(dtype: np.dtype) -> tuple[int]:
    rows = 2 ** int(np.floor(np.log2(max(1, _CHUNK_BYTES // dtype.itemsize))))
    return (int(min(1024, max(16, rows))),)


def _check_clock_names(names: Iterable[str]) -> list[str]:
    out: list[str] = []
    for name in names:
        if not isinstance(name, str) or not schema.CLOCK_NAME_RE.match(name):
            raise ValueError(f"clock identifier {name!r}: expected 1 to 32 characters from "
                             f"A-Z a-z 0-9 _ . -")
        if name not in out:
            out.append(name)
    return out


def _check_declarations(decls: Iterable[EpochDataset]) -> list[EpochDataset]:
    contract_paths = {d.path for d in schema.CONTRACT_EPOCH_DATASETS}
    contract_keys = {d.block_key for d in schema.CONTRACT_EPOCH_DATASETS}
    out: list[EpochDataset] = []
    for d in decls:
        if not isinstance(d, EpochDataset):
            raise TypeError(f"extra_epoch_datasets: expected EpochDataset, got {type(d).__name__}")
        if not d.path.startswith("/") or d.path.endswith("/") or "//" in d.path:
            raise ValueError(f"extra dataset path {d.path!r}: expected an absolute path like "
                             f"'/filter/scale_uncertainty'")
        reserved = schema.RESERVED_PATHS + ("/state",)
        if any(d.path == p or d.path.startswith(p + "/") for p in reserved):
            raise ValueError(f"extra dataset {d.path}: the group is reserved by the format")
        if d.path in contract_paths or d.block_key in contract_keys:
            raise ValueError(f"extra dataset {d.path}: clashes with a contract dataset")
        if np.dtype(d.dtype).kind not in "fiu":
            raise ValueError(f"extra dataset {d.path}: dtype {d.dtype!r} is not numeric")
        if not d.units or not d.description or "\n" in d.description:
            raise ValueError(f"extra dataset {d.path}: needs units and a one-line description")
        if any(o.path == d.path or o.block_key == d.block_key for o in out):
            raise ValueError(f"extra dataset {d.path}: declared twice")
        out.append(d)
    return out


def _check_key(key, where: str) -> None:
    if (not isinstance(key, str) or not key or key[0] == "." or not set(key) <= _KEY_CHARS
            or key in schema.RESERVED_ATTRS):
        raise ValueError(f"{where}: key {key!r} must be a non-empty name of A-Z a-z 0-9 _ . - "
                         f"(not starting with '.', not one of {list(schema.RESERVED_ATTRS)})")


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


class ArchiveWriter:
    """The only way the package writes an archive.

    Obtain one with :meth:`create` or :meth:`open_for_append`; feed it blocks of epochs
    (:meth:`append_epochs`), events, steering rows, the engine state and a run record; then
    :meth:`commit` (or :meth:`abort`).  Used as a context manager it commits on normal exit and
    aborts on an exception.  Until the commit the archive on disk is untouched.

    Attributes
    ----------
    path : pathlib.Path
        The archive.
    timings : dict
        Seconds spent: ``"copy_s"`` (byte copy of the archive, append only), ``"commit_s"``
        (close, fsync and rename).
    """

    def __init__(self, token, path: pathlib.Path, lock: ArchiveLock, output, tmp: pathlib.Path,
                 h5: h5py.File, mode: str):
        if token is not _NEW:
            raise TypeError("use ArchiveWriter.create() or ArchiveWriter.open_for_append()")
        self.path = path
        self._lock = lock
        self._output = output
        self._tmp = tmp
        self._f = h5
        self._mode = mode
        self._done = False
        self.timings: dict[str, float] = {}
        self._clocks: list[str] = []
        self._epoch: dict[str, tuple[EpochDataset, h5py.Dataset]] = {}
        self._file_rows = 0
        self._last_mjd: float | None = None
        self._pending: list[dict[str, np.ndarray]] = []
        self._pending_rows = 0
        self._epochs_added = 0
        self._first_new: float | None = None
        self._tables: dict[str, tuple[TableSpec, h5py.Dataset, list[np.ndarray]]] = {}
        self._run: dict | None = None

    # ------------------------------------------------------------------ opening
    @classmethod
    def create(cls, path: str | os.PathLike, clocks: Sequence[str], attrs: Mapping, *,
               extra_epoch_datasets: Iterable[EpochDataset] = (),
               extra_event_fields: Iterable[TableField] = (),
               steering_fields: Iterable[TableField] = (),
               overwrite: bool = False) -> "ArchiveWriter":
        """Start a new archive (written to a temporary file until :meth:`commit`).

        Parameters
        ----------
        path : path-like
            The archive to write; its folder must exist.
        clocks : sequence of str
            Clock identifiers, the column order of every (T, N) dataset (more can be added with
            :meth:`add_clocks`).
        attrs : mapping
            Root attributes.  Required: ``config_toml`` (str, effective configuration as TOML
            text) and ``input_sha256`` (str, hex).  Optional: ``software_version`` (default the
            running version), ``created_utc`` (default now), and any extra str/int/float.
        extra_epoch_datasets : iterable of EpochDataset
            Per-epoch datasets beyond the contract (for example
            :data:`~ensemble.archive.schema.FILTER_DATASETS`); their values come in the blocks
            under ``EpochDataset.block_key``.
        extra_event_fields, steering_fields : iterable of TableField
            Extra fields of ``/events`` and ``/steering`` after the contract fields.
        overwrite : bool
            Replace an existing archive (on commit).  Default: refuse with InputError.

        Raises
        ------
        InputError
            The archive exists (and not ``overwrite``), its folder is missing, or another
            writer holds its lock.
        """
        path = _target(path)
        names = _check_clock_names(clocks)
        if not names:
            raise ValueError("create: at least one clock is needed")
        root = dict(attrs)
        for key in ("config_toml", "input_sha256"):
            if not isinstance(root.get(key), str):
                raise ValueError(f"create: attrs['{key}'] (str) is required")
        for key in ("format_version",):
            if key in root:
                raise ValueError(f"create: attrs['{key}'] is set by the writer")
        root.setdefault("software_version", __version__)
        root.setdefault("created_utc", utc_now())
        extras = _check_declarations(extra_epoch_datasets)
        events = schema.EVENTS.with_fields(tuple(extra_event_fields))
        steering = schema.STEERING.with_fields(tuple(steering_fields))
        for spec in (events, steering):
            spec.numpy_dtype()  # validates the field declarations before anything is written
        lock = ArchiveLock(path)
        try:
            if path.exists() and not overwrite:
                raise InputError("archive already exists; append to it, or choose another "
                                 "output file", path=str(path))
            lock.remove_stale_temporaries()
            output = atomic_output(path)
            tmp = output.__enter__()
        except BaseException:
            lock.release()
            raise
        try:
            h5 = h5py.File(tmp, "w", **_FILE_OPTIONS, **_CREATE_OPTIONS)
        except BaseException:
            output.__exit__(*sys.exc_info())
            lock.release()
            raise
        writer = cls(_NEW, path, lock, output, tmp, h5, "create")
        try:
            writer._build(names, root, extras, events, steering)
        except BaseException:
            writer._discard()
            raise
        return writer

    @classmethod
    def open_for_append(cls, path: str | os.PathLike, attrs: Mapping | None = None, *,
                        extra_epoch_datasets: Iterable[EpochDataset] = ()) -> "ArchiveWriter":
        """Extend an existing archive: copy it to a temporary file and write there.

        Parameters
        ----------
        path : path-like
            An existing archive.
        attrs : mapping, optional
            Root attributes to update (``config_toml``, ``input_sha256`` of this run, extra
            ones).  ``software_version`` becomes the running version.  ``format_version`` and
            ``created_utc`` cannot change.
        extra_epoch_datasets : iterable of EpochDataset
            Per-epoch datasets this run writes.  One already in the archive must match its
            dtype and shape; a new one is created with its fill value in the earlier rows.

        Raises
        ------
        InputError
            The archive is missing, not an archive, damaged, of a newer format, or locked.
        """
        from .verify import check_readable

        path = _target(path)
        root = dict(attrs or {})
        for key in ("format_version", "created_utc"):
            if key in root:
                raise ValueError(f"open_for_append: attrs['{key}'] cannot change")
        root.setdefault("software_version", __version__)
        extras = _check_declarations(extra_epoch_datasets)
        lock = ArchiveLock(path)
        try:
            if not path.is_file():
                raise InputError("archive not found; create it with a first run, or check "
                                 "the path", path=str(path))
            with open_h5(path, "r") as original:      # refuse a non-archive before copying
                check_readable(original, str(path))
            lock.remove_stale_temporaries()
            t0 = time.perf_counter()
            output = atomic_output(path, copy_from=path)
            tmp = output.__enter__()
            copy_s = time.perf_counter() - t0
            try:
                shutil.copymode(path, tmp)        # the new file keeps the archive's permissions
            except BaseException:
                output.__exit__(*sys.exc_info())
                raise
        except BaseException:
            lock.release()
            raise
        try:
            h5 = open_h5(tmp, "r+", shown_as=path, **_FILE_OPTIONS)
        except BaseException:
            output.__exit__(*sys.exc_info())
            lock.release()
            raise
        writer = cls(_NEW, path, lock, output, tmp, h5, "append")
        writer.timings["copy_s"] = copy_s
        try:
            check_readable(h5, str(path))
            writer._load(root, extras)
        except BaseException:
            writer._discard()
            raise
        return writer

    # ------------------------------------------------------------------ layout
    def _group(self, path: str) -> h5py.Group:
        """Create the groups of ``path`` (with descriptions) and return the deepest one."""
        group = self._f["/"]
        parts = [p for p in path.split("/") if p]
        for i, part in enumerate(parts):
            if part not in group:
                sub = group.create_group(part)
                here = "/" + "/".join(parts[:i + 1])
                set_attr(sub, "description", schema.default_description(here))
            group = group[part]
        return group

    def _new_epoch_dataset(self, spec: EpochDataset, n_rows: int) -> h5py.Dataset:
        parent, name = spec.path.rsplit("/", 1)
        n = len(self._clocks)
        shape = (n_rows, n) if spec.per_clock else (n_rows,)
        ds = self._group(parent).create_dataset(
            name, shape=shape, maxshape=(None,) * len(shape), dtype=spec.dtype,
            chunks=_chunks(spec.dtype, spec.per_clock, n), fillvalue=spec.fill_value)
        set_attr(ds, "units", spec.units)
        set_attr(ds, "description", spec.description)
        set_attr(ds, "dimensions", spec.dimensions)
        if spec.path == schema.STATE.path:
            set_json_attr(ds, "codes", {str(k): v for k, v in schema.STATE_CODES.items()})
        self._epoch[spec.block_key] = (spec, ds)
        return ds

    def _new_table(self, spec: TableSpec, data: np.ndarray | None = None) -> h5py.Dataset:
        parent, name = spec.path.rsplit("/", 1)
        group = self._group(parent)
        if name in group:
            del group[name]
        dtype = spec.numpy_dtype()
        n = 0 if data is None else len(data)
        ds = group.create_dataset(name, shape=(n,), maxshape=(None,), dtype=dtype,
                                  chunks=_table_chunk(dtype))
        if n:
            ds[...] = data
        set_attr(ds, "description", spec.description)
        set_json_attr(ds, "units", spec.units())
        set_json_attr(ds, "field_descriptions", spec.field_descriptions())
        return ds

    def _build(self, clocks, root, extras, events, steering) -> None:
        f = self._f
        set_attr(f, "format_version", schema.FORMAT_VERSION)
        for key, value in root.items():
            set_attr(f, key, value)
        self._clocks = list(clocks)
        names = self._group("/clocks").create_dataset(
            "name", shape=(len(clocks),), maxshape=(None,),
            dtype=h5py.string_dtype("utf-8", schema.CLOCK_NAME_BYTES), chunks=(256,))
        names[...] = [c.encode() for c in clocks]
        set_attr(names, "units", schema.CLOCKS_UNITS)
        set_attr(names, "description", schema.CLOCKS_DESCRIPTION)
        for spec in schema.CONTRACT_EPOCH_DATASETS + tuple(extras):
            self._new_epoch_dataset(spec, 0)
        for spec in (events, steering, schema.PROVENANCE):
            self._tables[spec.path] = (spec, self._new_table(spec), [])

    def _load(self, root, extras) -> None:
        f = self._f
        for key, value in root.items():
            set_attr(f, key, value)
        self._clocks = [c.decode() for c in f[schema.CLOCKS_PATH][...].tolist()]
        contract = {d.path: d for d in schema.CONTRACT_EPOCH_DATASETS}
        for spec in schema.CONTRACT_EPOCH_DATASETS:          # present: check_readable
            self._epoch[spec.block_key] = (spec, f[spec.path])
        found: list[h5py.Dataset] = []
        f.visititems(lambda name, obj: found.append(obj)
                     if isinstance(obj, h5py.Dataset) and "dimensions" in obj.attrs
                     and obj.name not in contract else None)
        for ds in sorted(found, key=lambda d: d.name):      # extra per-epoch datasets
            spec = EpochDataset(ds.name, f"{ds.dtype.kind}{ds.dtype.itemsize}",
                                get_attr(ds, "dimensions") == "epoch,clock",
                                get_attr(ds, "units", ""), get_attr(ds, "description", ""),
                                fill=np.asarray(ds.fillvalue).item())
            self._epoch[spec.block_key] = (spec, ds)
        mjd = f[schema.MJD.path]
        self._file_rows = mjd.shape[0]
        self._last_mjd = float(mjd[-1]) if self._file_rows else None
        for key, (spec, ds) in self._epoch.items():
            want = (self._file_rows, len(self._clocks)) if spec.per_clock else (self._file_rows,)
            if ds.shape != want:
                raise InputError(f"damaged archive: {ds.name} has shape {ds.shape}, expected "
                                 f"{want}; restore it from a backup", path=str(self.path))
        for spec in extras:
            have = self._epoch.get(spec.block_key)
            if have is None:
                if spec.path in f:
                    raise ValueError(f"extra dataset {spec.path}: the archive already holds an "
                                     f"object there that is not a per-epoch dataset")
                self._new_epoch_dataset(spec, self._file_rows)
            elif (np.dtype(have[0].dtype) != np.dtype(spec.dtype)
                  or have[0].per_clock != spec.per_clock or have[0].path != spec.path):
                raise ValueError(f"extra dataset {spec.path}: declared as {spec.dtype}, "
                                 f"per_clock={spec.per_clock}, but the archive holds "
                                 f"{have[0].dtype}, per_clock={have[0].per_clock}")
        for base in (schema.EVENTS, schema.STEERING, schema.PROVENANCE):
            if base.path in f:
                ds = f[base.path]
                self._tables[base.path] = (table_spec_from_dataset(ds), ds, [])
            else:  # an archive written without provenance gets the table now
                self._tables[base.path] = (base, self._new_table(base), [])

    # ------------------------------------------------------------------ properties
    @property
    def clocks(self) -> tuple[str, ...]:
        """Clock identifiers in column order of every (T, N) block array."""
        return tuple(self._clocks)

    @property
    def n_epochs(self) -> int:
        """Epochs in the archive so far, including those of this run."""
        return self._file_rows + self._pending_rows

    @property
    def last_mjd(self) -> float | None:
        """Last epoch so far [MJD, d]; None for an empty archive."""
        return self._last_mjd

    @property
    def block_keys(self) -> tuple[str, ...]:
        """The keys every :meth:`append_epochs` block must hold."""
        return tuple(self._epoch)

    def table_fields(self, path: str) -> tuple[str, ...]:
        """Field names of the table ``path`` (``"/events"``, ``"/steering"``, ...)."""
        return tuple(f.name for f in self._tables[path][0].fields)

    # ------------------------------------------------------------------ data
    def _require_open(self) -> None:
        if self._done:
            raise ValueError("the archive writer is closed (committed or aborted)")

    def add_clocks(self, names: Iterable[str]) -> np.ndarray:
        """Add clocks not yet in the archive as new columns; return the columns of ``names``.

        Earlier rows of a new column hold the dataset's fill value: NaN, weight 0, state 0
        (absent).

        Parameters
        ----------
        names : iterable of str
            Clocks of this run, in any order; those already present keep their column.

        Returns
        -------
        ndarray of int, shape (len(names),)
            Column index of each name in :attr:`clocks`.
        """
        self._require_open()
        names = _check_clock_names(names)
        new = [c for c in names if c not in self._clocks]
        if new:
            self._flush()
            self._clocks.extend(new)
            n = len(self._clocks)
            ds = self._f[schema.CLOCKS_PATH]
            ds.resize((n,))
            ds[n - len(new):] = [c.encode() for c in new]
            for spec, data in self._epoch.values():
                if spec.per_clock:
                    data.resize((data.shape[0], n))
        return np.array([self._clocks.index(c) for c in names], dtype=np.intp)

    def _take(self, block: Mapping, spec: EpochDataset, n: int) -> np.ndarray:
        key = spec.block_key
        arr = np.asarray(block[key])
        want = (n, len(self._clocks)) if spec.per_clock else (n,)
        if arr.shape != want:
            axes = "epochs, clocks in writer.clocks order" if spec.per_clock else "epochs"
            raise ValueError(f"block['{key}']: shape {arr.shape}, expected {want} ({axes})")
        target = np.dtype(spec.dtype)
        if target.kind == "f":
            if arr.dtype.kind not in "fiub":
                raise ValueError(f"block['{key}']: dtype {arr.dtype} is not numeric")
            return _to_archive_units(spec, arr.astype(target))
        if arr.dtype.kind not in "iub":
            raise ValueError(f"block['{key}']: dtype {arr.dtype}, expected integers")
        info = np.iinfo(target)
        if arr.size and (arr.min() < info.min or arr.max() > info.max):
            raise ValueError(f"block['{key}']: values outside the range of {spec.dtype}")
        return arr.astype(target)

    def append_epochs(self, block: Mapping[str, np.ndarray]) -> None:
        """Append a block of consecutive epochs (rows) to every per-epoch dataset.

        Parameters
        ----------
        block : mapping
            Arrays for T_b new epochs, keyed by :attr:`block_keys`:

            * ``"mjd"``, shape (T_b,): epochs, MJD UTC, strictly increasing and after
              :attr:`last_mjd`. [d]
            * ``"offset_s"``, (T_b, N): clock - scale; NaN where no value. [s]
            * ``"frequency"``, (T_b, N): fractional frequency relative to the scale. [1]
            * ``"drift_per_s"``, (T_b, N): drift relative to the scale, SI; stored x 86400
              in ``/scale/drift`` [1/d]. [1/s]
            * ``"weight"``, (T_b, N): finite, >= 0, each row summing to 1 within 1e-12, and
              > 0 only for clocks whose state is active. [1]
            * ``"state"``, (T_b, N) integers: the codes of ``schema.STATE_CODES``.
            * one key per extra dataset (``EpochDataset.block_key``), shape (T_b,) or (T_b, N).

            N is ``len(writer.clocks)``.  Rows are buffered and written in chunks, so memory
            stays bounded however long the run.

        Raises
        ------
        InputError
            The first epoch is at or before the archive's last epoch.
        ValueError
            A key missing or unknown, a shape or dtype wrong, epochs not increasing, weights
            or state codes invalid.
        """
        self._require_open()
        missing = [k for k in self._epoch if k not in block]
        unknown = [k for k in block if k not in self._epoch]
        if missing or unknown:
            raise ValueError(f"append_epochs: block keys must be {list(self._epoch)}"
                             + (f"; missing {missing}" if missing else "")
                             + (f"; unknown {unknown}" if unknown else ""))
        mjd = np.asarray(block["mjd"], dtype=np.float64)
        if mjd.ndim != 1:
            raise ValueError(f"block['mjd']: shape {mjd.shape}, expected (n_epochs,)")
        n = mjd.shape[0]
        if n == 0:
            return
        if not np.all(np.isfinite(mjd)):
            raise ValueError("block['mjd']: epochs must be finite")
        if n > 1 and not np.all(np.diff(mjd) > 0):
            i = int(np.argmin(np.diff(mjd) > 0))
            raise ValueError(f"block['mjd']: epochs must increase strictly (MJD {mjd[i]!r} is "
                             f"followed by {mjd[i + 1]!r})")
        if self._last_mjd is not None and mjd[0] <= self._last_mjd:
            raise InputError(f"new epochs must come after the archive's last epoch MJD "
                             f"{self._last_mjd:.6f} (the first new one is MJD {mjd[0]:.6f}); "
                             f"give only measurements after it, or write a new archive",
                             path=str(self.path))
        rows = {spec.block_key: self._take(block, spec, n) for spec, _ in self._epoch.values()}
        self._check_weights(rows["mjd"], rows["weight"], rows["state"])
        self._pending.append(rows)
        self._pending_rows += n
        self._epochs_added += n
        self._last_mjd = float(mjd[-1])
        if self._first_new is None:
            self._first_new = float(mjd[0])
        if self._pending_rows >= _FLUSH_ROWS:
            self._flush()

    def _check_weights(self, mjd: np.ndarray, weight: np.ndarray, state: np.ndarray) -> None:
        codes = np.array(sorted(schema.STATE_CODES), dtype=state.dtype)
        bad = ~np.isin(state, codes)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise ValueError(f"block['state'] at MJD {mjd[i]!r}, clock {self._clocks[j]}: "
                             f"{state[i, j]} is not a state code {schema.STATE_CODES}")
        bad = ~np.isfinite(weight) | (weight < 0)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise ValueError(f"block['weight'] at MJD {mjd[i]!r}, clock {self._clocks[j]}: "
                             f"{weight[i, j]!r}; weights must be finite and >= 0")
        bad = (weight > 0) & (state != schema.ACTIVE)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise ValueError(f"block['weight'] at MJD {mjd[i]!r}, clock {self._clocks[j]}: "
                             f"weight {weight[i, j]!r} but state "
                             f"{schema.STATE_CODES[int(state[i, j])]}; only active clocks "
                             f"carry weight")
        sums = weight.sum(axis=1)
        bad = np.abs(sums - 1.0) > _WEIGHT_SUM_TOL
        if bad.any():
            i = int(np.argmax(bad))
            raise ValueError(f"block['weight'] at MJD {mjd[i]!r}: the row sums to {sums[i]!r}; "
                             f"each row must sum to 1 within {_WEIGHT_SUM_TOL:g}")

    def _flush(self) -> None:
        if not self._pending:
            return
        start, stop = self._file_rows, self._file_rows + self._pending_rows
        for key, (spec, ds) in self._epoch.items():
            values = np.concatenate([rows[key] for rows in self._pending], axis=0)
            ds.resize(stop, axis=0)
            ds[start:stop] = values
        self._file_rows = stop
        self._pending.clear()
        self._pending_rows = 0

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
        kinds = [k.decode() for k in data["kind"].tolist()]
        for kind in set(kinds):
            if not schema.is_event_kind(kind):
                raise ValueError(f"append_events: kind '{kind}' is not one of "
                                 f"{list(schema.EVENT_KINDS)} or reference_*")
        for clock in {c.decode() for c in data["clock"].tolist()}:
            if clock not in self._clocks:
                raise ValueError(f"append_events: clock '{clock}' is not in the archive; "
                                 f"add_clocks() first")
        drift = np.array([k == "drift_change" for k in kinds], dtype=bool)
        if drift.any():
            data["magnitude"][drift] = _to_archive_units(schema.DRIFT, data["magnitude"][drift])
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
        group = self._group(parent)
        if name in group:
            del group[name]
        new = group.create_group(name, track_order=True)
        set_attr(new, "description", description or schema.default_description(path))
        self._write_tree(new, content, dict(units or {}), dict(descriptions or {}), "")

    def _write_tree(self, group: h5py.Group, content: Mapping, units: dict, descriptions: dict,
                    prefix: str) -> None:
        where = group.name
        for key, value in content.items():
            _check_key(key, where)
            rel = prefix + key
            if isinstance(value, Mapping):
                sub = group.create_group(key, track_order=True)
                set_attr(sub, "description", f"saved values '{rel}'")
                self._write_tree(sub, value, units, descriptions, rel + "/")
            elif isinstance(value, np.ndarray):
                if value.dtype.kind not in "biufc":
                    raise ValueError(f"{where}/{key}: array dtype {value.dtype} is not numeric; "
                                     f"store text as a JSON value (str or list) instead")
                ds = group.create_dataset(key, data=value)
                set_attr(ds, "units", units.get(rel, "SI"))
                set_attr(ds, "description", descriptions.get(rel, f"saved array '{rel}'"))
            else:
                try:
                    text = json.dumps(value, default=_json_default, ensure_ascii=False)
                except (TypeError, ValueError) as exc:
                    raise ValueError(f"{where}/{key}: {type(value).__name__} is neither a "
                                     f"numeric array nor JSON-serialisable ({exc})") from None
                if len(text.encode("utf-8")) > schema.MAX_JSON_ATTR_BYTES:
                    raise ValueError(f"{where}/{key}: {len(text)} characters of JSON; store "
                                     f"large numeric content as a numpy array")
                set_attr(group, key, text)

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
        self._new_table(spec, rows_to_table(rows, spec, f"write_table {path}"))

    def add_run_record(self, input_name: str, *, input_sha256: str | None = None,
                       config_toml: str | None = None, time_utc: str | None = None) -> None:
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
        """
        self._require_open()
        self._run = {"input_name": input_name, "input_sha256": input_sha256,
                     "config_toml": config_toml, "time_utc": time_utc or utc_now()}

    def _write_tables(self) -> None:
        for path, (spec, ds, pending) in self._tables.items():
            if not pending:
                continue
            new = np.concatenate(pending)
            pending.clear()
            if not len(new):
                continue
            if "mjd" in (new.dtype.names or ()):
                new = new[np.argsort(new["mjd"], kind="stable")]
            n = ds.shape[0]
            start = n
            if n and "mjd" in new.dtype.names and new["mjd"][0] < ds[n - 1]["mjd"]:
                start = int(np.searchsorted(ds.fields("mjd")[...], new["mjd"][0], side="right"))
                tail = ds[start:n]
                new = np.concatenate([tail, new])
                new = new[np.argsort(new["mjd"], kind="stable")]
            ds.resize((start + len(new),))
            ds[start:] = new

    def _write_run_record(self) -> None:
        run = self._run
        f = self._f
        config = run["config_toml"]
        if config is None:
            config = get_attr(f, "config_toml", "")
        row = {
            "time_utc": run["time_utc"],
            "software_version": get_attr(f, "software_version", __version__),
            "mode": self._mode,
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

    # ------------------------------------------------------------------ finishing
    def commit(self) -> None:
        """Write what is buffered, close, fsync and rename the file over the archive.

        Raises
        ------
        ValueError
            :meth:`add_run_record` was not called (every run leaves a provenance record).
        """
        self._require_open()
        if self._run is None:
            raise ValueError("commit: call add_run_record() first; every run leaves a "
                             "provenance record")
        t0 = time.perf_counter()
        try:
            self._flush()
            self._write_tables()
            self._write_run_record()
            self._f.close()
        except BaseException:
            self._discard()
            raise
        self._done = True
        try:
            self._output.__exit__(None, None, None)  # fsync, rename, fsync the folder
        finally:
            self._lock.release()
        self.timings["commit_s"] = time.perf_counter() - t0

    def abort(self) -> None:
        """Discard everything this writer did; the archive stays as it was (idempotent)."""
        if not self._done:
            self._discard()

    def _discard(self) -> None:
        self._done = True
        try:
            try:
                if self._f.id.valid:
                    self._f.close()
            except Exception:  # noqa: BLE001 - the file is deleted anyway
                pass
            try:
                self._output.__exit__(_Aborted, _Aborted(), None)  # removes the temporary file
            except _Aborted:
                pass
        finally:
            self._lock.release()

    def __enter__(self) -> "ArchiveWriter":
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            if not self._done:
                try:
                    self.commit()
                except BaseException:
                    self.abort()
                    raise
        else:
            self.abort()
        return False

    def __del__(self):
        if not getattr(self, "_done", True):
            try:
                self._discard()
            except Exception:  # noqa: BLE001 - interpreter shutdown
                pass

    def __repr__(self) -> str:
        status = "closed" if self._done else "open"
        return (f"<ArchiveWriter {self._mode} {self.path} ({status}, {self.n_epochs} epochs, "
                f"{len(self._clocks)} clocks)>")
