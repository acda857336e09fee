"""The waveforms of a run read in batches for the analysis (rig.analysis.analyze): each
captured event's analysed channel (a copy, the other channels freed at once) with its scale,
rails, timing and input voltage, grouped by record shape, at most BATCH_EVENTS events or about
BATCH_BYTES of codes at a time, and the metrics of one batch as a call a worker process can
make. No event's numbers depend on which others share its batch.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from rig.analysis.metrics import event_metrics
from rig.store.waveform import load_waveform
from rigbase.errors import RunFolderError

# events analysed together, at most: the codes of one channel held at once stay near
# BATCH_BYTES (about 120 long records of 275,000 one-byte samples), whatever the run's size
BATCH_EVENTS = 512
BATCH_BYTES = 32 << 20


class _Event(NamedTuple):
    """What the metrics need of one captured event: the analysed channel's codes (a copy, so
    the other channels are freed at once) and its scale, rails and timing."""

    index: int  # row of the journal table
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int
    dt: float
    t0: float
    v_in: float  # the meter's input just before the discharge, V (NaN if unknown)

    @property
    def shape_key(self) -> tuple:
        # events analysed together share samples, dt, dtype and the pre-trigger samples
        # event_metrics derives from t0 (the same formula), so no event's numbers depend on
        # which others share its batch; a free-running clock gives each record its own
        # sub-sample t0, passed per event
        pre = int(np.ceil(-self.t0 / self.dt)) if self.t0 < 0 else 0
        return (self.codes.size, self.dt, pre, self.codes.dtype.str)


def _waveform_files(run_dir: Path, jr: pd.DataFrame, todo: pd.Index) -> pd.Series:
    """The waveform file names (relative to the run folder) of the captured events ``todo``
    (journal rows), by journal row; every name checked before any file is read. A column of
    the table, not a dict of paths: 3 MB at 100,000 events instead of 25."""
    names = jr["file"].loc[todo]
    ok = np.array([isinstance(n, str) and bool(n) for n in names], dtype=bool)
    if not ok.all():
        first = todo[np.flatnonzero(~ok)[0]]
        raise RunFolderError(
            f"{run_dir / 'journal.jsonl'}: event {jr.at[first, 'event']} "
            "is captured but names no waveform file"
        )
    return names


def _read_event(i: int, path: Path, channel: str) -> _Event:
    try:
        wf = load_waveform(path)
    except FileNotFoundError:
        raise RunFolderError(f"{path}: waveform file missing") from None
    except (ValueError, OSError) as exc:
        raise RunFolderError(f"{path}: unreadable waveform ({exc})") from None
    if channel not in wf.channels:
        raise RunFolderError(f"{path} [channels]: no {channel!r} channel")
    j = wf.index(channel)
    return _Event(
        i,
        wf.codes[j].copy(),
        float(wf.gain[j]),
        float(wf.offset[j]),
        int(wf.code_min[j]),
        int(wf.code_max[j]),
        float(wf.dt),
        float(wf.t0),
        _input_volts(wf),
    )


def _batches(
    run_dir: Path, files: pd.Series, channel: str, batch: int, batch_bytes: int
) -> Iterator[list[_Event]]:
    """The captured events ``files`` (waveform file names by journal row), read one file at
    a time and yielded in lists of one record shape; at most ``batch`` events or about
    ``batch_bytes`` of codes are held at once, whatever the number of events."""
    pending: list[_Event] = []
    size = 0
    for i, rel in files.items():
        ev = _read_event(int(i), run_dir / rel, channel)
        pending.append(ev)
        size += ev.codes.nbytes
        if len(pending) >= batch or size >= batch_bytes:
            yield from _by_shape(pending)
            pending, size = [], 0
    yield from _by_shape(pending)


def _batch_metrics(
    codes: np.ndarray,
    dt: float,
    t0: np.ndarray,
    gain: np.ndarray,
    offset: np.ndarray,
    code_min: np.ndarray,
    code_max: np.ndarray,
    volts: np.ndarray,
    ohms: np.ndarray,
) -> dict[str, np.ndarray]:
    """:func:`event_metrics` of one batch (a module-level call a worker process can make)."""
    return event_metrics(
        codes,
        dt=dt,
        t0=t0,
        gain=gain,
        offset=offset,
        code_min=code_min,
        code_max=code_max,
        charge_volts=volts,
        load_ohms=ohms,
    )


def _by_shape(pending: list[_Event]) -> Iterator[list[_Event]]:
    by_shape: dict[tuple, list[_Event]] = {}
    for ev in pending:
        by_shape.setdefault(ev.shape_key, []).append(ev)
    yield from by_shape.values()


def _input_volts(wf: Any) -> float:
    """The meter's input voltage just before the discharge: the mean of the divider
    channel ("voltage") over its pre-trigger samples, V (NaN without that channel)."""
    if "voltage" not in wf.channels:
        return math.nan
    j = wf.index("voltage")
    n_pre = int(np.floor(-wf.t0 / wf.dt))
    if n_pre < 2:
        return math.nan
    codes = wf.codes[j, : n_pre - n_pre // 10].astype(np.float64)
    return float(codes.mean() * wf.gain[j] + wf.offset[j])
