"""Checking an archive against format version 1 (docs/archive.md).

:func:`verify_archive` lists every problem it finds (an empty list means conformant);
:func:`check_readable` is the smaller gate the reader and the appending writer pass a file
through, raising one-line :class:`~ensemble.errors.InputError` for a file that is no archive at
all, of a newer format, or missing a contract dataset.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import re
import tomllib

import h5py
import numpy as np

from ..errors import InputError
from . import schema
from .h5io import describe_hdf5_failure, get_attr, open_h5

_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_ROWS_BYTES = 8 * 2 ** 20        # memory per slab when scanning (T, N) datasets [bytes]


def _required_paths() -> list[str]:
    return ([d.path for d in schema.CONTRACT_EPOCH_DATASETS] + [schema.CLOCKS_PATH]
            + [t.path for t in schema.CONTRACT_TABLES])


def check_readable(f: h5py.File, shown: str) -> None:
    """Raise InputError unless ``f`` is an archive of a format this software reads.

    Parameters
    ----------
    f : h5py.File
        The open file.
    shown : str
        Name of the archive in messages.
    """
    if "format_version" not in f.attrs:
        raise InputError("not an ensemble archive (no format_version attribute); give a file "
                         "written by ensemble run", path=shown)
    version = get_attr(f, "format_version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise InputError(f"damaged archive: format_version is {version!r}, expected an "
                         f"integer", path=shown)
    if version > schema.FORMAT_VERSION:
        raise InputError(f"archive format_version {version} is newer than this ensemble reads "
                         f"({schema.FORMAT_VERSION}); upgrade ensemble to read it", path=shown)
    if version < 1:
        raise InputError(f"damaged archive: format_version {version} is not a valid version",
                         path=shown)
    for path in _required_paths():
        if path not in f or not isinstance(f[path], h5py.Dataset):
            raise InputError(f"incomplete archive: dataset {path} is missing; restore the "
                             f"archive from a backup", path=shown)


def verify_archive(path: str | os.PathLike) -> list[str]:
    """Check an archive against format version 1; return the problems found.

    Checks: the root attributes (types, ISO time, TOML text, SHA-256 hex); every contract
    dataset and table present with the right dtype and shape; ``units`` and a one-line
    ``description`` on every dataset; ``/epochs/mjd`` finite and strictly increasing; weights
    finite, >= 0, each row summing to 1 within 1e-12, and > 0 only for active clocks; state codes
    valid and the ``codes`` attribute right; events and steering sorted by mjd, event kinds and
    clocks valid; extra per-epoch datasets of T rows (and N columns); ``/state`` holding only
    numeric arrays and JSON text.

    Parameters
    ----------
    path : path-like
        The archive.

    Returns
    -------
    list of str
        One line per problem; empty when the archive conforms.
    """
    try:
        f = open_h5(path, "r")
    except InputError as exc:
        return [str(exc)]
    problems: list[str] = []
    with f:
        try:
            _check(f, problems)
        except OSError as exc:  # a damaged chunk shows only when read
            problems.append(describe_hdf5_failure(exc))
    return problems


def _check(f: h5py.File, out: list[str]) -> None:
    _check_root(f, out)
    missing = [p for p in _required_paths() if p not in f or not isinstance(f[p], h5py.Dataset)]
    out.extend(f"{p}: missing" for p in missing)
    _check_units(f, out)
    if schema.MJD.path in missing or schema.CLOCKS_PATH in missing:
        return
    mjd_ds, names = f[schema.MJD.path], f[schema.CLOCKS_PATH]
    if mjd_ds.ndim != 1 or mjd_ds.dtype != np.float64:
        out.append(f"{schema.MJD.path}: dtype {mjd_ds.dtype}, shape {mjd_ds.shape}; expected "
                   f"float64 (T,)")
        return
    info = h5py.check_string_dtype(names.dtype)
    if names.ndim != 1 or info is None or info.encoding != "utf-8":
        out.append(f"{schema.CLOCKS_PATH}: expected UTF-8 strings (N,), found {names.dtype}")
        return
    mjd = mjd_ds[...]
    clocks = [c.decode("utf-8", "replace") if isinstance(c, bytes) else str(c)
              for c in names[...].tolist()]
    n_t, n_c = len(mjd), len(clocks)
    if not np.all(np.isfinite(mjd)):
        out.append(f"{schema.MJD.path}: {int(np.sum(~np.isfinite(mjd)))} epochs are not finite")
    elif n_t > 1 and not np.all(np.diff(mjd) > 0):
        i = int(np.argmin(np.diff(mjd) > 0))
        out.append(f"{schema.MJD.path}: not strictly increasing (MJD {mjd[i]!r} then "
                   f"{mjd[i + 1]!r})")
    if len(set(clocks)) != n_c:
        out.append(f"{schema.CLOCKS_PATH}: clock identifiers repeat")
    for c in clocks:
        if not schema.CLOCK_NAME_RE.match(c):
            out.append(f"{schema.CLOCKS_PATH}: identifier {c!r} is not 1-32 characters of "
                       f"A-Z a-z 0-9 _ . -")
    shapes_ok = True
    for spec in schema.CONTRACT_EPOCH_DATASETS[1:]:
        if spec.path in missing:
            shapes_ok = False
            continue
        ds = f[spec.path]
        if ds.dtype != np.dtype(spec.dtype) or ds.shape != (n_t, n_c):
            out.append(f"{spec.path}: dtype {ds.dtype}, shape {ds.shape}; expected "
                       f"{np.dtype(spec.dtype)} {(n_t, n_c)}")
            shapes_ok = False
    _check_extras(f, n_t, n_c, out)
    if shapes_ok:
        _check_weights_and_states(f, mjd, clocks, out)
    _check_tables(f, clocks, missing, out)
    _check_saved_state(f, out)


def _check_root(f: h5py.File, out: list[str]) -> None:
    for name in schema.ROOT_ATTRS:
        if name not in f.attrs:
            out.append(f"root attribute {name}: missing")
    version = get_attr(f, "format_version")
    if version is not None and version != schema.FORMAT_VERSION:
        out.append(f"root attribute format_version: {version!r}, this verifier checks "
                   f"{schema.FORMAT_VERSION}")
    for name in ("software_version", "created_utc", "config_toml", "input_sha256"):
        value = get_attr(f, name)
        if value is not None and not isinstance(value, str):
            out.append(f"root attribute {name}: expected text, found {type(value).__name__}")
    created = get_attr(f, "created_utc")
    if isinstance(created, str):
        try:
            stamp = _dt.datetime.fromisoformat(created.replace("Z", "+00:00"))
            if stamp.utcoffset() != _dt.timedelta(0):
                raise ValueError
        except ValueError:
            out.append(f"root attribute created_utc: {created!r} is not ISO 8601 UTC")
    config = get_attr(f, "config_toml")
    if isinstance(config, str):
        try:
            tomllib.loads(config)
        except tomllib.TOMLDecodeError as exc:
            out.append(f"root attribute config_toml: not valid TOML ({exc})")
    sha = get_attr(f, "input_sha256")
    if isinstance(sha, str) and not _HEX64.match(sha):
        out.append(f"root attribute input_sha256: {sha!r} is not 64 lower-case hex digits")


def _check_units(f: h5py.File, out: list[str]) -> None:
    datasets: list[h5py.Dataset] = []
    f.visititems(lambda _, obj: datasets.append(obj) if isinstance(obj, h5py.Dataset) else None)
    for ds in datasets:
        for attr in ("units", "description"):
            value = get_attr(ds, attr)
            if not isinstance(value, str) or not value.strip():
                out.append(f"{ds.name}: attribute {attr} missing or empty")
            elif attr == "description" and "\n" in value:
                out.append(f"{ds.name}: description is not one line")
        if ds.dtype.names is not None:
            try:
                units = json.loads(get_attr(ds, "units", "") or "null")
            except ValueError:
                units = None
            if not isinstance(units, dict) or set(units) != set(ds.dtype.names):
                out.append(f"{ds.name}: attribute units must be a JSON object naming the unit "
                           f"of every field {list(ds.dtype.names)}")


def _check_extras(f: h5py.File, n_t: int, n_c: int, out: list[str]) -> None:
    contract = {d.path for d in schema.CONTRACT_EPOCH_DATASETS}
    found: list[h5py.Dataset] = []
    f.visititems(lambda _, obj: found.append(obj)
                 if isinstance(obj, h5py.Dataset) and "dimensions" in obj.attrs else None)
    for ds in found:
        if ds.name in contract:
            continue
        dims = get_attr(ds, "dimensions")
        want = {"epoch": (n_t,), "epoch,clock": (n_t, n_c)}.get(dims)
        if want is None:
            out.append(f"{ds.name}: dimensions {dims!r}; expected 'epoch' or 'epoch,clock'")
        elif ds.shape != want:
            out.append(f"{ds.name}: shape {ds.shape}; expected {want} (dimensions {dims})")


def _check_weights_and_states(f: h5py.File, mjd: np.ndarray, clocks: list[str],
                              out: list[str]) -> None:
    state_ds, weight_ds = f[schema.STATE.path], f[schema.WEIGHT.path]
    try:
        codes = json.loads(get_attr(state_ds, "codes", "") or "null")
    except ValueError:
        codes = None
    expected = {str(k): v for k, v in schema.STATE_CODES.items()}
    if codes != expected:
        out.append(f"{schema.STATE.path}: attribute codes is {codes!r}; expected {expected}")
    n_t, n_c = state_ds.shape
    valid = np.array(sorted(schema.STATE_CODES), dtype=np.int8)
    step = max(1, _ROWS_BYTES // (8 * max(1, n_c)))
    counts = {"code": 0, "negative": 0, "sum": 0, "inactive": 0}
    first: dict[str, str] = {}
    for start in range(0, n_t, step):
        stop = min(n_t, start + step)
        state = state_ds[start:stop]
        weight = weight_ds[start:stop]
        checks = {
            "code": ~np.isin(state, valid),
            "negative": ~np.isfinite(weight) | (weight < 0),
            "inactive": (weight > 0) & (state != schema.ACTIVE),
        }
        for name, bad in checks.items():
            if bad.any():
                counts[name] += int(bad.sum())
                if name not in first:
                    i, j = np.argwhere(bad)[0]
                    first[name] = (f"MJD {mjd[start + i]!r}, clock {clocks[j]}: state "
                                   f"{int(state[i, j])}, weight {weight[i, j]!r}")
        sums = weight.sum(axis=1)
        bad = ~(np.abs(sums - 1.0) <= schema.WEIGHT_SUM_TOL)
        if bad.any():
            counts["sum"] += int(bad.sum())
            if "sum" not in first:
                i = int(np.argmax(bad))
                first["sum"] = f"MJD {mjd[start + i]!r} sums to {sums[i]!r}"
    words = {
        "code": (schema.STATE.path, "cells hold an unknown state code"),
        "negative": (schema.WEIGHT.path, "cells are negative or not finite"),
        "sum": (schema.WEIGHT.path, f"rows do not sum to 1 within {schema.WEIGHT_SUM_TOL:g}"),
        "inactive": (schema.WEIGHT.path, "cells give weight to a clock that is not active"),
    }
    for name, count in counts.items():
        if count:
            where, what = words[name]
            out.append(f"{where}: {count} {what} (first: {first[name]})")


def _check_tables(f: h5py.File, clocks: list[str], missing: list[str], out: list[str]) -> None:
    for spec in schema.CONTRACT_TABLES + (schema.PROVENANCE,):
        if spec.path not in f:
            if spec.path not in missing:
                out.append(f"{spec.path}: missing")
            continue
        ds = f[spec.path]
        if not isinstance(ds, h5py.Dataset) or ds.dtype.names is None or ds.ndim != 1:
            out.append(f"{spec.path}: expected a one-dimensional table (compound dataset)")
            continue
        ok = True
        for fld in spec.fields:
            if fld.name not in ds.dtype.names:
                out.append(f"{spec.path}: field {fld.name} missing")
                ok = False
                continue
            dt = ds.dtype[fld.name]
            want = "S" if fld.dtype == "str" else np.dtype(fld.dtype).kind
            if dt.kind != want or (fld.dtype == "f8" and dt != np.float64):
                out.append(f"{spec.path}: field {fld.name} has dtype {dt}; expected "
                           f"{'UTF-8 text' if fld.dtype == 'str' else fld.dtype}")
                ok = False
        if not ok or "mjd" not in ds.dtype.names:
            continue
        data = ds[...]
        mjd = data["mjd"]
        if not np.all(np.isfinite(mjd)):
            out.append(f"{spec.path}: {int(np.sum(~np.isfinite(mjd)))} rows have no finite mjd")
        elif len(mjd) > 1 and not np.all(np.diff(mjd) >= 0):
            out.append(f"{spec.path}: rows are not sorted by mjd")
        if spec.path == schema.EVENTS.path:
            kinds = {k.decode("utf-8", "replace") for k in data["kind"].tolist()}
            bad_kinds = sorted(k for k in kinds if not schema.is_event_kind(k))
            if bad_kinds:
                out.append(f"{spec.path}: unknown kinds {bad_kinds}")
            named = {c.decode("utf-8", "replace") for c in data["clock"].tolist()}
            unknown = sorted(named - set(clocks))
            if unknown:
                out.append(f"{spec.path}: clocks not in {schema.CLOCKS_PATH}: {unknown}")


def _check_saved_state(f: h5py.File, out: list[str]) -> None:
    if "/state" not in f:
        return
    def visit(name, obj):
        full = f"/state/{name}" if name else "/state"
        if isinstance(obj, h5py.Dataset):
            if obj.dtype.kind not in "biufc":
                out.append(f"{full}: dtype {obj.dtype}; /state holds numeric arrays only")
        for attr in obj.attrs:
            if attr in schema.RESERVED_ATTRS:
                continue
            try:
                json.loads(get_attr(obj, attr))
            except (TypeError, ValueError):
                out.append(f"{full}: attribute {attr} is not JSON text")
    group = f["/state"]
    visit("", group)
    group.visititems(visit)
