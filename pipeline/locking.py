"""One-writer advisory locks: ``flock(2)`` on a lock file that names its holder.

Used by the store (one ingest at a time) and by ``polecast run`` (one run per
products directory).  ``flock`` locks belong to the open file description and
are released by the kernel when the holder exits, even on SIGKILL, so a dead
process never leaves a stale lock.  The lock file itself is kept: removing it
would let two processes lock two different files of the same name.
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import os
import socket
from pathlib import Path

__all__ = ["LockHeldError", "take_lock", "release_lock"]


class LockHeldError(OSError):
    """The lock is held by another process; ``holder`` says who (pid, host, since when)."""

    def __init__(self, path: Path, holder: str):
        super().__init__(f"{path} is held by {holder}")
        self.path = path
        self.holder = holder


def take_lock(lock_path: str | os.PathLike) -> int:
    """Take the exclusive lock on ``lock_path`` at once, or raise :class:`LockHeldError`.

    Returns
    -------
    int
        The open file descriptor that holds the lock; give it to
        :func:`release_lock`.  The file then reads
        ``pid PID on HOST since ISO-TIME``.
    """
    path = Path(lock_path)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        try:
            holder = os.pread(fd, 200, 0).decode(errors="replace").strip() or "another process"
        except OSError:
            holder = "another process"
        os.close(fd)
        raise LockHeldError(path, holder) from None
    since = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()} since {since}".encode(), 0)
    return fd


def release_lock(fd: int) -> None:
    """Release a lock taken by :func:`take_lock` and close its descriptor."""
    try:
        fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
