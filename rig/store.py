"""Run folders on disk: manifest, append-only journal, waveform files, event table.

Layout of ``results/<run-id>/`` (format 1)::

    manifest.json    what was run, on what, by which software; status and times
    plan.json        the planned events in order (the runner's to-do list, for resume)
    journal.jsonl    one JSON object per finished event, appended, flushed and fsynced
    waveforms/       one ``<event>.npz`` per captured event (see rig.waveform)
    events.parquet   the journal as a table, written when the run ends

A killed run loses at most the event in flight: a final journal line without its newline is
ignored (and later overwritten on resume).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from drivers.errors import RunFolderError

__all__ = ["read_journal", "read_manifest", "read_plan"]

MANIFEST = "manifest.json"
PLAN = "plan.json"
JOURNAL = "journal.jsonl"
WAVEFORMS = "waveforms"
EVENTS = "events.parquet"


def read_manifest(run_dir: str | Path) -> dict[str, Any]:
    """The run's manifest as a dict (RunFolderError if missing or not JSON)."""
    path = Path(run_dir) / MANIFEST
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RunFolderError(f"{path}: no manifest; is {run_dir} a run folder?") from None
    except json.JSONDecodeError as exc:
        raise RunFolderError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno})") from None


def read_plan(run_dir: str | Path) -> list[dict[str, Any]]:
    """The planned events, in order."""
    path = Path(run_dir) / PLAN
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RunFolderError(f"{path}: no plan file") from None
    except json.JSONDecodeError as exc:
        raise RunFolderError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno})") from None


def read_journal(run_dir: str | Path) -> list[dict[str, Any]]:
    """Finished events in the order they were journalled.

    A last line without its newline (the event in flight when the process died) is ignored;
    a complete line that is not JSON is corruption and raises RunFolderError naming the line.
    """
    path = Path(run_dir) / JOURNAL
    if not path.exists():
        return []
    data = path.read_bytes()
    lines = data.split(b"\n")
    complete = lines[:-1]  # the piece after the last newline is partial (or empty)
    rows = []
    for lineno, raw in enumerate(complete, start=1):
        if not raw.strip():
            continue
        try:
            rows.append(json.loads(raw))
        except json.JSONDecodeError as exc:
            raise RunFolderError(f"{path}:{lineno}: journal line is not JSON ({exc.msg})") from None
    return rows
