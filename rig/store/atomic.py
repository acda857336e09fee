"""Atomic file writes: temporary name in the same folder, fsync, rename, fsync the folder.

A reader (or a process started after a crash) sees either the old file or the new one,
never a truncated one: ``os.replace`` is atomic within one file system (POSIX rename(2)),
and the folder's fsync makes the rename itself durable. A failed write (disk full) removes
its temporary file and leaves the old file in place.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

__all__ = ["atomic_write", "atomic_write_bytes", "atomic_write_text", "fsync_dir"]


def fsync_dir(path: str | Path) -> None:
    """fsync a folder so the renames and creations inside it survive a power cut."""
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write(path: str | Path, write: Callable[[Path], Any]) -> Path:
    """Call ``write(tmp_path)`` to produce the file, then fsync and rename it to ``path``."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        write(tmp)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)
    return path


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""
    return atomic_write(path, lambda p: p.write_bytes(data))


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically."""
    return atomic_write(path, lambda p: p.write_text(text, encoding="utf-8"))
