"""Internal: writing a report folder atomically.

The report is built in a temporary folder next to the target (``.DIR.tmp-<pid>-<random>``, on
the same file system), its files flushed to disk, and only then moved into place:

* no report yet: one ``rename`` of the temporary folder to DIR;
* a previous report: on Linux the two folders are swapped in one step (``renameat2`` with
  ``RENAME_EXCHANGE``) and the old one, now under the temporary name, is deleted.  Where that
  call is missing, the old folder is renamed aside first, then the new one into place (a crash
  in the microseconds between the two renames leaves the old report under
  ``.DIR.old-<pid>-<random>``).

A run killed at any earlier moment leaves DIR as it was; its temporary folder is removed by the
next run (once its process has ended).  A folder is only ever replaced if it is empty or holds
a report of ours (its index.html names the generator), so no other files can be lost.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import errno
import os
import pathlib
import re
import shutil
import uuid

from ..atomic import fsync_dir, fsync_file
from ..errors import InputError
from .page import GENERATOR

_AT_FDCWD = -100
_RENAME_EXCHANGE = 2


def _is_ours(folder: pathlib.Path) -> bool:
    """True if ``folder`` is empty or holds a report written by us."""
    try:
        entries = list(folder.iterdir())
    except OSError as exc:
        raise InputError(f"cannot read the folder ({exc.strerror or exc})",
                         path=str(folder)) from None
    if not entries:
        return True
    index = folder / "index.html"
    try:
        head = index.read_text(encoding="utf-8", errors="replace")[:2000]
    except OSError:
        return False
    return f'name="generator" content="{GENERATOR}"' in head


def check_target(out_dir) -> pathlib.Path:
    """Validate the report folder before any work; returns it as an absolute path.

    Raises
    ------
    InputError
        DIR is a file, is a folder holding something other than a previous report, or its
        parent folder is missing or not writable.
    """
    out = pathlib.Path(out_dir)
    # A link to a folder: the report replaces the folder it points to (the link stays).
    out = out.resolve() if out.is_symlink() else out.absolute()
    parent = out.parent
    if out.exists() and not out.is_dir():
        raise InputError("is a file, not a folder; give a new or an empty folder for the "
                         "report", path=str(out_dir))
    if out.is_dir() and not _is_ours(out):
        raise InputError("the folder exists and holds files that are not a report of "
                         "'ensemble report'; give a new or an empty folder (a previous "
                         "report is replaced as a whole)", path=str(out_dir))
    if parent.exists() and not parent.is_dir():
        raise InputError(f"'{parent}' is not a folder", path=str(out_dir))
    if not parent.is_dir():
        raise InputError(f"the parent folder '{parent}' does not exist; create it first",
                         path=str(out_dir))
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"cannot write in '{parent}' (permission denied)", path=str(out_dir))
    return out


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale(out: pathlib.Path) -> None:
    """Delete temporary folders of earlier runs on ``out`` whose process has ended."""
    pattern = re.compile(rf"^\.{re.escape(out.name)}\.(tmp|old)-(\d+)-[0-9a-f]{{8}}$")
    try:
        siblings = list(out.parent.iterdir())
    except OSError:
        return
    for entry in siblings:
        match = pattern.match(entry.name)
        if match and entry.is_dir() and not _alive(int(match.group(2))):
            shutil.rmtree(entry, ignore_errors=True)


def _sibling(out: pathlib.Path, kind: str) -> pathlib.Path:
    return out.with_name(f".{out.name}.{kind}-{os.getpid()}-{uuid.uuid4().hex[:8]}")


def _exchange(a: pathlib.Path, b: pathlib.Path) -> bool:
    """Swap two paths in one step (Linux renameat2); False where unsupported."""
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name, use_errno=True)
        call = libc.renameat2
    except (OSError, AttributeError):
        return False
    call.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                     ctypes.c_uint]
    call.restype = ctypes.c_int
    if call(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def _flush_tree(folder: pathlib.Path) -> None:
    for entry in folder.iterdir():
        if entry.is_file():
            fsync_file(entry)
    fsync_dir(folder)


@contextlib.contextmanager
def atomic_folder(out_dir):
    """Context manager yielding a temporary folder that replaces ``out_dir`` on success.

    On any exception (or interruption) the temporary folder is removed and ``out_dir`` is
    left untouched.
    """
    out = check_target(out_dir)
    remove_stale(out)
    tmp = _sibling(out, "tmp")
    try:
        tmp.mkdir()
    except OSError as exc:
        raise InputError(f"cannot create a folder in '{out.parent}' "
                         f"({exc.strerror or exc})", path=str(out_dir)) from None
    try:
        yield tmp
        _flush_tree(tmp)
        _commit(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _commit(tmp: pathlib.Path, out: pathlib.Path) -> None:
    if out.is_dir():
        if not _is_ours(out):        # it changed since the check
            raise InputError("the folder now holds files that are not a report; nothing "
                             "was replaced", path=str(out))
        if _exchange(tmp, out):
            fsync_dir(out.parent)
            shutil.rmtree(tmp, ignore_errors=True)
            return
        old = _sibling(out, "old")
        os.rename(out, old)
        try:
            os.rename(tmp, out)
        except BaseException:
            os.rename(old, out)
            raise
        fsync_dir(out.parent)
        shutil.rmtree(old, ignore_errors=True)
        return
    try:
        os.rename(tmp, out)
    except OSError as exc:
        raise InputError(f"cannot move the report into place ({exc.strerror or exc})",
                         path=str(out)) from None
    fsync_dir(out.parent)
