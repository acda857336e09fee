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

# Columns decoded together. A table read whole is decoded into Arrow and then converted, so
# it is held about twice at once (a 41 MB table of 100,000 events peaked 80 MB above what it
# left); a few columns at a time, each group's Arrow buffers freed as it is converted, peaks
# about 55 MB above. Measured on this project's metrics.parquet, pyarrow 26, pandas 3.
_COLUMNS_AT_ONCE = 8


def read_parquet_table(
    path: str | Path, columns: list[str] | None = None, exclude: tuple[str, ...] = ()
) -> Any:
    """A parquet file as a pandas DataFrame; RunFolderError if it cannot be read.
    ``columns``: read only those of them the file has (None: all); ``exclude``: columns not
    read (a table that grows with the events is held only with the columns used)."""
    import pandas as pd
    import pyarrow.parquet as pq

    try:
        source = pq.ParquetFile(path)
        names = source.schema_arrow.names
        want = names if columns is None else [c for c in dict.fromkeys(columns) if c in names]
        want = [c for c in want if c not in exclude]
        if source.schema_arrow.pandas_metadata and _stored_index(source):
            table = pd.read_parquet(path, columns=want)  # an index to restore: pandas' way
        else:
            table = _read_by_columns(source, want)
    except FileNotFoundError:
        raise
    except Exception as exc:  # pyarrow raises several types (ArrowInvalid, OSError, ...)
        raise RunFolderError(
            f"{path}: unreadable table ({_first_line(exc)}); re-run `rig analyze`"
        ) from None
    release_freed_memory()  # the reader's buffers, as large as the table, are freed by now
    return table


def _stored_index(source: Any) -> bool:
    """True if the file keeps a pandas index as columns (pd.read_parquet restores it)."""
    index = source.schema_arrow.pandas_metadata.get("index_columns") or []
    return any(not isinstance(c, dict) for c in index)  # a dict: a RangeIndex, not stored


def _read_by_columns(source: Any, names: list[str]) -> Any:
    """``names`` of the parquet file ``source`` as a DataFrame, decoded
    :data:`_COLUMNS_AT_ONCE` columns at a time (the same frame as ``pd.read_parquet``)."""
    import pandas as pd

    if len(names) <= _COLUMNS_AT_ONCE:
        return source.read(columns=names).to_pandas(self_destruct=True)
    parts = []
    for i in range(0, len(names), _COLUMNS_AT_ONCE):
        part = source.read(columns=names[i : i + _COLUMNS_AT_ONCE])
        parts.append(part.to_pandas(self_destruct=True, split_blocks=True))
        del part
        release_freed_memory()
    return pd.concat(parts, axis=1)


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
