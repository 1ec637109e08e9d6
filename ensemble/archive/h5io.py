"""Internal: small HDF5 helpers shared by the archive writer, reader and verifier.

Text is stored as fixed-length UTF-8 (attributes and table fields alike).  Variable-length
strings live in HDF5's global heap, which gains a new 4 KiB collection at every session that
writes one and never gives it back; an archive appended to every hour would grow by that much
per run.  Fixed-length text sits in the object header or in the chunk itself, and an attribute is
replaced by deleting and re-creating it, which reuses the freed space.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Mapping

import h5py
import numpy as np

from ..errors import InputError
from .schema import TableSpec


def open_h5(path: str | os.PathLike, mode: str = "r", *, shown_as: str | None = None,
            **kwargs) -> h5py.File:
    """Open an HDF5 file, turning the library's failures into one-line :class:`InputError`.

    Parameters
    ----------
    path : path-like
        File to open.
    mode : str
        h5py mode (``"r"``, ``"r+"``, ``"w"``).
    shown_as : str, optional
        Name used in messages (the archive's name when ``path`` is its temporary copy).
    """
    shown = str(shown_as if shown_as is not None else path)
    if mode == "r" and not os.path.exists(path):
        raise InputError("archive not found; check the path", path=shown)
    try:
        return h5py.File(path, mode, **kwargs)
    except FileNotFoundError:
        raise InputError("archive not found; check the path", path=shown) from None
    except IsADirectoryError:
        raise InputError("is a folder, not an archive file", path=shown) from None
    except PermissionError:
        raise InputError("permission denied opening the archive", path=shown) from None
    except OSError as exc:
        raise InputError(describe_hdf5_failure(exc), path=shown) from None


def describe_hdf5_failure(exc: BaseException) -> str:
    """One line telling what an HDF5 library error means for an archive."""
    text = str(exc)
    if "signature" in text:
        return "not an HDF5 file (no HDF5 signature); give an archive written by ensemble run"
    if "truncated" in text or "eof" in text.lower():
        return ("damaged archive: the file is truncated; restore it from a backup (a crash "
                "during an ensemble run never truncates the archive)")
    first = " ".join(text.split())[:200]
    return f"damaged or unreadable HDF5 file ({first}); restore it from a backup"


def text_attr_value(text: str) -> np.ndarray:
    """``text`` as a fixed-length UTF-8 attribute value."""
    raw = text.encode("utf-8")
    return np.array(raw, dtype=h5py.string_dtype("utf-8", max(1, len(raw))))


def set_attr(obj, name: str, value) -> None:
    """Set attribute ``name`` (str as fixed-length UTF-8, int as int64, float as float64).

    An unchanged value is not rewritten; a changed one is deleted and re-created, so the file
    does not grow when a text attribute changes length.
    """
    if isinstance(value, (bool, np.bool_)):
        data = np.array(int(value), dtype="i8")
    elif isinstance(value, (int, np.integer)):
        data = np.array(value, dtype="i8")
    elif isinstance(value, (float, np.floating)):
        data = np.array(value, dtype="f8")
    elif isinstance(value, str):
        data = text_attr_value(value)
    else:
        raise TypeError(f"attribute '{name}': expected str, int or float, got "
                        f"{type(value).__name__}")
    if name in obj.attrs:
        old = obj.attrs[name]
        if (np.asarray(old).dtype == data.dtype and np.asarray(old).shape == data.shape
                and np.array_equal(old, data)):
            return
        del obj.attrs[name]
    obj.attrs.create(name, data=data, dtype=data.dtype)


def set_json_attr(obj, name: str, value) -> None:
    """Store ``value`` as JSON text in attribute ``name``."""
    set_attr(obj, name, json.dumps(value, ensure_ascii=False))


def get_attr(obj, name: str, default=None):
    """Attribute ``name`` as a Python value: str, int, float (or a numpy array); ``default``."""
    if name not in obj.attrs:
        return default
    value = obj.attrs[name]
    return python_value(value)


def python_value(value):
    """Decode an attribute value as read by h5py into a plain Python value."""
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, str):
        return value
    if isinstance(value, np.ndarray):
        if value.shape == ():
            return python_value(value[()])
        if value.dtype.kind in "SO":
            return [python_value(v) for v in value.tolist()]
        return value
    if isinstance(value, np.generic):
        return value.item()
    return value


def get_json_attr(obj, name: str, default=None):
    """Attribute ``name`` parsed as JSON; ``default`` if absent; ValueError if not JSON."""
    text = get_attr(obj, name)
    if text is None:
        return default
    return json.loads(text)


def decode_strings(values: np.ndarray) -> np.ndarray:
    """Fixed-length UTF-8 byte strings -> object array of str."""
    out = np.empty(values.shape, dtype=object)
    flat = values.reshape(-1)
    out.reshape(-1)[:] = [v.decode("utf-8", errors="replace") if isinstance(v, bytes) else str(v)
                          for v in flat.tolist()]
    return out


def encode_text(text, length: int, what: str) -> bytes:
    """UTF-8 bytes of ``text`` for a field of ``length`` bytes (ValueError if too long)."""
    if not isinstance(text, str):
        raise ValueError(f"{what}: expected text, got {type(text).__name__} {text!r}")
    raw = text.encode("utf-8")
    if len(raw) > length:
        raise ValueError(f"{what}: '{text}' is {len(raw)} bytes of UTF-8; at most {length} fit")
    if b"\0" in raw:
        raise ValueError(f"{what}: text must not contain NUL characters")
    return raw


def rows_to_table(rows, spec: TableSpec, what: str) -> np.ndarray:
    """Rows (a mapping of columns, or an iterable of mappings) -> structured array of ``spec``.

    Every field of ``spec`` must be given, and no other.  Text is checked against the field's
    storage size, numbers are cast to the field's dtype (a lossy cast is refused).
    """
    if isinstance(rows, np.ndarray) and rows.dtype.names is not None:
        columns = {name: rows[name] for name in rows.dtype.names}
    elif isinstance(rows, Mapping):
        columns = dict(rows)
    else:
        rows = list(rows) if isinstance(rows, Iterable) else None
        if rows is None:
            raise ValueError(f"{what}: expected a mapping of columns or a sequence of mappings")
        names = [f.name for f in spec.fields]
        for i, row in enumerate(rows):
            if not isinstance(row, Mapping):
                raise ValueError(f"{what}: row {i} is a {type(row).__name__}, expected a mapping")
            extra = set(row) - set(names)
            if extra:
                raise ValueError(f"{what}: row {i} has unknown field(s) {sorted(extra)}; the "
                                 f"table {spec.path} has {names}")
        columns = {}
        for name in names:
            missing = [i for i, row in enumerate(rows) if name not in row]
            if missing:
                raise ValueError(f"{what}: row {missing[0]} lacks the field '{name}'")
            columns[name] = [row[name] for row in rows]
    expected = [f.name for f in spec.fields]
    missing = [n for n in expected if n not in columns]
    extra = [n for n in columns if n not in expected]
    if missing or extra:
        raise ValueError(f"{what}: table {spec.path} needs the fields {expected}"
                         + (f"; missing {missing}" if missing else "")
                         + (f"; unknown {extra}" if extra else ""))
    lengths = {len(np.atleast_1d(np.asarray(columns[n], dtype=object))) for n in expected}
    if len(lengths) > 1:
        raise ValueError(f"{what}: the columns have different lengths {sorted(lengths)}")
    n_rows = lengths.pop() if lengths else 0
    table = np.zeros(n_rows, dtype=spec.numpy_dtype())
    for fld in spec.fields:
        values = columns[fld.name]
        label = f"{what}, field '{fld.name}'"
        if fld.dtype == "str":
            items = np.atleast_1d(np.asarray(values, dtype=object)).tolist()
            table[fld.name] = [encode_text(v, fld.length, label) for v in items]
        else:
            arr = np.atleast_1d(np.asarray(values))
            target = table.dtype[fld.name]
            if arr.dtype.kind in "OUS":
                raise ValueError(f"{label}: expected numbers of dtype {fld.dtype}")
            cast = arr.astype(target)
            if not np.array_equal(cast.astype(arr.dtype), arr, equal_nan=arr.dtype.kind == "f"):
                raise ValueError(f"{label}: values do not fit dtype {fld.dtype}")
            table[fld.name] = cast
    return table


def table_columns(data: np.ndarray) -> dict[str, np.ndarray]:
    """Structured array -> dict of columns, text decoded to str."""
    out = {}
    for name in data.dtype.names or ():
        col = data[name]
        out[name] = decode_strings(col) if col.dtype.kind in "SO" else col
    return out


def table_spec_from_dataset(ds: h5py.Dataset) -> TableSpec:
    """Rebuild the :class:`TableSpec` of a table stored in the archive."""
    from .schema import TableField

    units = get_json_attr(ds, "units", {}) or {}
    descriptions = get_json_attr(ds, "field_descriptions", {}) or {}
    fields = []
    for name in ds.dtype.names or ():
        dt = ds.dtype[name]
        if dt.kind == "S":
            fld = TableField(name, "str", units.get(name, ""), descriptions.get(name, ""),
                             dt.itemsize)
        elif dt.kind == "b":
            fld = TableField(name, "bool", units.get(name, ""), descriptions.get(name, ""))
        else:
            fld = TableField(name, f"{dt.kind}{dt.itemsize}", units.get(name, ""),
                             descriptions.get(name, ""))
        fields.append(fld)
    return TableSpec(ds.name, tuple(fields), get_attr(ds, "description", ""))
