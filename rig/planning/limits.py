"""Limits on everything a sequence file can ask for, decided in one place.

:func:`checked_plan` is the only way the commands build a plan (``rig check``, ``rig run``,
``rig resume``): the size of the plan is computed from the sequence *before* any event is
made (``repetitions = 10**11`` is refused in microseconds, not after gigabytes), then the
times are checked, and the scope settings are checked against the scope profile's own
``[scope.ranges]`` (the same table the scope driver enforces at run time). So ``rig check``
refuses exactly what ``rig run`` refuses, before the bench is opened.

The ceilings are this project's choice (common practice, no source): a plan a person can
review and a run that ends within a week.
"""

from __future__ import annotations

import math
from typing import Any

from drivers.profile import Profile
from rig.planning.benchfile import Bench
from rig.planning.plan import Plan, build_plan
from rig.planning.sequence import Sequence
from rigbase.errors import FileFormatError

__all__ = ["LIMITS", "checked_plan", "plan_size"]

#: name -> ceiling; times in seconds
LIMITS: dict[str, float] = {
    "events": 100_000,  # events per plan
    "dwell_s": 3600.0,  # charge dwell per event
    "hold_s": 3600.0,  # bleed hold per event
    "delay_s": 3600.0,  # isolation delay before a discharge
    "acquisition_timeout_s": 600.0,  # wait for a trigger
    "run_s": 7 * 86400.0,  # estimated duration of the whole run
}


def plan_size(seq: Sequence) -> int:
    """Number of events the sequence asks for, without making them (exact integer)."""
    modes = sum(len(m.modes) for m in seq.meters)
    return (
        modes
        * len(seq.captures)
        * len(seq.volts)
        * len(seq.loads)
        * len(seq.delays_s)
        * int(seq.repetitions)
    )


def _refuse(seq: Sequence, key: str, problem: str) -> FileFormatError:
    return FileFormatError(seq.path, key, problem)


def checked_plan(seq: Sequence, bench: Bench) -> Plan:
    """The plan of ``seq`` on ``bench``, or FileFormatError/LimitError naming the sequence
    file, the key and the limit. Every command that plans calls this, nothing else."""
    n = plan_size(seq)
    if n > LIMITS["events"]:
        raise _refuse(
            seq,
            "sequence.repetitions",
            f"the plan would hold {n:,} events, above the limit of {int(LIMITS['events']):,} "
            "per run: split the sequence",
        )
    for key, limit, value in (
        ("charge.dwell_s", "dwell_s", seq.dwell_s),
        ("bleed.hold_s", "hold_s", seq.hold_s),
        ("discharge.delays_s", "delay_s", max(seq.delays_s, default=0.0)),
    ):
        ceiling = LIMITS[limit]
        if not (math.isfinite(value) and value <= ceiling):
            raise _refuse(seq, key, f"{value:g} s is above the limit of {ceiling:g} s")
    _check_scope(seq, bench)
    plan = build_plan(seq, bench)
    if not (math.isfinite(plan.estimated_s) and plan.estimated_s <= LIMITS["run_s"]):
        raise _refuse(
            seq,
            "sequence",
            f"the run would take about {plan.estimated_s / 3600:.3g} h, above the limit of "
            f"{LIMITS['run_s'] / 3600:g} h: split the sequence",
        )
    return plan


def _check_scope(seq: Sequence, bench: Bench) -> None:
    """Every scope set-up the plan will send, against the scope profile's ranges."""
    spec = bench.instruments["scope"]
    ranges = Profile.load(spec.profile).ranges("scope")
    seen: set[Any] = set()
    for meter in seq.meters:
        for mode in meter.modes:
            for capture in seq.captures:
                s = seq.scope_for(mode, capture)
                if s in seen:
                    continue
                seen.add(s)
                where = "scope" if len(seq.captures) < 2 else f"scope.captures.{capture}"
                for name, value, key in (
                    ("points", s.points, "points"),
                    ("seconds", s.sample_interval_s, "sample_interval_s"),
                ):
                    if name in ranges:
                        low, high = ranges[name]
                        if not low <= value <= high:
                            raise _refuse(
                                seq,
                                f"{where}.{key}",
                                f"{value:g} is outside [{low:g}, {high:g}] of the scope "
                                f"profile {spec.profile.name} [scope.ranges] {name}",
                            )
                t = s.acquisition_timeout_s
                if not (math.isfinite(t) and t <= LIMITS["acquisition_timeout_s"]):
                    raise _refuse(
                        seq,
                        f"{where}.acquisition_timeout_s",
                        f"{t:g} s is above the limit of {LIMITS['acquisition_timeout_s']:g} s",
                    )
