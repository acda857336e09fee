"""Reuse of a run's earlier per-event metrics: which events of metrics.parquet still hold.

The metrics of one event depend on nothing but its journal row (voltage, load, status, the
waveform file's name and SHA-256) and the code that computes them; the analysis works
through the events in batches whose make-up does not change any event's numbers. So when
``metrics.parquet`` was written by the same analysis code, an event whose journal row is
unchanged keeps its stored metric columns, and only new events, or events whose journal row
changed (a retaken event after ``rig resume``, another file), are analysed again.

Every row of metrics.parquet carries :data:`DIGEST_COLUMN`, a digest of the journal row it
was computed from; its sidecar (:mod:`rig.analysis.provenance`) records
:func:`metrics_options`: :data:`ANALYSIS_VERSION` and a fingerprint of the metric code
(the source of the modules that compute metrics, and the numpy and scipy versions), so an
edit of that code, or another channel, makes every event count as changed, and the table's
own SHA-256, so only the very file that analysis wrote is reused. A stored table that cannot
be trusted (changed since, unreadable, without the columns or types the analysis writes, a
sidecar that cannot be read) is logged as a warning and ignored: the caller analyses every
event, never reuses numbers it cannot vouch for.
"""

from __future__ import annotations

import functools
import hashlib
import importlib.util
import json
import logging
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "ANALYSIS_VERSION",
    "DIGEST_COLUMN",
    "code_fingerprint",
    "journal_digest",
    "journal_digests",
    "metrics_options",
    "reusable_metrics",
    "stats_options",
    "up_to_date",
]

log = logging.getLogger(__name__)

#: Raise when the meaning of a stored metric changes without its code changing (a new
#: convention, a data file); any edit of the metric code changes :func:`code_fingerprint`.
ANALYSIS_VERSION = 1

#: Column of metrics.parquet: digest of the journal row each event was analysed from.
DIGEST_COLUMN = "journal_digest"

# modules whose source decides an event's metrics (reading, batching, kernel, constants)
_METRIC_MODULES = (
    "rig.analysis.analyze",
    "rig.analysis.baseline",
    "rig.analysis.batches",
    "rig.analysis.metrics",
    "rig.analysis.pulses",
    "rig.analysis.shape",
    "rig.analysis.wholecharge",
    "rig.store.schema",
    "rig.store.waveform",
    "rig.store.zarrwave",
)


# modules whose source decides groups.csv and selfdischarge.csv from metrics.parquet
_STATS_MODULES = (
    "rig.analysis.analyze",
    "rig.analysis.options",
    "rig.analysis.selfdischarge",
    "rig.analysis.stats",
    "rig.store.schema",
)


@functools.cache
def code_fingerprint(modules: tuple[str, ...] = _METRIC_MODULES) -> str:
    """SHA-256 (hex) of the modules' source (by default the metric modules) and the numpy
    and scipy versions."""
    h = hashlib.sha256()
    for name in modules:
        spec = importlib.util.find_spec(name)
        origin = spec.origin if spec is not None else None
        h.update(name.encode() + b"\0")
        h.update(Path(origin).read_bytes() if origin else b"<no source>")
    for dist in ("numpy", "scipy"):
        h.update(f"{dist}=={metadata.version(dist)}\0".encode())
    return h.hexdigest()


def metrics_options(channel: str) -> dict[str, Any]:
    """What made metrics.parquet besides the journal: recorded in its sidecar and compared
    before any stored row is reused."""
    return {
        "analysis_version": ANALYSIS_VERSION,
        "metric_code": code_fingerprint(),
        "channel": channel,
    }


def stats_options() -> dict[str, Any]:
    """Recorded beside groups.csv and selfdischarge.csv besides the analysis options: the
    fingerprint of the code that summarises metrics.parquet into them."""
    return {"stats_code": code_fingerprint(_STATS_MODULES)}


