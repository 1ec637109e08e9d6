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
from .content import ContentWriting
from .h5io import open_h5, set_attr, table_spec_from_dataset
from .layout import (block_values, check_clock_names, check_declarations, check_weights,
                     ensure_group, epoch_datasets_in, merge_rows, new_epoch_dataset, new_table,
                     to_archive_units, utc_now)
from .lock import ArchiveLock
from .schema import EpochDataset, TableField, TableSpec

_FLUSH_ROWS = 1024            # epochs buffered before they are written
#: HDF5 settings of every archive file.  Object formats of HDF5 1.10 (so any HDF5 >= 1.10 reads
#: the archive), and free-space tracking that persists between sessions: space freed when /state
#: or a table tail is rewritten is reused by later runs instead of being lost at each close.
_FILE_OPTIONS = {"libver": ("v110", "v110")}
_CREATE_OPTIONS = {"fs_strategy": "fsm", "fs_persist": True, "fs_threshold": 1}
_NEW = object()


class _Aborted(Exception):
    """Thrown into the atomic-output context to discard the temporary file."""


def _target(path: str | os.PathLike) -> pathlib.Path:
    """The file to replace: a symbolic link is followed, so the link keeps pointing at it."""
    path = pathlib.Path(path)
    return path.resolve() if path.is_symlink() else path


class ArchiveWriter(ContentWriting):
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
        names = check_clock_names(clocks)
        if not names:
            raise ValueError("create: at least one clock is needed")
        root = dict(attrs)
        for key in ("config_toml", "input_sha256"):
            if not isinstance(root.get(key), str):
                raise ValueError(f"create: attrs['{key}'] (str) is required")
        if "format_version" in root:
            raise ValueError("create: attrs['format_version'] is set by the writer")
        root.setdefault("software_version", __version__)
        root.setdefault("created_utc", utc_now())
        extras = check_declarations(extra_epoch_datasets)
        events = schema.EVENTS.with_fields(tuple(extra_event_fields))
        steering = schema.STEERING.with_fields(tuple(steering_fields))
        for spec in (events, steering):
            spec.numpy_dtype()  # validates the field declarations before anything is written

        def refuse_existing() -> None:
            if path.exists() and not overwrite:
                raise InputError("archive already exists; append to it, or choose another "
                                 "output file", path=str(path))

        writer = cls._start(path, "create", refuse_existing)
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
        extras = check_declarations(extra_epoch_datasets)

        def refuse_non_archive() -> None:
            if not path.is_file():
                raise InputError("archive not found; create it with a first run, or check "
                                 "the path", path=str(path))
            with open_h5(path, "r") as original:      # refuse a non-archive before copying
                check_readable(original, str(path))

        writer = cls._start(path, "append", refuse_non_archive)
        try:
            writer._load(root, extras)
        except BaseException:
            writer._discard()
            raise
        return writer

    @classmethod
    def _start(cls, path: pathlib.Path, mode: str, check) -> "ArchiveWriter":
        """Lock, run ``check`` under the lock, remove stale temporaries, start the temporary
        file (a byte copy of the archive when appending) and open it."""
        lock = ArchiveLock(path)
        output, entered = None, False
        try:
            check()
            lock.remove_stale_temporaries()
            t0 = time.perf_counter()
            output = atomic_output(path, copy_from=path if mode == "append" else None)
            tmp = output.__enter__()
            entered = True
            copy_s = time.perf_counter() - t0
            if mode == "append":
                shutil.copymode(path, tmp)      # the new file keeps the archive's permissions
                h5 = open_h5(tmp, "r+", shown_as=path, **_FILE_OPTIONS)
            else:
                h5 = h5py.File(tmp, "w", **_FILE_OPTIONS, **_CREATE_OPTIONS)
        except BaseException:
            if entered:
                output.__exit__(*sys.exc_info())   # removes the temporary file
            lock.release()
            raise
        writer = cls(_NEW, path, lock, output, tmp, h5, mode)
        if mode == "append":
            writer.timings["copy_s"] = copy_s
        return writer

    # ------------------------------------------------------------------ layout
    def _new_epoch_dataset(self, spec: EpochDataset, n_rows: int) -> h5py.Dataset:
        ds = new_epoch_dataset(self._f, spec, n_rows, len(self._clocks))
        self._epoch[spec.block_key] = (spec, ds)
        return ds

    def _build(self, clocks, root, extras, events, steering) -> None:
        f = self._f
        set_attr(f, "format_version", schema.FORMAT_VERSION)
        for key, value in root.items():
            set_attr(f, key, value)
        self._clocks = list(clocks)
        names = ensure_group(f, "/clocks").create_dataset(
            "name", shape=(len(clocks),), maxshape=(None,),
            dtype=h5py.string_dtype("utf-8", schema.CLOCK_NAME_BYTES), chunks=(256,))
        names[...] = [c.encode() for c in clocks]
        set_attr(names, "units", schema.CLOCKS_UNITS)
        set_attr(names, "description", schema.CLOCKS_DESCRIPTION)
        for spec in schema.CONTRACT_EPOCH_DATASETS + tuple(extras):
            self._new_epoch_dataset(spec, 0)
        for spec in (events, steering, schema.PROVENANCE):
            self._tables[spec.path] = (spec, new_table(f, spec), [])

    def _load(self, root, extras) -> None:
        f = self._f
        for key, value in root.items():
            set_attr(f, key, value)
        self._clocks = [c.decode() for c in f[schema.CLOCKS_PATH][...].tolist()]
        for spec, ds in epoch_datasets_in(f):
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
                self._tables[base.path] = (base, new_table(f, base), [])

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
        names = check_clock_names(names)
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
        n_clocks = len(self._clocks)
        rows = {spec.block_key: to_archive_units(spec, block_values(block, spec, n, n_clocks))
                for spec, _ in self._epoch.values()}
        check_weights(rows["mjd"], rows["weight"], rows["state"], self._clocks)
        self._pending.append(rows)
        self._pending_rows += n
        self._epochs_added += n
        self._last_mjd = float(mjd[-1])
        if self._first_new is None:
            self._first_new = float(mjd[0])
        if self._pending_rows >= _FLUSH_ROWS:
            self._flush()

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
            for _, ds, pending in self._tables.values():
                if pending:
                    merge_rows(ds, np.concatenate(pending))
                    pending.clear()
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
