"""The plan: the ordered list of discharge events and its duration estimate (the safety review
of a plan is :mod:`rig.planning.review`).

Events are grouped by meter, then by mode (so that the operator turns the dial, or the rig
sends a function command, as seldom as possible), then by capture (so that the scope is set
up once per mode and capture), and inside a capture by voltage, load, delay and repetition,
in the order the sequence file lists them. Every event is planned once per capture: a fast
capture resolves the nanosecond peak, a long one records the millisecond tail and so the
charge. With ``order = "shuffled"`` the events of each (meter, mode, capture) block are put
in a seeded random order, and only inside that block: drift in the bench then spreads over
all groups instead of biasing the last ones, while the number of mode changes and scope
set-ups stays the same.

Nothing here touches an instrument.
"""

from __future__ import annotations

import logging
import math
import tomllib
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rig.planning.benchfile import Bench
from rig.planning.sequence import MeterSpec, Sequence

__all__ = [
    "EVENT_OVERHEAD_S",
    "METER_CHANGE_S",
    "MODE_CHANGE_MANUAL_S",
    "MODE_CHANGE_SCPI_S",
    "Event",
    "Finding",
    "Plan",
    "build_plan",
    "meter_capacitance_f",
]

log = logging.getLogger(__name__)

# Allowances for the duration estimate (our own rough figures, common practice, no source):
EVENT_OVERHEAD_S = 0.3  # SCPI exchanges per event: program, switch, arm, fetch, commit
MODE_CHANGE_MANUAL_S = 15.0  # operator reads the prompt, turns the dial, confirms
MODE_CHANGE_SCPI_S = 1.0  # function command and the meter settling
METER_CHANGE_S = 120.0  # operator swaps the meter under test and its leads


