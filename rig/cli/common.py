"""What every command shares: the high-voltage caution, the exit codes, the bundled demo files,
output and time helpers.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from pathlib import Path
from typing import Any

log = logging.getLogger("rig")


CAUTION = """\
HIGH VOLTAGE. This tool charges a meter's input to up to about a kilovolt; the voltages and
stored charges on the bench can injure or kill. Follow your local electrical codes, your
lab's safety rules and licensed practice: this software does not replace them. Use an
enclosed, interlocked bench with a hardware emergency stop; treat every input and lead as
live until measured discharged; keep hands off the bench while a run is active (Ctrl-C
stops a run and drives the bench to its safe state)."""


SOURCE_ROOT = Path(__file__).resolve().parents[2]


DEMO_SEQUENCE = SOURCE_ROOT / "sequences" / "qualification.toml"


DEMO_BENCH = SOURCE_ROOT / "sequences" / "benches" / "sim-demo.toml"


EXIT_OK, EXIT_NO, EXIT_INPUT, EXIT_BENCH, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


def _out(text: str = "") -> None:
    try:
        print(text, flush=True)
    except BrokenPipeError:
        _stdout_gone()


def _stdout_gone() -> None:
    """The reader of the standard output has gone (``rig run ... | head``). The command goes
    on, since a run's events, safe state, analysis and report matter more than its printed
    lines; the rest of its output is dropped, stdout pointed at the null device so that no
    later write or the final flush fails (Python's ``signal`` documentation, "Note on
    SIGPIPE")."""
    try:
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, sys.stdout.fileno())
        os.close(null)
    except (OSError, ValueError):  # no file descriptor behind stdout (captured in tests)
        pass
    print("rig: standard output closed; going on without printing", file=sys.stderr)


def _now_iso() -> str:
    return _now().isoformat(timespec="seconds")


def _now() -> Any:
    from datetime import UTC, datetime

    return datetime.now(UTC)


def _today() -> Any:
    """Today's date (UTC), for calibration due dates."""
    return _now().date()


class _pd_display:
    def __enter__(self) -> None:
        import pandas as pd

        self._ctx = pd.option_context("display.width", 160, "display.max_columns", 20)
        self._ctx.__enter__()

    def __exit__(self, *exc: object) -> None:
        self._ctx.__exit__(*exc)


def _si(text: str) -> float:
    """A command-line number with an optional SI prefix (``200n``, ``1k``)."""
    from rigbase.tomlcheck import parse_si

    try:
        return parse_si(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _must_be_run(run: str | Path) -> None:
    """RunFolderError unless ``run`` holds a manifest (before a lock file is made there)."""
    from rig.store.runfolder import read_manifest

    read_manifest(run)


_RUN: dict[str, Path] = {}  # the run folder this process writes (for the interrupt message)


def _print_verdicts(groups: Any) -> dict[str, int]:
    """One line: how many group x limit checks passed, failed, or had too few events."""
    if not len(groups) or "verdict" not in groups:
        return {}
    counts = groups["verdict"].dropna().value_counts().to_dict()
    counts = {k: int(v) for k, v in counts.items() if str(k).strip()}
    if counts:
        _out(
            "verdicts against the sequence's limits: "
            + ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
        )
    return counts
