"""Internal: building and checking the archive's HDF5 objects for :mod:`.writer`.

Chunk shapes, the creation of groups, per-epoch datasets and tables with their attributes, the
checks of what the engine hands over (clock names, declarations, blocks, weights), the storage
of a dict as numeric arrays plus JSON-text attributes, and the sorted merge of new table rows.
"""

from __future__ import annotations

import datetime as _dt
import json
from collections.abc import Iterable, Mapping, Sequence

import h5py
import numpy as np

from . import schema
from .h5io import get_attr, set_attr, set_json_attr
from .schema import EpochDataset, TableSpec

CHUNK_BYTES = 64 * 1024      # target size of one chunk [bytes]
CHUNK_CLOCKS = 16            # clocks per chunk of a (T, N) dataset
_KEY_CHARS = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_.-")


def utc_now() -> str:
    """The current time as ISO 8601 UTC with a ``Z`` suffix, to the second."""
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def to_archive_units(spec: EpochDataset, values: np.ndarray) -> np.ndarray:
    """The one place where a unit changes on the way into the archive.

    Drift is SI inside the package [1/s] and per day in the archive [1/d]: values are multiplied
    by ``spec.to_archive`` (86400 for ``/scale/drift``; 1 for every other dataset).  The
    magnitude of ``drift_change`` events goes through here too.
    """
    if spec.to_archive == 1.0:
        return values
    return values * spec.to_archive


