"""The waveform figure's data: each group's median and 5-95 % bands, streamed from its records.

A figure row overlays several groups (meters, the baseline) on one linear window, and the
window must be known before a record can be reduced onto the grid. So each group is opened
first (:func:`open_group`): its first :data:`WINDOW_EVENTS` records are read and held, and
their mean gives the group's window (:func:`rig.analysis.bands.peak_window`). The row's window
is the union of its groups'; :func:`group_bands` then streams every record of the group (the
held ones first) through a :class:`~rig.analysis.bands.BandAccumulator`. Memory per group:
WINDOW_EVENTS records plus the accumulator, whatever the number of events.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from dataclasses import dataclass, field
from itertools import islice
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.bands import BandAccumulator, Bands, align, band_grid, peak_window
from rig.analysis.runs import iter_group_values, select_events
from rig.store.waveform import Waveform
from rigbase.errors import RunFolderError

__all__ = ["WINDOW_EVENTS", "GroupStream", "group_bands", "open_group"]

log = logging.getLogger(__name__)

WINDOW_EVENTS = 8  # records whose mean sets a group's linear window (held until streamed)


@dataclass
class GroupStream:
    """A group opened for streaming: its first record, the records held for the window, the
    rest still unread, and the window (s) they give."""

    name: str
    first: Waveform
    held: list[np.ndarray]
    rest: Iterator[tuple[Waveform, np.ndarray]]
    window: tuple[float, float]
    rows: pd.DataFrame = field(repr=False)


def _span(wf: Waveform) -> float:
    """Largest |current| (A) an aligned record can reach: twice the ADC's full scale (a baseline
    removed from a full-scale sample can double it)."""
    k = wf.index("current")
    ends = np.array([wf.code_min[k], wf.code_max[k]], dtype=np.float64) * wf.gain[k]
    full = float(np.max(np.abs(ends + wf.offset[k])))
    return 2.0 * full if full > 0 else 1.0


def open_group(run: Path, table: pd.DataFrame, **filters: Any) -> GroupStream | None:
    """Open the captured events of ``table`` (the run's metrics) matching ``filters``; None
    when there are none or their first records cannot be read as one group (logged: the panel
    goes without it)."""
    name = f"group {filters} of {run}"
    rows = select_events(table, run, **filters)
    if rows.empty:
        return None
    it = iter_group_values(run, rows, "current")
    try:
        head = list(islice(it, WINDOW_EVENTS))
    except RunFolderError as exc:
        log.warning("report: %s left out of the waveform figure: %s", name, exc)
        return None
    first = head[0][0]
    t = first.time()
    total = np.zeros(first.n)
    for _, v in head:
        total += align(t, v)[0]
    window = peak_window(t, np.abs(total / len(head)))
    return GroupStream(name, first, [v for _, v in head], it, window, rows)


def group_bands(group: GroupStream, window: tuple[float, float]) -> Bands | None:
    """Stream all records of ``group`` onto a grid for the linear ``window`` (s); None (logged)
    when a record cannot join the group."""
    first = group.first
    acc = BandAccumulator(band_grid(first.t0, first.dt, first.n, window), _span(first))
    try:
        while group.held:
            acc.add(group.held.pop(0))
        for _, v in group.rest:
            acc.add(v)
    except RunFolderError as exc:
        log.warning("report: %s left out of the waveform figure: %s", group.name, exc)
        return None
    return acc.result()
