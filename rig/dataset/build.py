"""One Parquet dataset from many analysed run folders, built and updated idempotently.

Layout of a dataset folder::

    runs.parquet          one row per run in the dataset: the catalog columns
                          (rig.dataset.catalog) plus metrics_sha256, rows, added
    events/<run-id>.parquet
                          the run's metrics.parquet rows with EVENT_COLUMNS, one file per
                          run (the partitioning: a run is added, replaced or kept whole)

Every events row carries ``run_id``, ``model`` (the meter model; the journal's ``meter``),
``serial`` and ``time`` (when the event was recorded, UTC timestamp), so a file read on its
own still says where each number came from. DuckDB, pyarrow, pandas and Dask read the
``events`` folder as it is (``read_parquet('DATASET/events/*.parquet')``).

Idempotence: a run is identified by its run id and the SHA-256 of its metrics.parquet. Adding
a run already there with the same checksum changes nothing; a re-analysed run (new checksum)
replaces its file. Each file is written under a temporary name and renamed, and
``runs.parquet`` is rewritten (atomically) last, so a crash leaves at worst a run file that
the next build rewrites. Runs not yet analysed are skipped and reported (run ``rig analyze``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from rig.analysis.stats import with_capture
from rig.dataset.catalog import run_entry
from rig.store.atomic import atomic_write
from rig.store.runfolder import read_manifest
from rig.store.schema import METRIC_COLUMNS
from rig.store.waveform import sha256_file
from rigbase.errors import RunFolderError

__all__ = ["EVENT_COLUMNS", "BuildSummary", "build_dataset", "events_dir", "read_runs_table"]

RUNS = "runs.parquet"
EVENTS = "events"

# column -> dtype of every events file (a fixed schema so that every reader sees one table)
_IDENTITY = {
    "run_id": "string",
    "model": "string",
    "serial": "string",
    "time": "datetime64[us, UTC]",
    "event": "int64",
    "rep": "int64",
    "mode": "string",
    "capture": "string",
    "volts": "float64",
    "load": "string",
    "load_ohms": "float64",
    "delay_s": "float64",
    "status": "string",
}
_FLOATS_AFTER = ("dt_s", "record_s")


def _metric_dtype(name: str) -> str:
    # counts and polarity too are float64: an older run may have NaN where no pulse was found
    return "bool" if name.startswith("flag_") else "float64"


EVENT_COLUMNS: dict[str, str] = {
    **_IDENTITY,
    **{m: _metric_dtype(m) for m in METRIC_COLUMNS},
    **dict.fromkeys(_FLOATS_AFTER, "float64"),
}


@dataclass
class BuildSummary:
    """What :func:`build_dataset` did, by run id."""

    added: list[str] = field(default_factory=list)
    replaced: list[str] = field(default_factory=list)
    unchanged: list[str] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)  # run folder -> why


def events_dir(dataset: str | Path) -> Path:
    """The folder of per-run events files of a dataset."""
    return Path(dataset) / EVENTS


def read_runs_table(dataset: str | Path) -> pd.DataFrame:
    """The dataset's runs.parquet (empty when the dataset is new)."""
    path = Path(dataset) / RUNS
    if not path.exists():
        return pd.DataFrame(columns=["run_id", "metrics_sha256"])
    return pd.read_parquet(path)


def _events_frame(run_dir: Path, run_id: str) -> pd.DataFrame:
    """The run's metrics rows in the dataset's fixed schema."""
    m = with_capture(pd.read_parquet(run_dir / "metrics.parquet"))
    out = pd.DataFrame(index=m.index)
    for col, dtype in EVENT_COLUMNS.items():
        if col == "run_id":
            out[col] = run_id
        elif col == "model":
            out[col] = m["meter"] if "meter" in m else None
        elif col == "time":
            src = m["time"] if "time" in m else None
            out[col] = pd.to_datetime(src, utc=True, format="ISO8601")
        elif col in m:
            out[col] = m[col]
        else:
            out[col] = False if dtype == "bool" else (np.nan if dtype == "float64" else None)
        if col != "time":
            out[col] = out[col].astype(dtype)
    out["time"] = out["time"].astype(EVENT_COLUMNS["time"])
    return out.reset_index(drop=True)


def _write_atomic(frame: pd.DataFrame, path: Path) -> None:
    atomic_write(path, lambda tmp: frame.to_parquet(tmp, index=False))


def build_dataset(dataset: str | Path, run_dirs: list[str | Path]) -> BuildSummary:
    """Add (or refresh) analysed run folders in the dataset at ``dataset`` (made if absent)."""
    dataset = Path(dataset)
    events_dir(dataset).mkdir(parents=True, exist_ok=True)
    runs = read_runs_table(dataset)
    known = dict(zip(runs["run_id"], runs["metrics_sha256"], strict=True))
    entries = {str(r): row for r, row in zip(runs["run_id"], runs.to_dict("records"), strict=True)}
    summary = BuildSummary()
    for run_dir in map(Path, run_dirs):
        metrics = run_dir / "metrics.parquet"
        try:
            manifest = read_manifest(run_dir)
        except RunFolderError as exc:
            summary.skipped[str(run_dir)] = str(exc)
            continue
        if not metrics.is_file():
            summary.skipped[str(run_dir)] = "not analysed (run `rig analyze` first)"
            continue
        run_id, sha = str(manifest.get("run_id") or run_dir.name), sha256_file(metrics)
        target = events_dir(dataset) / f"{run_id}.parquet"
        if known.get(run_id) == sha and target.is_file():  # decided before reading the journal
            summary.unchanged.append(run_id)
            continue
        try:
            entry = run_entry(run_dir)
        except RunFolderError as exc:  # e.g. a journal line that is not JSON
            summary.skipped[str(run_dir)] = str(exc)
            continue
        frame = _events_frame(run_dir, run_id)
        _write_atomic(frame, target)
        (summary.replaced if run_id in known else summary.added).append(run_id)
        known[run_id] = sha
        entries[run_id] = {
            **entry,
            "metrics_sha256": sha,
            "rows": len(frame),
            "added": datetime.now(UTC).isoformat(timespec="seconds"),
        }
    if summary.added or summary.replaced or not (dataset / RUNS).exists():
        table = pd.DataFrame(list(entries.values()))
        if len(table):
            table = table.sort_values("run_id").reset_index(drop=True)
        _write_atomic(table, dataset / RUNS)
    return summary
