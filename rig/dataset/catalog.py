"""The runs under a results folder, one row each: what was tested, how far it got, when.

A run folder is any directory holding a ``manifest.json`` (rig.store.runfolder). The counts
come from the plan and the journal (captured = journal rows with status "captured"); the
meters come from the resolved sequence in the manifest, or from the journal for runs whose
manifest does not list them. Nothing here writes.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from rig.store.runfolder import iter_journal, iter_plan, read_manifest
from rigbase.errors import RunFolderError

__all__ = ["CATALOG_COLUMNS", "find_runs", "list_runs", "run_entry"]

CATALOG_COLUMNS: tuple[str, ...] = (
    "run_id",
    "status",
    "models",
    "serials",
    "n_planned",
    "n_events",
    "n_captured",
    "started",
    "ended",
    "analysed",
    "path",
)


def find_runs(root: str | Path) -> list[Path]:
    """Run folders at ``root`` (itself, or its direct sub-folders), sorted by name (run ids
    start with the date, so this is the order they were started)."""
    root = Path(root)
    if not root.is_dir():
        raise RunFolderError(f"{root}: no such folder")
    if (root / "manifest.json").is_file():
        return [root]
    return sorted(p for p in root.iterdir() if (p / "manifest.json").is_file())


def _meters(
    manifest: dict[str, Any], journalled: dict[tuple[str, str], None]
) -> list[tuple[str, str]]:
    """(model, serial) pairs in test order: the sequence's, else ``journalled`` (the journal's
    pairs in order of first appearance)."""
    seq = manifest.get("sequence")
    listed = seq.get("meters") if isinstance(seq, dict) else None
    if isinstance(listed, list) and listed:
        return [(str(m.get("model", "")), str(m.get("serial", ""))) for m in listed]
    return list(journalled)


def run_entry(run_dir: str | Path) -> dict[str, Any]:
    """One catalog row (columns CATALOG_COLUMNS) for a run folder."""
    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    try:
        planned = sum(1 for _ in iter_plan(run_dir))
    except RunFolderError:
        planned = int(manifest.get("planned_events") or 0)
    # one pass over the journal, row by row (as a list it is 250 MB at 100,000 events)
    captured: dict[int, bool] = {}  # event -> captured; the last entry wins on resume
    pairs: dict[tuple[str, str], None] = {}
    for r in iter_journal(run_dir):
        if "event" in r:
            captured[int(r["event"])] = r.get("status") == "captured"
        pairs.setdefault((str(r.get("meter", "")), str(r.get("serial", ""))), None)
    meters = _meters(manifest, pairs)
    return {
        "run_id": str(manifest.get("run_id") or run_dir.name),
        "status": str(manifest.get("status", "unknown")),
        "models": ", ".join(dict.fromkeys(m for m, _ in meters)),
        "serials": ", ".join(dict.fromkeys(s for _, s in meters)),
        "n_planned": planned,
        "n_events": len(captured),
        "n_captured": sum(captured.values()),
        "started": manifest.get("started"),
        "ended": manifest.get("ended"),
        "analysed": (run_dir / "metrics.parquet").is_file(),
        "path": str(run_dir),
    }


def list_runs(root: str | Path) -> pd.DataFrame:
    """The catalog of the run folders at ``root`` (see :func:`find_runs`)."""
    rows = [run_entry(p) for p in find_runs(root)]
    return pd.DataFrame(rows, columns=list(CATALOG_COLUMNS))
