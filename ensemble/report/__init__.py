"""The HTML report of an archive: one self-contained page with PNG plots.

Public name
    write_report(archive_path, out_dir, *, days=None) -> path of index.html

The submodules are internal: :mod:`.collect` reads the archive, :mod:`.clockstability`
estimates the clocks' and the scale's stability (N-cornered hat), :mod:`.assessment` shows the
clock assessment, :mod:`.figures_time` and :mod:`.figures_stability` draw the PNG files,
:mod:`.sections` and :mod:`.page` write the HTML, :mod:`.folder` moves the finished folder
into place atomically, :mod:`.build` ties them together.  matplotlib is imported only when a
report is drawn.
"""

from __future__ import annotations

__all__ = ["write_report"]


def write_report(archive_path, out_dir, *, days=None):
    """Write the HTML report of an archive into a folder (atomically).

    Parameters
    ----------
    archive_path : path-like
        An archive written by ``ensemble run`` (opened read-only).
    out_dir : path-like
        Report folder (index.html and PNG images); its parent must exist.  Replaced as a whole
        if it holds an earlier report; refused if it holds other files.
    days : float, optional
        Show only the last ``days`` days (default: everything). [d]

    Returns
    -------
    pathlib.Path
        Path of index.html.

    Raises
    ------
    InputError
        Not an archive, ``days`` not > 0, or ``out_dir`` unusable (see
        :func:`ensemble.report.build.write_report`).
    """
    from .build import write_report as _write

    return _write(archive_path, out_dir, days=days)