def chunks(dtype: str, per_clock: bool, n_clocks: int) -> tuple[int, ...]:
    """Chunk shape of a per-epoch dataset: about 64 KiB, up to 16 clocks wide.

    Uncompressed chunks of fixed size let an append rewrite the last, partly filled chunk in
    place, so the file grows only by new chunks.
    """
    itemsize = np.dtype(dtype).itemsize
    cols = max(1, min(n_clocks, CHUNK_CLOCKS)) if per_clock else 1
    rows = 2 ** int(np.floor(np.log2(max(1, CHUNK_BYTES // (itemsize * cols)))))
    rows = int(min(8192, max(64, rows)))
    return (rows, cols) if per_clock else (rows,)


def table_chunks(dtype: np.dtype) -> tuple[int]:
    """Chunk shape of a table: about 64 KiB of rows, 16 to 1024 rows."""
    rows = 2 ** int(np.floor(np.log2(max(1, CHUNK_BYTES // dtype.itemsize))))
    return (int(min(1024, max(16, rows))),)


def check_clock_names(names: Iterable[str]) -> list[str]:
    """The names, each checked against the contract's identifier rule, repeats dropped."""
    out: list[str] = []
    for name in names:
        if not isinstance(name, str) or not schema.CLOCK_NAME_RE.match(name):
            raise ValueError(f"clock identifier {name!r}: expected 1 to 32 characters from "
                             f"A-Z a-z 0-9 _ . -")
        if name not in out:
            out.append(name)
    return out


def check_declarations(decls: Iterable[EpochDataset]) -> list[EpochDataset]:
    """Extra per-epoch dataset declarations, checked (paths, dtypes, units, no clashes)."""
    contract_paths = {d.path for d in schema.CONTRACT_EPOCH_DATASETS}
    contract_keys = {d.block_key for d in schema.CONTRACT_EPOCH_DATASETS}
    reserved = schema.RESERVED_PATHS + ("/state",)
    out: list[EpochDataset] = []
    for d in decls:
        if not isinstance(d, EpochDataset):
            raise TypeError(f"extra_epoch_datasets: expected EpochDataset, got {type(d).__name__}")
        if not d.path.startswith("/") or d.path.endswith("/") or "//" in d.path:
            raise ValueError(f"extra dataset path {d.path!r}: expected an absolute path like "
                             f"'/filter/scale_uncertainty'")
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


def ensure_group(f: h5py.File, path: str) -> h5py.Group:
    """Create the groups of ``path`` (each with a description); return the deepest one."""
    group = f["/"]
    parts = [p for p in path.split("/") if p]
    for i, part in enumerate(parts):
        if part not in group:
            sub = group.create_group(part)
            here = "/" + "/".join(parts[:i + 1])
            set_attr(sub, "description", schema.default_description(here))
        group = group[part]
    return group


def new_epoch_dataset(f: h5py.File, spec: EpochDataset, n_rows: int,
                      n_clocks: int) -> h5py.Dataset:
    """Create a resizable per-epoch dataset of ``n_rows`` rows holding its fill value."""
    parent, name = spec.path.rsplit("/", 1)
    shape = (n_rows, n_clocks) if spec.per_clock else (n_rows,)
    ds = ensure_group(f, parent).create_dataset(
        name, shape=shape, maxshape=(None,) * len(shape), dtype=spec.dtype,
        chunks=chunks(spec.dtype, spec.per_clock, n_clocks), fillvalue=spec.fill_value)
    set_attr(ds, "units", spec.units)
    set_attr(ds, "description", spec.description)
    set_attr(ds, "dimensions", spec.dimensions)
    if spec.path == schema.STATE.path:
        set_json_attr(ds, "codes", {str(k): v for k, v in schema.STATE_CODES.items()})
    return ds


def new_table(f: h5py.File, spec: TableSpec, data: np.ndarray | None = None) -> h5py.Dataset:
    """Create (or replace) a resizable table with its units and field descriptions."""
    parent, name = spec.path.rsplit("/", 1)
    group = ensure_group(f, parent)
    if name in group:
        del group[name]
    dtype = spec.numpy_dtype()
    n = 0 if data is None else len(data)
    ds = group.create_dataset(name, shape=(n,), maxshape=(None,), dtype=dtype,
                              chunks=table_chunks(dtype))
    if n:
        ds[...] = data
    set_attr(ds, "description", spec.description)
    set_json_attr(ds, "units", spec.units())
    set_json_attr(ds, "field_descriptions", spec.field_descriptions())
    return ds


def epoch_datasets_in(f: h5py.File) -> list[tuple[EpochDataset, h5py.Dataset]]:
    """The per-epoch datasets of an archive: the contract's, then the extra ones (those with a
    ``dimensions`` attribute) by path, each with its declaration rebuilt from the file."""
    contract = {d.path for d in schema.CONTRACT_EPOCH_DATASETS}
    out = [(spec, f[spec.path]) for spec in schema.CONTRACT_EPOCH_DATASETS]
    found: list[h5py.Dataset] = []
    f.visititems(lambda name, obj: found.append(obj)
                 if isinstance(obj, h5py.Dataset) and "dimensions" in obj.attrs
                 and obj.name not in contract else None)
    for ds in sorted(found, key=lambda d: d.name):
        spec = EpochDataset(ds.name, f"{ds.dtype.kind}{ds.dtype.itemsize}",
                            get_attr(ds, "dimensions") == "epoch,clock",
                            get_attr(ds, "units", ""), get_attr(ds, "description", ""),
                            fill=np.asarray(ds.fillvalue).item())
        out.append((spec, ds))
    return out


def check_event_rows(data: np.ndarray, clocks: Sequence[str]) -> list[str]:
    """Raise ValueError for an unknown kind or clock in event rows; return the kinds."""
    kinds = [k.decode() for k in data["kind"].tolist()]
    for kind in sorted(set(kinds)):
        if not schema.is_event_kind(kind):
            raise ValueError(f"append_events: kind '{kind}' is not one of "
                             f"{list(schema.EVENT_KINDS)} or reference_*")
    for clock in sorted({c.decode() for c in data["clock"].tolist()}):
        if clock not in clocks:
            raise ValueError(f"append_events: clock '{clock}' is not in the archive; "
                             f"add_clocks() first")
    return kinds


def block_values(block: Mapping, spec: EpochDataset, n: int, n_clocks: int) -> np.ndarray:
    """The block's values for ``spec``, shape-checked and cast (a copy) to the stored dtype."""
    key = spec.block_key
    arr = np.asarray(block[key])
    want = (n, n_clocks) if spec.per_clock else (n,)
    if arr.shape != want:
        axes = "epochs, clocks in writer.clocks order" if spec.per_clock else "epochs"
        raise ValueError(f"block['{key}']: shape {arr.shape}, expected {want} ({axes})")
    target = np.dtype(spec.dtype)
    if target.kind == "f":
        if arr.dtype.kind not in "fiub":
            raise ValueError(f"block['{key}']: dtype {arr.dtype} is not numeric")
        return arr.astype(target)
    if arr.dtype.kind not in "iub":
        raise ValueError(f"block['{key}']: dtype {arr.dtype}, expected integers")
    info = np.iinfo(target)
    if arr.size and (arr.min() < info.min or arr.max() > info.max):
        raise ValueError(f"block['{key}']: values outside the range of {spec.dtype}")
    return arr.astype(target)


def check_weights(mjd: np.ndarray, weight: np.ndarray, state: np.ndarray,
                  clocks: Sequence[str]) -> None:
    """Raise ValueError unless states are valid codes and weights finite, >= 0, summing to 1
    per row within 1e-12, and > 0 only for active clocks."""
    codes = np.array(sorted(schema.STATE_CODES), dtype=state.dtype)
    bad = ~np.isin(state, codes)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise ValueError(f"block['state'] at MJD {mjd[i]!r}, clock {clocks[j]}: "
                         f"{state[i, j]} is not a state code {schema.STATE_CODES}")
    bad = ~np.isfinite(weight) | (weight < 0)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise ValueError(f"block['weight'] at MJD {mjd[i]!r}, clock {clocks[j]}: "
                         f"{weight[i, j]!r}; weights must be finite and >= 0")
    bad = (weight > 0) & (state != schema.ACTIVE)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise ValueError(f"block['weight'] at MJD {mjd[i]!r}, clock {clocks[j]}: "
                         f"weight {weight[i, j]!r} but state "
                         f"{schema.STATE_CODES[int(state[i, j])]}; only active clocks "
                         f"carry weight")
    sums = weight.sum(axis=1)
    bad = np.abs(sums - 1.0) > schema.WEIGHT_SUM_TOL
    if bad.any():
        i = int(np.argmax(bad))
        raise ValueError(f"block['weight'] at MJD {mjd[i]!r}: the row sums to {sums[i]!r}; "
                         f"each row must sum to 1 within {schema.WEIGHT_SUM_TOL:g}")


def _check_key(key, where: str) -> None:
    if (not isinstance(key, str) or not key or key[0] == "." or not set(key) <= _KEY_CHARS
            or key in schema.RESERVED_ATTRS):
        raise ValueError(f"{where}: key {key!r} must be a non-empty name of A-Z a-z 0-9 _ . - "
                         f"(not starting with '.', not one of {list(schema.RESERVED_ATTRS)})")


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


def write_tree(group: h5py.Group, content: Mapping, units: Mapping[str, str],
               descriptions: Mapping[str, str], prefix: str = "") -> None:
    """Store a dict in ``group``: numeric arrays as datasets, dicts as subgroups, anything else
    as a JSON-text attribute.  Nothing is pickled; a value that is none of these is refused."""
    where = group.name
    for key, value in content.items():
        _check_key(key, where)
        rel = prefix + key
        if isinstance(value, Mapping):
            sub = group.create_group(key, track_order=True)
            set_attr(sub, "description", f"saved values '{rel}'")
            write_tree(sub, value, units, descriptions, rel + "/")
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


def merge_rows(ds: h5py.Dataset, new: np.ndarray) -> None:
    """Add rows to a table keeping it sorted by ``mjd`` (stable: existing rows first on ties).

    Rows later than the table's last row are appended; earlier ones rewrite only the tail of
    the table from the first row they precede.
    """
    if not len(new):
        return
    sortable = "mjd" in (new.dtype.names or ())
    if sortable:
        new = new[np.argsort(new["mjd"], kind="stable")]
    n = ds.shape[0]
    start = n
    if n and sortable and new["mjd"][0] < ds[n - 1]["mjd"]:
        start = int(np.searchsorted(ds.fields("mjd")[...], new["mjd"][0], side="right"))
        new = np.concatenate([ds[start:n], new])
        new = new[np.argsort(new["mjd"], kind="stable")]
    ds.resize((start + len(new),))
    ds[start:] = new