@dataclass(frozen=True)
class Event:
    """One planned discharge event (what the runner does and the journal records)."""

    index: int  # position in the plan, 0-based
    key: str  # stable identity, e.g. "m0|AC V|peak|1000|short|0|r007"
    meter_index: int  # index into sequence.meters
    meter: str  # meter model
    serial: str
    mode: str
    capture: str  # name of the scope capture (sequence.captures) that records this event
    volts: float  # charge setpoint, V
    load: str  # load name
    load_ohms: float  # its resistance, ohm
    delay_s: float  # open-circuit wait between charge and discharge, s
    rep: int  # repetition number inside its group, 0-based

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict of every field."""
        return asdict(self)


@dataclass(frozen=True)
class Plan:
    """The ordered events and figures about them."""

    events: tuple[Event, ...]
    mode_changes: int  # times the mode is set after the first event (a new meter counts)
    meter_changes: int  # times the meter under test is swapped
    max_volts: float  # highest charge voltage in the plan, V
    estimated_s: float  # rough real-time duration, s (see module constants)


@dataclass(frozen=True)
class Finding:
    """One result of the safety review: "stop" forbids the run, "warn" and "info" inform."""

    level: str  # "info" | "warn" | "stop"
    message: str


def _number_text(value: float) -> str:
    return f"{value:.10g}"


def event_key(
    meter_index: int, mode: str, capture: str, volts: float, load: str, delay_s: float, rep: int
) -> str:
    """The stable key of an event; unchanged as long as the sequence file is unchanged."""
    return (
        f"m{meter_index}|{mode}|{capture}|{_number_text(volts)}|{load}|"
        f"{_number_text(delay_s)}|r{rep:03d}"
    )


def build_plan(sequence: Sequence, bench: Bench) -> Plan:
    """Order the sequence's events and estimate the run's duration (s, real time)."""
    blocks: list[list[tuple[Any, ...]]] = []
    for m_index, meter in enumerate(sequence.meters):
        for k, mode in enumerate(meter.modes):
            for c_index, capture in enumerate(sequence.captures):
                block = [
                    (m_index, meter, mode, capture, volts, load, delay, rep)
                    for volts in sequence.volts
                    for load in sequence.loads
                    for delay in sequence.delays_s
                    for rep in range(sequence.repetitions)
                ]
                if sequence.order == "shuffled":
                    # One generator per block, seeded from (seed, meter, mode[, capture]): a
                    # block's order does not change when another meter, mode or capture is
                    # added to the file (the first capture keeps the seed of a file without).
                    entropy = [int(sequence.shuffle_seed or 0), m_index, k]
                    rng = np.random.default_rng(
                        np.random.SeedSequence(entropy + ([c_index] if c_index else []))
                    )
                    block = [block[i] for i in rng.permutation(len(block))]
                blocks.append(block)
    events: list[Event] = []
    for block in blocks:
        for m_index, meter, mode, capture, volts, load, delay, rep in block:
            events.append(
                Event(
                    index=len(events),
                    key=event_key(m_index, mode, capture, volts, load, delay, rep),
                    meter_index=m_index,
                    meter=meter.model,
                    serial=meter.serial,
                    mode=mode,
                    capture=capture,
                    volts=float(volts),
                    load=load,
                    load_ohms=bench.load(load).ohms,
                    delay_s=float(delay),
                    rep=rep,
                )
            )
    mode_changes = sum(
        1
        for a, b in zip(events, events[1:], strict=False)
        if (a.meter_index, a.mode) != (b.meter_index, b.mode)
    )
    meter_changes = sum(
        1 for a, b in zip(events, events[1:], strict=False) if a.meter_index != b.meter_index
    )
    plan = Plan(
        events=tuple(events),
        mode_changes=mode_changes,
        meter_changes=meter_changes,
        max_volts=max((e.volts for e in events), default=0.0),
        estimated_s=_estimate_s(events, sequence, bench),
    )
    log.info(
        "plan: %s events, %s mode changes, %s meter changes, about %.0f s",
        len(events),
        mode_changes,
        meter_changes,
        plan.estimated_s,
    )
    return plan


def meter_capacitance_f(meter: MeterSpec) -> float | None:
    """Sum of every capacitance in the meter's simulated netlist, F (None when unknown).

    Switches are ignored, so this is an upper estimate of what the input can store in any
    mode. The netlist is read directly (``[[element]]`` tables with ``kind = "C"`` and
    ``farads``).
    """
    if meter.sim_model is None:
        return None
    try:
        data = tomllib.loads(Path(meter.sim_model).read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError):
        return None
    total = 0.0
    for element in data.get("element", []):
        if isinstance(element, dict) and element.get("kind") == "C":
            farads = element.get("farads")
            if isinstance(farads, int | float) and not isinstance(farads, bool):
                total += float(farads)
    return total if total > 0 else None


def _bleed_s(volts: float, c_f: float | None, bench: Bench) -> float:
    """Time for the bleed to bring ``volts`` below the safe residual (0 when C is unknown)."""
    if c_f is None or volts <= bench.limits.safe_residual_volts:
        return 0.0
    return bench.bleed_ohms * c_f * math.log(volts / bench.limits.safe_residual_volts)


def _estimate_s(events: list[Event], sequence: Sequence, bench: Bench) -> float:
    caps = [meter_capacitance_f(m) for m in sequence.meters]
    manual = bench.instruments["meter"].control == "manual"
    total = 0.0
    previous: Event | None = None
    for e in events:
        if previous is None or previous.meter_index != e.meter_index:
            total += METER_CHANGE_S if previous is not None else 0.0
        if previous is None or (previous.meter_index, previous.mode) != (e.meter_index, e.mode):
            total += MODE_CHANGE_MANUAL_S if manual else MODE_CHANGE_SCPI_S
        scope = sequence.scope_for(e.mode, e.capture)
        total += (
            sequence.dwell_s
            + e.delay_s
            + scope.record_s
            + _bleed_s(e.volts, caps[e.meter_index], bench)
            + sequence.hold_s
            + EVENT_OVERHEAD_S
        )
        previous = e
    return total


# --------------------------------------------------------------------------------------------
# Safety review
# --------------------------------------------------------------------------------------------


def _si(value: float, unit: str) -> str:
    """Engineering notation: 1.03e-07 F -> '103 nF'."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}"
    prefixes = {-12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}
    exp = int(math.floor(math.log10(abs(value)) / 3) * 3)
    exp = max(-12, min(9, exp))
    return f"{value / 10**exp:.3g} {prefixes[exp]}{unit}"
