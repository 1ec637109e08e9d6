"""Internal: the clock assessment as the report shows it.

The report renders whatever the archive's ``/assessment`` group holds, generically: tables
(compound datasets) as tables, per-clock arrays side by side, JSON attributes as values.  The
table with ``clock`` and ``verdict`` columns is shown first, as the verdict table.  When the
archive has no ``/assessment`` and the package offers ``ensemble.assess.assess_archive``, the
report calls it (read-only) and shows its result; otherwise it shows a notice telling how to
assess the clocks.  The assessment itself is not computed here.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

#: Notice shown when there is no assessment.
NOT_ASSESSED = ("not assessed yet: run 'ensemble assess ARCHIVE.h5' to assess the clocks "
                "(keep, watch or retire, with the reasons)")
#: Most rows shown of one table.
MAX_ROWS = 500


@dataclass
class AssessmentTable:
    """One table to show: a title, column names, rows of cell values, units per column."""

    title: str
    columns: list
    rows: list
    units: dict = field(default_factory=dict)
    description: str = ""
    omitted: int = 0


@dataclass
class AssessmentView:
    """What the report shows of the assessment.

    Attributes
    ----------
    source : str
        ``"archive"`` (read from /assessment), ``"computed"`` (assess_archive) or ``"none"``.
    notice : str
        One line shown above the tables (or instead of them).
    verdicts : AssessmentTable or None
        The table with ``clock`` and ``verdict`` columns; ``reasons`` cells are lists of str.
    tables : list of AssessmentTable
        Everything else found.
    values : list of (str, str)
        Scalar values and JSON attributes, as name and text.
    """

    source: str
    notice: str
    verdicts: AssessmentTable | None = None
    tables: list = field(default_factory=list)
    values: list = field(default_factory=list)

    def counts(self) -> dict[str, int]:
        """Number of clocks per verdict."""
        out: dict[str, int] = {}
        if self.verdicts is not None and "verdict" in self.verdicts.columns:
            k = self.verdicts.columns.index("verdict")
            for row in self.verdicts.rows:
                out[str(row[k])] = out.get(str(row[k]), 0) + 1
        return out


def reasons_list(value) -> list[str]:
    """A ``reasons`` cell as a list of str (JSON list text, a list, or '; '-joined text)."""
    if value is None:
        return []
    if isinstance(value, (list, tuple, np.ndarray)):
        return [str(v) for v in list(value)]
    text = str(value).strip()
    if text.startswith("["):
        try:
            parsed = json.loads(text)
        except ValueError:
            parsed = None
        if isinstance(parsed, list):
            return [str(v) for v in parsed]
    if not text:
        return []
    parts = [p.strip() for p in text.replace("\n", ";").split(";")]
    return [p for p in parts if p]


def _cell(value):
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, np.generic):
        return value.item()
    return value


def _table(title: str, columns: Mapping, units=None, description: str = "") -> AssessmentTable:
    names = list(columns)
    length = max((len(np.atleast_1d(v)) for v in columns.values()), default=0)
    cols = []
    for name in names:
        v = columns[name]
        arr = list(v) if isinstance(v, (list, tuple)) else list(np.atleast_1d(v))
        cols.append([_cell(x) for x in arr] + [""] * (length - len(arr)))
    rows = [list(r) for r in zip(*cols)] if cols else []
    unit_map = units if isinstance(units, Mapping) else {}
    table = AssessmentTable(title, names, rows[:MAX_ROWS], dict(unit_map), description,
                            max(0, len(rows) - MAX_ROWS))
    if "reasons" in names:
        k = names.index("reasons")
        for row in table.rows:
            row[k] = reasons_list(row[k])
    return table


def _records_table(title: str, records: Sequence[Mapping]) -> AssessmentTable:
    names: list = []
    for rec in records:
        for key in rec:
            if key not in names:
                names.append(key)
    columns = {n: [rec.get(n, "") for rec in records] for n in names}
    return _table(title, columns)


def _text(value) -> str:
    if isinstance(value, (dict, list)):
        return json.dumps(value, ensure_ascii=False)
    return str(_cell(value))


def from_group(tree: Mapping, clocks: Sequence[str], units: Mapping, descriptions: Mapping,
               prefix: str = "/assessment") -> AssessmentView:
    """The view of an ``/assessment`` group read with :meth:`Archive.group`.

    Parameters
    ----------
    tree : mapping
        The group as a dict (arrays, sub-dicts, JSON values).
    clocks : sequence of str
        The archive's clocks (arrays of that length are shown per clock).
    units, descriptions : mapping
        The archive's ``units`` and ``descriptions`` (dataset path -> value).
    """
    view = AssessmentView("archive", "read from the archive's /assessment group")
    _walk(tree, prefix, clocks, units, descriptions, view)
    _pick_verdicts(view)
    if view.verdicts is None and not view.tables and not view.values:
        view.notice = "the archive's /assessment group is empty; " + NOT_ASSESSED
    return view


def _walk(tree, path, clocks, units, descriptions, view) -> None:
    """Add the content of one group (and its subgroups) to the view."""
    from ..archive.h5io import decode_strings, table_columns

    columns: dict = {}          # 1-D arrays of this group, by length
    for name, value in tree.items():
        here = f"{path}/{name}"
        if isinstance(value, Mapping):
            _walk(value, here, clocks, units, descriptions, view)
        elif isinstance(value, np.ndarray) and value.dtype.names:
            view.tables.append(_table(here, table_columns(np.atleast_1d(value)),
                                      units.get(here), descriptions.get(here, "")))
        elif isinstance(value, np.ndarray):
            arr = decode_strings(value) if value.dtype.kind == "S" else value
            if arr.ndim == 0:
                view.values.append((here, _text(arr.item())))
            elif arr.ndim == 1:
                columns.setdefault(len(arr), {})[name] = arr
            else:
                view.values.append((here, f"array of shape {arr.shape} "
                                          f"[{units.get(here, '')}]"))
        elif (isinstance(value, list) and value
              and all(isinstance(v, Mapping) for v in value)):
            view.tables.append(_records_table(here, value))
        else:
            view.values.append((here, _text(value)))
    for length, arrays in columns.items():
        if "clock" not in arrays and length == len(clocks):
            arrays = {"clock": np.asarray(clocks, dtype=object), **arrays}
        view.tables.append(_table(path, arrays,
                                  {n: units.get(f"{path}/{n}", "") for n in arrays}))


def _pick_verdicts(view: AssessmentView) -> None:
    for k, table in enumerate(view.tables):
        if "clock" in table.columns and "verdict" in table.columns:
            view.verdicts = view.tables.pop(k)
            return


def records(result) -> list[dict] | None:
    """The result of ``assess_archive`` as a list of dicts, or None if not understood."""
    if result is None:
        return None
    if hasattr(result, "to_dict") and hasattr(result, "columns"):        # a DataFrame
        return [dict(r) for r in result.to_dict("records")]
    if isinstance(result, Mapping):
        for key in ("clocks", "verdicts", "assessment"):
            if isinstance(result.get(key), Sequence):
                return records(result[key])
        return None
    if isinstance(result, Sequence) and not isinstance(result, (str, bytes)):
        out = []
        for item in result:
            if isinstance(item, Mapping):
                out.append(dict(item))
            elif dataclasses.is_dataclass(item):
                out.append(dataclasses.asdict(item))
            elif hasattr(item, "_asdict"):
                out.append(dict(item._asdict()))
            elif hasattr(item, "as_dict"):
                out.append(dict(item.as_dict()))
            else:
                return None
        return out
    for name in ("records", "clocks", "verdicts"):
        if hasattr(result, name) and not callable(getattr(result, name)):
            return records(getattr(result, name))
    return None


def computed(archive_path) -> AssessmentView:
    """Call ``ensemble.assess.assess_archive`` when the package offers it (else a notice)."""
    try:
        from ..assess import assess_archive
    except ImportError:
        return AssessmentView("none", NOT_ASSESSED)
    import inspect

    kwargs = {}
    try:
        if "write" in inspect.signature(assess_archive).parameters:
            kwargs["write"] = False
    except (TypeError, ValueError):
        pass
    try:
        result = assess_archive(str(archive_path), **kwargs)
    except Exception as exc:  # noqa: BLE001 - the report shows the failure instead of dying
        return AssessmentView("none", f"the assessment could not be computed "
                                      f"({type(exc).__name__}: {exc}); {NOT_ASSESSED}")
    rows = records(result)
    if rows is None:
        return AssessmentView("none", f"assess_archive returned a {type(result).__name__}, "
                                      f"which the report cannot show; {NOT_ASSESSED}")
    view = AssessmentView("computed", "computed for this report with ensemble.assess (not "
                                      "stored in the archive; run 'ensemble assess' to keep it)")
    view.tables.append(_records_table("assessment", rows))
    _pick_verdicts(view)
    return view


def assessment_view(archive, archive_path) -> AssessmentView:
    """The assessment of an open :class:`~ensemble.archive.reader.Archive`.

    Parameters
    ----------
    archive : Archive
        The open archive.
    archive_path : path-like
        Its path (for ``assess_archive``).
    """
    paths = archive.datasets
    has_group = any(p == "/assessment" or p.startswith("/assessment/") for p in paths)
    if not has_group:
        try:
            archive.group("/assessment")
            has_group = True
        except KeyError:
            has_group = False
    if has_group:
        return from_group(archive.group("/assessment"), archive.clocks, archive.units,
                          archive.descriptions)
    return computed(archive_path)
