"""Internal: one writer per archive, by an advisory lock on ``ARCHIVE.h5.lock``.

The lock is ``fcntl.flock`` on a small file next to the archive.  The kernel releases it when
the holder closes the file or dies for any reason (SIGKILL included), so a killed run never
leaves the archive locked.  The lock file itself stays (deleting it would let two processes lock
two different files of the same name); it holds the pid of the latest holder, which the message
of a refused writer names.  Readers take no lock: the archive is only ever replaced by an atomic
rename, so a reader sees a complete old or a complete new file.

Under the lock the writer also removes the temporary files a killed run left behind (names
``.ARCHIVE.h5.tmp-*`` from :mod:`ensemble.atomic`): only the lock holder writes them, so any that
exist when the lock is taken are stale.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import fcntl
import os
import pathlib

from ..atomic import TEMP_MARK
from ..errors import InputError


def lock_path(archive: str | os.PathLike) -> pathlib.Path:
    """Path of the lock file of ``archive``: the archive's name plus ``.lock``."""
    archive = pathlib.Path(archive)
    return archive.with_name(archive.name + ".lock")


def _holder(lock_file: pathlib.Path) -> str:
    try:
        text = lock_file.read_text(encoding="utf-8", errors="replace").strip()
    except OSError:
        return ""
    return text


class ArchiveLock:
    """Exclusive, non-blocking lock of one archive for the lifetime of one writer.

    Parameters
    ----------
    archive : path-like
        The archive (which need not exist yet); the lock file is ``<archive>.lock``.

    Raises
    ------
    InputError
        At once if another process (or another writer in this process) holds the lock; the
        message names the lock file and the holder's pid when known.
    """

    def __init__(self, archive: str | os.PathLike):
        self._fd: int | None = None
        self.archive = pathlib.Path(archive)
        self.path = lock_path(self.archive)
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o644)
        except FileNotFoundError:
            raise InputError(f"folder '{self.path.parent}' does not exist; create it or choose "
                             f"another archive path", path=str(self.archive)) from None
        except OSError as exc:
            raise InputError(f"cannot create the lock file '{self.path.name}' "
                             f"({exc.strerror}); check the folder's permissions",
                             path=str(self.archive)) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            holder = _holder(self.path)
            who = f"by {holder}" if holder else "by another process (pid unknown)"
            raise InputError(f"archive is being written {who}; lock file '{self.path.name}'. "
                             f"Wait for that run to finish; the lock frees itself when it ends",
                             path=str(self.archive)) from None
        except OSError as exc:
            os.close(fd)
            raise InputError(f"cannot lock '{self.path.name}' ({exc.strerror}); the file "
                             f"system must support flock", path=str(self.archive)) from None
        self._fd = fd
        now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} since {now}\n".encode(), 0)

    @property
    def held(self) -> bool:
        """True until :meth:`release`."""
        return self._fd is not None

    def remove_stale_temporaries(self) -> list[pathlib.Path]:
        """Delete temporary files of killed writers of this archive; return what was removed."""
        if self._fd is None:
            raise RuntimeError("remove_stale_temporaries needs the lock")
        folder = self.archive.parent
        prefix = f".{self.archive.name}{TEMP_MARK}"
        removed = []
        for name in os.listdir(folder):
            if name.startswith(prefix):
                entry = folder / name
                with contextlib.suppress(FileNotFoundError):
                    entry.unlink()
                    removed.append(entry)
        return removed

    def release(self) -> None:
        """Release the lock (idempotent).  The lock file stays."""
        fd, self._fd = self._fd, None
        if fd is not None:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
            os.close(fd)  # closing the descriptor releases the flock

    def __enter__(self) -> "ArchiveLock":
        return self

    def __exit__(self, *exc) -> None:
        self.release()

    def __del__(self):  # a writer dropped without commit or abort
        self.release()
