"""Live display of a run: a progress bar with ETA and a small table per group.

The numbers in the table come from the analysis module applied to each committed waveform
(the runner itself computes no metrics). A long capture's live charge is the whole charge,
the record's integral plus the fitted tail; the events of a group repeat one discharge, so
after its first event the tail's time constants are reused and only its amplitudes refitted
(one linear solve instead of the nonlinear fit; the full fit runs again whenever they do not
describe a record, rig.analysis.wholecharge.refit_amplitudes). With ``quiet`` or without a terminal, one log line
per group change and per tenth of the plan is printed instead.
"""

from __future__ import annotations

import heapq
import sys
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from rich.console import Console, Group
from rich.live import Live
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from rig.runner.cycle import Observer, Phase
from rig.store.waveform import Waveform
from rigbase.units import eng

__all__ = ["LiveDisplay", "RunningMedian"]


class RunningMedian:
    """Exact median of a growing list of numbers in O(log n) per value and O(1) per query:
    the lower half in a max-heap, the upper half in a min-heap, sizes within one (the classic
    two-heap running median; common practice, no source). The display used to sort the whole
    group on every event (n^2 over a run)."""

    def __init__(self) -> None:
        self._low: list[float] = []  # negated: heapq is a min-heap
        self._high: list[float] = []

    def __len__(self) -> int:
        return len(self._low) + len(self._high)

    def add(self, x: float) -> None:
        """Take one value (finite)."""
        if self._low and x > -self._low[0]:
            heapq.heappush(self._high, x)
        else:
            heapq.heappush(self._low, -x)
        if len(self._low) > len(self._high) + 1:
            heapq.heappush(self._high, -heapq.heappop(self._low))
        elif len(self._high) > len(self._low):
            heapq.heappush(self._low, -heapq.heappop(self._high))

    def median(self) -> float | None:
        """The median (mean of the two middle values for an even count); None when empty."""
        if not self._low:
            return None
        if len(self._low) > len(self._high):
            return -self._low[0]
        return (-self._low[0] + self._high[0]) / 2.0


@dataclass
class _GroupRow:
    done: int = 0
    values: RunningMedian = field(default_factory=RunningMedian)
    flags: int = 0
    last: float | None = None
    taus: np.ndarray | None = None  # the tail's time constants, s, of the last fitted event


def _event_figures(wf: Waveform, charge: bool, taus: np.ndarray | None = None) -> dict[str, Any]:
    """|Peak current|, charge and the analysis flag of one event (via rig.analysis.metrics);
    the tail beyond the record is fitted only when the live figure is the ``charge``, trying
    the time constants ``taus`` (s) first."""
    from rig.analysis.metrics import quick_metrics

    return quick_metrics(wf, tail_fit=charge, tail_taus=taus)


def _tail_taus(m: dict[str, Any]) -> np.ndarray | None:
    """The fitted tail's time constants, s, slowest first, from one event's metrics; None
    when no tail was measured (unmeasured or not fitted: the next event fits afresh)."""
    if not m["charge_tail_c"] == m["charge_tail_c"]:  # NaN
        return None
    return np.array([m[f"term{j}_tau_s"] for j in range(1, int(m["tail_terms"]) + 1)])


class LiveDisplay(Observer):
    """Observer that renders progress; a context manager around the run."""

    def __init__(
        self,
        plan: Any,
        *,
        quiet: bool = False,
        console: Console | None = None,
        charge_captures: frozenset[str] = frozenset(),
    ) -> None:
        self.plan = plan
        # captures whose live figure is the charge (the long records); the others show |peak|
        self.charge_captures = charge_captures
        self.console = console or Console(stderr=True)
        self.quiet = quiet or not self.console.is_terminal
        self.groups: OrderedDict[tuple, _GroupRow] = OrderedDict()
        self.progress = Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("events"),
            TimeRemainingColumn(),
            console=self.console,
        )
        self.task = self.progress.add_task("run", total=len(plan.events))
        self._live: Live | None = None
        self._done = 0
        self._planned = len(plan.events)

    # -- context ---------------------------------------------------------------------------------
    def __enter__(self) -> LiveDisplay:
        if not self.quiet:
            self._live = Live(self._render(), console=self.console, refresh_per_second=4)
            self._live.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        if self._live is not None:
            self._live.update(self._render())
            self._live.__exit__(*exc)
            self._live = None

    # -- observer --------------------------------------------------------------------------------
    def start(self, planned: int, done: int) -> None:
        self._done = done
        self.progress.update(self.task, completed=done)
        if done:
            self.message(f"{done} of {planned} events already done; continuing")

    def phase(self, event: Any, phase: Phase) -> None:
        if phase is Phase.SETUP:
            self.progress.update(
                self.task, description=f"{event.meter} {event.mode} {event.volts:g} V"
            )

    def committed(self, row: dict[str, Any], waveform: Waveform | None) -> None:
        key = (
            row["meter"],
            row["mode"],
            row.get("capture", "main"),
            row["volts"],
            row["load"],
            row["delay_s"],
        )
        g = self.groups.setdefault(key, _GroupRow())
        g.done += 1
        if waveform is None:
            g.flags += 1
            g.last = None
        else:
            charge = key[2] in self.charge_captures
            m = _event_figures(waveform, charge, g.taus)
            if charge:
                g.taus = _tail_taus(m)
            g.flags += int(m["flagged"])
            value = m["charge_c"] if charge else m["abs_peak_a"]
            g.last = value
            if value is not None and value == value:  # NaN-safe
                g.values.add(abs(value))
        self._done += 1
        self.progress.update(self.task, completed=self._done)
        if self._live is not None:
            self._live.update(self._render())
        elif g.done == 1 or self._done % max(1, self._planned // 10) == 0:
            self.message(f"{self._done}/{self._planned} events; {self._describe(key, g)}")

    def message(self, text: str) -> None:
        if self._live is not None:
            self._live.console.print(text)
        else:
            print(text, file=sys.stderr, flush=True)

    # -- rendering -------------------------------------------------------------------------------
    def _figure(self, capture: str) -> tuple[str, str]:
        """(label, unit) of the live figure of a capture."""
        return ("charge", "C") if capture in self.charge_captures else ("|peak|", "A")

    def _describe(self, key: tuple, g: _GroupRow) -> str:
        meter, mode, capture, volts, load, delay = key
        label, unit = self._figure(capture)
        med = g.values.median()
        return (
            f"{meter} {mode} [{capture}] {volts:g} V {load}: {g.done} done, last {label} "
            f"{eng(g.last, unit)}, median {eng(med, unit)}, flagged {g.flags}"
        )

    def _render(self) -> Group:
        table = Table(title=None, expand=False, pad_edge=False)
        left = ("meter", "mode", "capture", "load", "figure")
        columns = (
            "meter",
            "mode",
            "capture",
            "volts",
            "load",
            "delay",
            "done",
            "figure",
            "last",
            "median",
            "flagged",
        )
        for col in columns:
            table.add_column(col, justify="left" if col in left else "right")
        for (meter, mode, capture, volts, load, delay), g in list(self.groups.items())[-12:]:
            label, unit = self._figure(capture)
            med = g.values.median()
            table.add_row(
                str(meter),
                str(mode),
                str(capture),
                f"{volts:g} V",
                str(load),
                eng(delay, "s"),
                str(g.done),
                label,
                eng(g.last, unit),
                eng(med, unit),
                str(g.flags),
            )
        return Group(self.progress, table)