def up_to_date(
    run_dir: str | Path, options: dict[str, Any], channel: str
) -> tuple[pd.DataFrame, pd.DataFrame | None] | None:
    """(groups, selfdischarge or None) as stored, when nothing has changed since they were
    written: the journal, manifest and tables are the ones their sidecars record, made by
    this code with ``options`` (those of groups.csv, :func:`stats_options` included); else
    None (the caller analyses). Nothing is read from the waveforms, and of metrics.parquet
    only the columns that tell a delay sweep (the whole table grows with the events)."""
    from rig.analysis.provenance import mismatch, read_options
    from rig.analysis.selfdischarge import SWEEP_KEYS, has_delay_sweep
    from rig.store.tables import read_csv_table, read_parquet_table
    from rig.store.waveform import sha256_file
    from rigbase.errors import RigError

    run_dir = Path(run_dir)
    m_path, g_path, sd_path = (
        run_dir / n for n in ("metrics.parquet", "groups.csv", "selfdischarge.csv")
    )
    derived = {"metrics.parquet": m_path, "manifest.json": run_dir / "manifest.json"}
    try:
        if mismatch(m_path, metrics_options(channel), {"journal.jsonl": run_dir / "journal.jsonl"}):
            return None
        rec = read_options(m_path)
        if rec is None or rec.options.get("table_sha256") != sha256_file(m_path):
            return None
        if mismatch(g_path, options, derived):
            return None
        metrics = read_parquet_table(m_path, columns=[*SWEEP_KEYS, "delay_s"])
        sweep = has_delay_sweep(metrics)
        if sweep != sd_path.exists() or (sweep and mismatch(sd_path, options, derived)):
            return None
        groups = read_csv_table(g_path)
        sd = read_csv_table(sd_path) if sweep else None
    except (RigError, OSError, ValueError) as exc:
        log.info("%s: stored analysis not reused (%s)", run_dir, exc)
        return None
    return groups, sd


def journal_digest(row: dict[str, Any], run_dir: str | Path) -> str:
    """Digest of one journal row (all its fields, key order aside). A captured row without a
    file checksum (never written so by this software) adds the file's size and time."""
    extra = ""
    f = row.get("file")
    if isinstance(f, str) and f and not row.get("sha256"):
        try:
            st = (Path(run_dir) / f).stat()
            extra = f"{st.st_size}:{st.st_mtime_ns}"
        except OSError:
            extra = "missing"
    text = json.dumps(row, sort_keys=True, separators=(",", ":"), default=str) + extra
    return hashlib.blake2b(text.encode(), digest_size=16).hexdigest()


def journal_digests(rows: list[dict[str, Any]], run_dir: str | Path) -> dict[int, str]:
    """{event: digest of its journal row}; the last row of an event wins (as in the journal
    table after a resume)."""
    run_dir = Path(run_dir)
    last = {int(r["event"]): r for r in rows}
    return {e: journal_digest(r, run_dir) for e, r in last.items()}


def reusable_metrics(
    path: str | Path, options: dict[str, Any], schema: dict[str, np.dtype]
) -> pd.DataFrame | None:
    """The stored rows of ``path`` (metrics.parquet) that may be reused, indexed by event:
    columns ``schema`` (name -> dtype the analysis writes) and :data:`DIGEST_COLUMN`.

    None when there is nothing to reuse: no file (first analysis), a file from other
    analysis code or options (logged), or a file that cannot be trusted (logged as a
    warning: unreadable, a column missing or of another type, events not unique)."""
    from rig.analysis.provenance import read_options
    from rig.store.tables import read_parquet_table
    from rig.store.waveform import sha256_file
    from rigbase.errors import RigError

    path = Path(path)
    if not path.exists():
        return None
    full = "; analysing every event"
    try:
        rec = read_options(path)
    except RigError as exc:
        log.warning("%s%s", exc, full)
        return None
    if rec is None:
        log.info("%s records no options (older version)%s", path, full)
        return None
    diff = [k for k, v in options.items() if rec.options.get(k) != v]
    if diff:
        log.info("%s was made with other %s%s", path, ", ".join(diff), full)
        return None
    if rec.options.get("table_sha256") != sha256_file(path):
        log.warning("%s is not the table its options record describes%s", path, full)
        return None
    try:
        table = read_parquet_table(path)
    except (RigError, OSError, ValueError) as exc:  # RunFolderError names the file
        log.warning("%s%s", exc, full)
        return None
    want = {"event": None, DIGEST_COLUMN: None, **schema}
    missing = [c for c in want if c not in table.columns]
    if missing:
        log.warning("%s lacks column(s) %s%s", path, ", ".join(missing), full)
        return None
    wrong = [c for c, dt in schema.items() if table[c].dtype != dt]
    if wrong:
        log.warning("%s: column(s) %s of another type%s", path, ", ".join(wrong), full)
        return None
    events = pd.to_numeric(table["event"], errors="coerce")
    if events.isna().any() or not events.is_unique or (events % 1 != 0).any():
        log.warning("%s: events missing, fractional or repeated%s", path, full)
        return None
    table = table[[DIGEST_COLUMN, *schema]]
    table.index = pd.Index(events.astype(np.int64), name="event")
    return table
