"""Before a run starts: calibration in date, and who runs it (recorded in the manifest).

:func:`check_calibration` refuses a run on a bench with a calibration record past its due
date: on the simulated bench, and on real hardware without a terminal to ask, with one line
(:class:`~rigbase.errors.LimitError`, exit 2); on real hardware with a terminal it asks the
operator, who must type ``overdue`` to go on, and that acceptance is recorded.
:func:`sign_off` builds the manifest's ``operator`` block: the operator's name and a sign-off
line saying who started the run, when, and on which calibration.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from typing import Any

from rig.planning.calibration import overdue
from rigbase.errors import LimitError

__all__ = ["check_calibration", "sign_off"]

Ask = Callable[[str], str]


def check_calibration(bench: Any, today: dt.date, ask: Ask | None) -> list[str]:
    """Raise LimitError for a record past due unless the operator accepts it (real hardware,
    ``ask`` given); returns the items whose lapse was accepted (empty when all are in date)."""
    late = overdue(bench.calibration, today)
    if not late:
        return []
    first = late[0]
    line = (
        f"{bench.path}: [calibration.{first.item}] due {first.due} has passed "
        f"(today {today.isoformat()}); recalibrate and update the record"
    )
    if bench.simulation is not None or ask is None:
        raise LimitError(line)
    answer = ask(f"{line}. Type 'overdue' to run anyway: ").strip()
    if answer != "overdue":
        raise LimitError(line)
    return [r.item for r in late]


def sign_off(
    bench: Any, operator: str | None, line: str | None, accepted: list[str], now: dt.datetime
) -> dict[str, Any]:
    """The manifest's ``operator`` block: name, sign-off line, accepted lapses."""
    name = (operator or "").strip()
    if not name and bench.simulation is None:
        raise LimitError("real hardware needs the operator's name: pass --operator NAME")
    name = name or "(simulated bench)"
    in_date = "overdue, accepted: " + ", ".join(accepted) if accepted else "in date"
    if not bench.calibration.records:
        in_date = "none recorded"
    default = f"Started by {name} on {now.isoformat(timespec='seconds')}; calibration {in_date}."
    return {"name": name, "sign_off": (line or "").strip() or default, "overdue_accepted": accepted}
