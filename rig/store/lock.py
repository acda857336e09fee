"""One writer per run folder: an exclusive OS lock held for the life of the process.

The lock is ``fcntl.flock(LOCK_EX | LOCK_NB)`` on ``<run>/.lock``. The kernel releases it when
the holding process dies however it dies (SIGKILL included), so a killed run never needs a
manual unlock. The file's content names the holder (pid, host, start time) so a second
process can say who holds it; the content is only information, the flock is the lock.
Readers (analyze, report) take the same lock for the files they write, so a report never
reads a metrics table that an analysis is halfway through replacing.
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import IO

from rigbase.errors import RunFolderError

__all__ = ["LOCK_NAME", "RunLock", "RunLockedError"]

LOCK_NAME = ".lock"
UNKNOWN = "holder unknown"  # a lock file that names no holder (written by no run of ours)


class RunLockedError(RunFolderError):
    """Another process holds the run folder's lock (one line naming the holder)."""


class RunLock:
    """Exclusive lock on one run folder; a context manager, also released by process death."""

    def __init__(self, run_dir: str | Path, purpose: str = "write") -> None:
        self.path = Path(run_dir) / LOCK_NAME
        self.purpose = purpose
        self._fh: IO[str] | None = None

    def acquire(self) -> RunLock:
        """Take the lock or raise :class:`RunLockedError` naming the holder."""
        if self._fh is not None:
            return self
        fh = open(self.path, "a+", encoding="utf-8")  # noqa: SIM115 - held for the process
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _holder(fh)
            fh.close()
            raise RunLockedError(
                f"{self.path.parent}: in use by another process ({holder}); wait for it to end"
            ) from None
        except OSError:
            fh.close()
            raise
        fh.seek(0)
        fh.truncate()
        fh.write(
            json.dumps(
                {
                    "pid": os.getpid(),
                    "host": socket.gethostname(),
                    "started": datetime.now(UTC).isoformat(timespec="seconds"),
                    "purpose": self.purpose,
                }
            )
        )
        fh.flush()
        self._fh = fh
        return self

    def release(self) -> None:
        """Release the lock (safe to call twice). The file stays: deleting it would let a
        waiting process lock an unlinked inode while a third locks a new one."""
        if self._fh is not None:
            fcntl.flock(self._fh.fileno(), fcntl.LOCK_UN)
            self._fh.close()
            self._fh = None

    @property
    def held(self) -> bool:
        return self._fh is not None

    def __enter__(self) -> RunLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def _holder(fh: IO[str], wait_s: float = 1.0) -> str:
    """The holder as written in the lock file. The holder takes the lock first and writes
    its name just after: read again for up to ``wait_s`` while the file is still empty or
    half-written (a second resume started at the same instant read it empty now and then)."""
    deadline = time.monotonic() + wait_s
    while True:
        fh.seek(0)
        holder = _describe(fh.read())
        if holder != UNKNOWN or time.monotonic() > deadline:
            return holder
        time.sleep(0.01)


def _describe(text: str) -> str:
    """'pid 123 on host, since 2026-...: run' from the lock file's content."""
    try:
        d = json.loads(text)
        return (
            f"pid {int(d['pid'])} on {d.get('host', '?')}, since {d.get('started', '?')}, "
            f"{d.get('purpose', '?')}"
        )
    except (ValueError, KeyError, TypeError):
        return UNKNOWN
