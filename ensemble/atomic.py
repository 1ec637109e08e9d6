"""Atomic file output: write to a temporary file in the same folder, then rename over the target.

A reader therefore sees either the complete old file or the complete new one, whatever happens to
the writing process (including SIGKILL or a power cut after the rename is durable): the data are
flushed with fsync before the rename, and the folder entry is flushed after it.
"""

from __future__ import annotations

import contextlib
import os
import pathlib
import shutil
import uuid

TEMP_MARK = ".tmp-"


def temporary_sibling(path: str | os.PathLike) -> pathlib.Path:
    """A fresh temporary path next to ``path`` (same folder, hence same file system)."""
    path = pathlib.Path(path)
    return path.with_name(f".{path.name}{TEMP_MARK}{os.getpid()}-{uuid.uuid4().hex[:8]}")


def fsync_file(path: str | os.PathLike) -> None:
    """Flush a file's data and metadata to stable storage."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_dir(path: str | os.PathLike) -> None:
    """Flush a folder entry (makes a rename inside it durable); a no-op where unsupported."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, *, copy_from: str | os.PathLike | None = None):
    """Context manager yielding a temporary path that replaces ``path`` on success.

    Parameters
    ----------
    path : path-like
        Final output file.  Its folder must exist.
    copy_from : path-like, optional
        Start the temporary file as a byte copy of this file (to modify a copy of an existing
        archive rather than the archive itself).

    On normal exit the temporary file is fsynced, renamed over ``path`` and the folder fsynced.
    On any exception the temporary file is removed and ``path`` is left untouched.
    """
    path = pathlib.Path(path)
    folder = path.parent if str(path.parent) else pathlib.Path(".")
    if not folder.is_dir():
        from .errors import InputError
        raise InputError(f"output folder '{folder}' does not exist", path=str(path))
    tmp = temporary_sibling(path)
    try:
        if copy_from is not None:
            shutil.copyfile(copy_from, tmp)
        yield tmp
        fsync_file(tmp)
        os.replace(tmp, path)
        fsync_dir(folder)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
