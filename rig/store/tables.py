"""Reading the run folder's tables (parquet, CSV) with one-line errors naming the file.

A damaged table (truncated by a crash of a version that wrote in place, edited by hand,
half-copied) raises :class:`rigbase.errors.RunFolderError` with the file and what the reader
said, never a parser traceback. The writers (``rig.store.atomic``) make truncation by a crash
impossible from now on.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from rigbase.errors import RunFolderError
from rigbase.memory import release_freed_memory

__all__ = ["read_csv_table", "read_parquet_table"]


def read_parquet_table(
    path: str | Path, columns: list[str] | None = None, exclude: tuple[str, ...] = ()
) -> Any:
    """A parquet file as a pandas DataFrame; RunFolderError if it cannot be read.
    ``columns``: read only those of them the file has (None: all); ``exclude``: columns not
    read (a table that grows with the events is held only with the columns used)."""
    import pandas as pd
    import pyarrow.parquet as pq

    try:
        if columns is not None or exclude:
            names = pq.read_schema(path).names
            want = names if columns is None else [c for c in dict.fromkeys(columns) if c in names]
            columns = [c for c in want if c not in exclude]
        table = pd.read_parquet(path, columns=columns)
    except FileNotFoundError:
        raise
    except Exception as exc:  # pyarrow raises several types (ArrowInvalid, OSError, ...)
        raise RunFolderError(
            f"{path}: unreadable table ({_first_line(exc)}); re-run `rig analyze`"
        ) from None
    release_freed_memory()  # the reader's buffers, as large as the table, are freed by now
    return table


def read_csv_table(path: str | Path, **kw: Any) -> Any:
    """A CSV file as a pandas DataFrame; RunFolderError if it cannot be read."""
    import pandas as pd

    try:
        return pd.read_csv(path, **kw)
    except FileNotFoundError:
        raise
    except (ValueError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        raise RunFolderError(
            f"{path}: unreadable table ({_first_line(exc)}); re-run `rig analyze`"
        ) from None


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
