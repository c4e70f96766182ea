"""One writer per run folder: an operating-system lock on ``RUN/lock``.

``design``, ``design --resume`` and ``tighten`` hold an exclusive ``flock`` (POSIX
advisory lock, released by the kernel when the holding process ends, however it
ends) on the file ``lock`` in the run folder while they write, with their process
id written into it so that a second writer can say who holds the folder. Readers
(``table``, ``show``, ``export``, ``report``) never take the lock: SQLite's
write-ahead log lets them read a consistent snapshot while the writer appends.

A lock file left by a killed process still holds that process id, but the kernel
has released its lock, so the next writer acquires it at once; it notices the
stale id and says that it takes the folder over.
"""

from __future__ import annotations

import os
from pathlib import Path

try:
    import fcntl
except ImportError:       # not POSIX: no OS lock available, a single writer is the user's duty
    fcntl = None

LOCK_NAME = "lock"


class RunFolderBusy(Exception):
    """Another live process writes this run folder."""

    def __init__(self, folder: Path, pid: int | None):
        self.folder, self.pid = Path(folder), pid
        who = f"process {pid}" if pid else "another process"
        super().__init__(f"{folder}: run folder in use by {who}; expected one writer per run folder "
                         "(wait for it to finish, or write to a new folder with --out)")


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunLock:
    """Exclusive writer lock of one run folder; a context manager.

    ``previous_pid`` is the id left in the lock file by a writer that died without
    releasing it (None after a clean release), so the caller can report a takeover.
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.path = self.folder / LOCK_NAME
        self._fd: int | None = None
        self.previous_pid: int | None = None

    def acquire(self) -> "RunLock":
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
        if fcntl is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                pid = _read_pid(fd)
                os.close(fd)
                raise RunFolderBusy(self.folder, pid) from None
        pid = _read_pid(fd)
        self.previous_pid = pid if pid and pid != os.getpid() and not _alive(pid) else None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            os.ftruncate(self._fd, 0)       # a clean release leaves no process id behind
        finally:
            if fcntl is not None:
                fcntl.flock(self._fd, fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> "RunLock":
        return self.acquire() if self._fd is None else self

    def __exit__(self, *exc) -> None:
        self.release()


def _read_pid(fd: int) -> int | None:
    try:
        text = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
        return int(text) if text else None
    except (OSError, ValueError):
        return None


def holder(folder: Path) -> int | None:
    """Process id of the live writer of ``folder``, or None when nobody writes it."""
    path = Path(folder) / LOCK_NAME
    if fcntl is None or not path.exists():
        return None
    fd = os.open(path, os.O_RDONLY)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return _read_pid(fd) or -1
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)
