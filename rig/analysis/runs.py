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

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.analyze import journal_frame
from rig.analysis.stats import with_capture
from rig.store.tables import read_parquet_table
from rig.store.waveform import Waveform, load_waveform
from rigbase.errors import RunFolderError

__all__ = ["group_waveforms", "load_event_waveform", "load_run"]


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


def _row(run_dir: Path, event: int) -> dict[str, Any]:
    jr = journal_frame(run_dir)
    hit = jr[jr["event"] == event]
    if hit.empty:
        raise RunFolderError(f"{run_dir / 'journal.jsonl'}: no event {event}")
    return hit.iloc[0].to_dict()


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


def group_waveforms(
    run_dir: str | Path, channel: str = "current", **filters: Any
) -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    """Waveforms of the captured events that match ``filters`` (column=value; a list or tuple
    matches any of its values), stacked: (t in s, values in SI units (events x samples),
    rows of those events). All matching records must share length, dt and t0: in a run with
    several scope captures, filter on ``capture`` too."""
    run_dir = Path(run_dir)
    df = load_run(run_dir)
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
    rows = df[sel].reset_index(drop=True)
    if rows.empty:
        return np.empty(0), np.empty((0, 0)), rows
    first: Waveform | None = None
    values = None
    for k, rel in enumerate(rows["file"]):
        path = run_dir / rel
        wf = load_waveform(path)
        if channel not in wf.channels:
            raise RunFolderError(f"{path} [channels]: no {channel!r} channel")
        if first is None:
            first = wf
            values = np.empty((len(rows), wf.n))
        elif (wf.n, wf.dt, wf.t0) != (first.n, first.dt, first.t0):
            raise RunFolderError(
                f"{path}: record ({wf.n} samples, dt {wf.dt}, t0 {wf.t0}) "
                "differs from the group's first; filter further"
            )
        values[k] = wf.values(channel)
    assert first is not None and values is not None
    return first.time(), values, rows
