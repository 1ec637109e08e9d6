"""The HDF5 archive: one self-describing file per laboratory, written only by atomic replacement.

Public names (the submodules are internal):

* :func:`open_archive` (also ``ensemble.open_archive``) -> :class:`~ensemble.archive.reader.Archive`
* :class:`ArchiveWriter` (create, append, commit) and the declarations :class:`EpochDataset`,
  :class:`TableField`
* :func:`verify_archive` -> list of problems

This module imports h5py only when one of these is first used, so ``import ensemble`` and
``ensemble --help`` stay fast.
"""

from __future__ import annotations

import importlib
import os

__all__ = ["open_archive", "ArchiveWriter", "Archive", "EpochDataset", "TableField",
           "verify_archive"]

_LAZY = {
    "ArchiveWriter": "writer",
    "Archive": "reader",
    "EpochDataset": "schema",
    "TableField": "schema",
    "verify_archive": "verify",
}


def open_archive(path: str | os.PathLike):
    """Open an archive read-only.

    Parameters
    ----------
    path : path-like
        An archive written by ``ensemble run``.

    Returns
    -------
    Archive
        DataFrames ``offset`` [s], ``frequency`` [1], ``drift`` [1/d], ``weight`` [1],
        ``state`` (codes), indexed by MJD with one column per clock; tables ``events``,
        ``steering``, ``provenance``; ``mjd``, ``clocks``, ``attrs``, ``units``,
        ``engine_state``.  Use it in a ``with`` block, or call ``close()``.

    Raises
    ------
    InputError
        Not an archive, damaged, of a newer format_version, or missing a contract dataset.
    """
    from .reader import Archive

    return Archive(path)


def __getattr__(name: str):
    if name in _LAZY:
        module = importlib.import_module(f".{_LAZY[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
