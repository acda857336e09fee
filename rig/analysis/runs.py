"""Stored runs as tables and arrays: the run's events as a DataFrame, one event's waveform, the
waveforms of a group stacked (the readers behind the notebook API, :mod:`rig.api`, and the report).

Example::

    from rig.api import load_run, group_waveforms
    df = load_run("results/2026-12-01T10-00-00")       # one row per event
    t, i, rows = group_waveforms("results/...", mode="AC V", capture="peak", volts=500.0,
                                 load="short")
    # t: (samples,) seconds from the trigger; i: (events, samples) amperes; rows: their rows

Nothing here writes into the run folder.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.analyze import journal_frame
from rig.analysis.stats import with_capture
from rig.store.tables import read_parquet_table
from rig.store.waveform import Waveform, load_waveform
from rigbase.errors import RunFolderError

__all__ = [
    "group_waveforms",
    "iter_group_values",
    "load_event_waveform",
    "load_run",
    "select_events",
    "stack_waveforms",
]


def load_run(run_dir: str | Path) -> pd.DataFrame:
    """The run's events: metrics.parquet (journal plus metrics) when the run was analysed,
    else the journal (one row per event; the last entry wins after a resume). A run recorded
    before scope captures existed gets ``capture`` = "main" on every row."""
    run_dir = Path(run_dir)
    path = run_dir / "metrics.parquet"
    if path.exists():
        return with_capture(read_parquet_table(path))
    if not run_dir.is_dir():
        raise RunFolderError(f"{run_dir}: no such run folder")
    return with_capture(journal_frame(run_dir))


# (run folder, journal size, journal mtime) -> {event: row}; the journal is append-only, so a
# changed size or time means new events and a fresh read. Kept for the last few runs only.
_ROWS: dict[tuple[str, int, int], dict[int, dict[str, Any]]] = {}
_ROWS_KEPT = 4


def _row(run_dir: Path, event: int) -> dict[str, Any]:
    """One event's journal row; the journal is read once per run (not once per event)."""
    journal = run_dir / "journal.jsonl"
    try:
        st = journal.stat()
        key = (str(run_dir.resolve()), st.st_size, st.st_mtime_ns)
    except FileNotFoundError:
        key = None
    rows = _ROWS.get(key) if key else None
    if rows is None:
        jr = journal_frame(run_dir)
        rows = {int(e): r for e, r in zip(jr["event"], jr.to_dict("records"), strict=True)}
        if key:
            while len(_ROWS) >= _ROWS_KEPT:
                _ROWS.pop(next(iter(_ROWS)))
            _ROWS[key] = rows
    hit = rows.get(event)
    if hit is None:
        raise RunFolderError(f"{journal}: no event {event}")
    return hit


def load_event_waveform(run_dir: str | Path, event: int) -> Waveform:
    """The stored waveform of one event (raw codes with scaling; ``.values("current")`` in A,
    ``.time()`` in s). RunFolderError if the event was not captured or its file is missing."""
    run_dir = Path(run_dir)
    row = _row(run_dir, int(event))
    rel = row.get("file")
    if row.get("status") != "captured" or not isinstance(rel, str) or not rel:
        raise RunFolderError(
            f"{run_dir / 'journal.jsonl'}: event {event} has no waveform "
            f"(status {row.get('status')!r})"
        )
    path = run_dir / rel
    if not path.exists():
        raise RunFolderError(f"{path}: waveform file of event {event} missing")
    return load_waveform(path)


def select_events(df: pd.DataFrame, run_dir: str | Path, **filters: Any) -> pd.DataFrame:
    """The captured events of ``df`` (a :func:`load_run` table of ``run_dir``) that match
    ``filters`` (column=value; a list or tuple matches any of its values; numbers match to
    1e-9 relative), renumbered from 0. KeyError names a column the table lacks."""
    sel = df["status"] == "captured"
    for col, want in filters.items():
        if col not in df:
            raise KeyError(f"{run_dir}: no column {col!r} to filter on")
        if isinstance(want, list | tuple | set):
            sel &= df[col].isin(list(want))
        elif isinstance(want, float) or (isinstance(want, int) and not isinstance(want, bool)):
            sel &= np.isclose(pd.to_numeric(df[col], errors="coerce"), want, rtol=1e-9, atol=0)
        else:
            sel &= df[col] == want
    return df[sel].reset_index(drop=True)


def _shifted(values: np.ndarray, shift: float) -> np.ndarray:
    """``values`` read ``shift`` samples later (|shift| < 1), linearly interpolated; the ends
    hold the end samples (as numpy.interp does outside the data)."""
    out = values.copy()
    if shift > 0:
        out[:-1] = values[:-1] * (1 - shift) + values[1:] * shift
    elif shift < 0:
        out[1:] = values[1:] * (1 + shift) - values[:-1] * shift
    return out


def iter_group_values(
    run_dir: str | Path, rows: pd.DataFrame, channel: str = "current"
) -> Iterator[tuple[Waveform, np.ndarray]]:
    """One event of ``rows`` at a time (its waveform file read when reached): (waveform, its
    ``channel`` in SI units on the first record's time grid). All records must share length and
    dt, and their t0 may differ by less than one sample (a free-running sample clock): such a
    record is interpolated linearly onto the first's grid. RunFolderError otherwise."""
    run_dir = Path(run_dir)
    first: Waveform | None = None
    for rel in rows["file"]:
        path = run_dir / rel
        wf = load_waveform(path, channels=(channel,))  # only that channel is decoded
        if first is None:
            first = wf
        elif (wf.n, wf.dt) != (first.n, first.dt) or abs(wf.t0 - first.t0) >= first.dt:
            raise RunFolderError(
                f"{path}: record ({wf.n} samples, dt {wf.dt}, t0 {wf.t0}) "
                "differs from the group's first; filter further"
            )
        values = wf.values(channel)
        if wf.t0 != first.t0:
            values = _shifted(values, (first.t0 - wf.t0) / first.dt)
        yield wf, values


def stack_waveforms(
    run_dir: str | Path, rows: pd.DataFrame, channel: str = "current"
) -> tuple[np.ndarray, np.ndarray]:
    """(t in s, values in SI units (events x samples)) of ``channel`` of the events in
    ``rows`` (journal rows of captured events, in order; only that channel is read), aligned
    as :func:`iter_group_values` does. The stack grows with the events (events x samples
    float64): for large groups, stream with :func:`iter_group_values` instead."""
    t: np.ndarray | None = None
    values = None
    for k, (wf, v) in enumerate(iter_group_values(run_dir, rows, channel)):
        if values is None:
            t = wf.time()
            values = np.empty((len(rows), wf.n))
        values[k] = v
    if t is None or values is None:
        return np.empty(0), np.empty((0, 0))
    return t, values


def group_waveforms(
    run_dir: str | Path, channel: str = "current", **filters: Any
) -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    """Waveforms of the captured events that match ``filters`` (see :func:`select_events`),
    stacked by :func:`stack_waveforms`: (t in s, values in SI units (events x samples), rows
    of those events). In a run with several scope captures, filter on ``capture`` too."""
    run_dir = Path(run_dir)
    rows = select_events(load_run(run_dir), run_dir, **filters)
    t, values = stack_waveforms(run_dir, rows, channel)
    return t, values, rows
