"""Internal: :func:`write_report`, building the page and its pictures in a temporary folder."""

from __future__ import annotations

import datetime as _dt
import os
import pathlib
import struct

from .. import __version__

#: Name of the page in the report folder.
INDEX = "index.html"


def png_size(path) -> tuple[int, int]:
    """(width, height) in pixels of a PNG file, read from its IHDR chunk.

    Raises
    ------
    ValueError
        The file is not a PNG.
    """
    with open(path, "rb") as handle:
        head = handle.read(24)
    if len(head) < 24 or head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        raise ValueError(f"{path} is not a PNG file")
    return struct.unpack(">II", head[16:24])


def _pages(n: int, size: int) -> list[list[int]]:
    return [list(range(k, min(n, k + size))) for k in range(0, n, size)]


def _draw(folder: pathlib.Path, name: str, draw, *args, anchor: str = ""):
    from .page import Picture

    path = folder / name
    caption = draw(*args, path)
    width, height = png_size(path)
    return Picture(name, caption, width, height, anchor)


def _make_pictures(data, folder: pathlib.Path) -> dict:
    """Draw every figure into ``folder``; returns the pictures by section (and the pages)."""
    from . import figures_stability as fs
    from . import figures_time as ft

    out: dict = {"offsets": [], "weights": [], "stability": [], "steering": []}
    pages = _pages(len(data.clocks), ft.CLOCKS_PER_PAGE)
    out["offset_pages"] = pages
    for p, cols in enumerate(pages, 1):
        out["offsets"].append(_draw(folder, f"offsets_{p:02d}.png", ft.plot_offset_page, data,
                                    cols, anchor=f"offsets-{p}"))
    out["weights"].append(_draw(folder, "weights.png", ft.plot_weights, data))
    st = data.stability
    if st is not None:
        if len(st.clocks) <= fs.TOGETHER_MAX:
            out["stability"].append(_draw(folder, "stability.png", fs.plot_stability_together,
                                          st))
        else:
            out["stability"].append(_draw(folder, "stability.png", fs.plot_stability_overview,
                                          st))
            per_page = fs.PANEL_ROWS * fs.PANEL_COLS
            for p, rows in enumerate(_pages(len(st.clocks), per_page), 1):
                out["stability"].append(_draw(folder, f"stability_{p:02d}.png",
                                              fs.plot_stability_page, st, rows))
    if data.steering is not None:
        out["steering"].append(_draw(folder, "steering.png", ft.plot_steering, data))
    return out


def _steering_summary(data) -> list[str]:
    from ..steering.output import summarize

    if data.steering is None:
        return []
    return summarize(data.steering, data.steering_settings)


def render(data, pictures: dict, made_utc: str) -> str:
    """The page's HTML for the collected data and the pictures drawn."""
    from ..steering.output import CAUTIONS
    from . import sections as sec
    from .page import document

    parts = [
        sec.glance(data),
        sec.clocks_now(data),
        sec.recent_events(data),
        sec.offsets(data, pictures["offsets"], pictures["offset_pages"]),
        sec.weights(data, pictures["weights"]),
        sec.stability(data, pictures["stability"]),
        sec.steering(data, pictures["steering"], _steering_summary(data), CAUTIONS),
        sec.assessment(data),
        sec.runs(data),
    ]
    name = os.path.basename(data.path)
    return document(f"Ensemble report: {name}", sec.header(data, __version__, made_utc),
                    list(sec.SECTIONS), parts, sec.footer(data))


def write_report(archive_path, out_dir, *, days: float | None = None) -> pathlib.Path:
    """Write the HTML report of an archive: ``out_dir/index.html`` and PNG images beside it.

    The report shows the span, the clocks' standings, recent events, the runs and the
    verifier's verdict; each clock's offset from the scale with its events and standings; the
    weights; the stability of each clock (N-cornered hat) and of the scale (estimate); the
    steering with its limits and cautions; and the clock assessment (from the archive's
    ``/assessment`` group, else computed by ``ensemble.assess`` when available, else a
    notice).  The page is self-contained: inline CSS, no scripts, no outside references.

    The folder is written atomically: everything is built in a temporary folder beside
    ``out_dir`` and moved into place only when complete, so an interrupted run leaves any
    previous report intact.  An existing ``out_dir`` is replaced only if it is empty or holds
    an earlier report.

    Parameters
    ----------
    archive_path : path-like
        An archive written by ``ensemble run`` (opened read-only).
    out_dir : path-like
        Report folder; its parent must exist.
    days : float, optional
        Show only the last ``days`` days of the time plots, steering and stability (default:
        everything). [d]

    Returns
    -------
    pathlib.Path
        The path of ``index.html``.

    Raises
    ------
    InputError
        The archive cannot be read (missing, not HDF5, damaged, not an archive), ``days`` is
        not > 0, or ``out_dir`` is a file, a folder of other files, or cannot be written.

    Examples
    --------
    >>> from ensemble.report import write_report
    >>> write_report("lab.h5", "lab_report", days=30)          # doctest: +SKIP
    PosixPath('lab_report/index.html')
    """
    from .collect import check_days, collect
    from .folder import atomic_folder, check_target

    days = check_days(days)
    check_target(out_dir)                      # fail early, before the long work
    data = collect(archive_path, days=days)
    made = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    with atomic_folder(out_dir) as tmp:
        pictures = _make_pictures(data, tmp)
        text = render(data, pictures, made)
        (tmp / INDEX).write_text(text, encoding="utf-8")
    return pathlib.Path(out_dir) / INDEX
