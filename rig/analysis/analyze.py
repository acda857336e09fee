"""Analysis of a run folder: the journal, the per-event metrics of its waveform files
(computed by :mod:`rig.analysis.metrics`) and the files written back into the folder.

:func:`analyze_run` applies this to a run folder and writes ``metrics.parquet``,
``groups.csv`` and, for delay sweeps, ``selfdischarge.csv`` (see DEVELOPERS.md).
"""

from __future__ import annotations

import functools
import logging
from collections import deque
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.batches import (
    BATCH_BYTES,
    BATCH_EVENTS,
    _batch_metrics,
    _batches,
    _waveform_files,
)
from rig.analysis.stats import GROUP_KEYS, with_capture
from rig.store.runfolder import iter_journal, iter_plan, read_manifest
from rig.store.schema import METRIC_COLUMNS
from rig.store.tables import read_parquet_table
from rigbase.errors import RunFolderError
from rigbase.memory import release_freed_memory
from rigbase.workers import Job, WorkerPool

__all__ = [
    "METRIC_COLUMNS",
    "AnalysisResult",
    "analysis_mismatch",
    "analysis_options",
    "analyze_run",
    "compute_metrics",
    "find_setting",
    "journal_frame",
    "recorded_analysis_options",
]

log = logging.getLogger(__name__)

_GROUP_KEYS = GROUP_KEYS  # defined once in rig.analysis.stats


@dataclass(frozen=True)
class AnalysisResult:
    """What :func:`analyze_run` computed and where it wrote it. ``metrics`` is the per-event
    table, or, when analyze_run was called with ``table=False``, read from metrics.parquet
    when first asked for (the table grows with the events; the commands need only the
    group table)."""

    _metrics: pd.DataFrame | None = field(repr=False)
    groups: pd.DataFrame
    selfdischarge: pd.DataFrame | None
    metrics_path: Path
    groups_path: Path
    selfdischarge_path: Path | None
    analysed: int = 0  # captured events whose waveform was read and analysed
    reused: int = 0  # events whose stored metrics were kept (journal row unchanged)

    @property
    def metrics(self) -> pd.DataFrame:
        """The per-event table as written (journal plus metrics, one row per event)."""
        if self._metrics is None:
            from rig.store.tables import read_parquet_table

            object.__setattr__(self, "_metrics", read_parquet_table(self.metrics_path))
        return self._metrics

    @property
    def paths(self) -> dict[str, Path]:
        """Files written, by name (metrics, groups and, for delay sweeps, selfdischarge)."""
        out = {"metrics": self.metrics_path, "groups": self.groups_path}
        if self.selfdischarge_path is not None:
            out["selfdischarge"] = self.selfdischarge_path
        return out


def find_setting(tree: Any, key: str) -> Any:
    """The first value stored under ``key`` anywhere in a nested dict/list (None if absent).

    The manifest keeps the resolved sequence and bench; analysis only needs a few of their
    values (limits, safe residual) and should not depend on where exactly they are nested.
    """
    if isinstance(tree, dict):
        if key in tree:
            return tree[key]
        children = tree.values()
    elif isinstance(tree, list):
        children = tree
    else:
        return None
    for child in children:
        hit = find_setting(child, key)
        if hit is not None:
            return hit
    return None


JOURNAL_CHUNK = 10_000  # journal rows turned into a table at a time (rows as dicts are bulky)


def journal_frame(
    run_dir: str | Path, rows: Iterable[dict[str, Any]] | None = None
) -> pd.DataFrame:
    """The journal as a DataFrame, one row per event (last entry wins after a resume).
    ``rows``: the journal as already read (read_journal, or any iterable of its rows), else
    it is read here line by line. Rows become table chunks of JOURNAL_CHUNK at a time, so a
    long journal is never held as a list of dicts (250 MB at 100,000 events)."""
    rows = iter_journal(run_dir) if rows is None else rows
    parts: list[pd.DataFrame] = []
    chunk: list[dict[str, Any]] = []
    for row in rows:
        chunk.append(row)
        if len(chunk) >= JOURNAL_CHUNK:
            parts.append(pd.DataFrame(chunk))
            chunk = []
    if chunk:
        parts.append(pd.DataFrame(chunk))
    if not parts:
        raise RunFolderError(f"{Path(run_dir) / 'journal.jsonl'}: no events journalled")
    if len(parts) == 1:
        df = parts[0]
    else:  # a column that is all None in one chunk came out as objects there: infer again
        df = pd.concat(parts, ignore_index=True, sort=False).infer_objects()
    missing = [c for c in ("event", "status", "file", "volts", "load_ohms") if c not in df]
    if missing:
        raise RunFolderError(f"{Path(run_dir) / 'journal.jsonl'}: rows lack {', '.join(missing)}")
    return df.drop_duplicates("event", keep="last").sort_values("event").reset_index(drop=True)


def _empty_results(n: int) -> dict[str, np.ndarray]:
    """The per-event columns of an event with no waveform, for ``n`` events (their dtypes are
    also the ones a reused metrics.parquet must have)."""
    res = {k: np.full(n, np.nan) for k in (*METRIC_COLUMNS, "dt_s", "record_s")}
    for k in ("flag_clipped", "flag_truncated", "flag_below_noise"):
        res[k] = np.zeros(n, dtype=bool)
    res["flag_not_captured"] = np.ones(n, dtype=bool)
    res["polarity"] = np.zeros(n, dtype=np.int8)
    res["pulses"] = np.zeros(n, dtype=np.int64)
    return res


#: name -> dtype of the per-event columns the analysis writes (and reuses)
RESULT_SCHEMA: dict[str, np.dtype] = {k: v.dtype for k, v in _empty_results(0).items()}


def compute_metrics(
    run_dir: str | Path,
    *,
    channel: str = "current",
    batch: int = BATCH_EVENTS,
    batch_bytes: int = BATCH_BYTES,
    reuse: pd.DataFrame | None = None,
    workers: int | None = None,
) -> pd.DataFrame:
    """Journal columns plus the per-event metrics of a run folder, without writing anything.

    The voltage for c_equiv is the meter's input just before the discharge: the pre-trigger
    mean of the divider channel when the waveform has one, else the journal's
    ``charged_volts`` (divider at the end of the dwell), else the supply readback
    (``supply_volts``), else the setpoint ``volts``. Besides METRIC_COLUMNS each event gets ``dt_s``
    (sample interval, s) and ``record_s`` (record span, samples x dt, s) of its waveform
    (NaN when not captured), and rows without a ``capture`` (older runs) get "main". The last
    column, ``journal_digest``, is a digest of the journal row each event was analysed from
    (:mod:`rig.analysis.incremental`).

    Waveform files are read one at a time and analysed in batches of at most ``batch``
    events and about ``batch_bytes`` of codes (bytes; only the analysed channel is kept), so
    memory does not grow with the number of events. ``reuse``: stored rows from
    :func:`rig.analysis.incremental.reusable_metrics`; an event whose journal digest is
    among them keeps its stored columns and its file is not read. ``workers``: processes
    computing batches side by side (rigbase.workers; default one per core, 1: all here);
    the numbers are the same whatever their number.
    """
    return _metrics_table(run_dir, channel, batch, batch_bytes, reuse, workers)[0]


def _metrics_table(
    run_dir: str | Path,
    channel: str,
    batch: int,
    batch_bytes: int,
    reuse: pd.DataFrame | None,
    workers: int | None = None,
) -> tuple[pd.DataFrame, int]:
    """:func:`compute_metrics` and the number of events whose waveform was analysed."""
    from rig.analysis.incremental import DIGEST_COLUMN, journal_digest

    run_dir = Path(run_dir)
    digests: dict[int, str] = {}

    def digested() -> Iterator[dict[str, Any]]:  # one pass: the table and each row's digest
        for row in iter_journal(run_dir):
            digests[int(row["event"])] = journal_digest(row, run_dir)  # the last row wins
            yield row

    jr = with_capture(journal_frame(run_dir, digested()))
    events = jr["event"].to_numpy(np.int64)
    # 32 ASCII bytes a row (a column of str objects is 2-3 times that); str again at the end
    digest = np.array([digests[int(e)] for e in events], dtype="S32")
    digests.clear()  # not kept while the waveforms are analysed
    volts = pd.to_numeric(jr["volts"], errors="coerce").to_numpy(float)
    if "supply_volts" in jr:
        readback = pd.to_numeric(jr["supply_volts"], errors="coerce").to_numpy(float)
        volts = np.where(np.isfinite(readback), readback, volts)
    if "charged_volts" in jr:
        measured = pd.to_numeric(jr["charged_volts"], errors="coerce").to_numpy(float)
        volts = np.where(np.isfinite(measured), measured, volts)
    ohms = pd.to_numeric(jr["load_ohms"], errors="coerce").to_numpy(float)
    res = _empty_results(len(jr))
    fresh = np.ones(len(jr), dtype=bool)
    if reuse is not None and len(reuse):
        pos = reuse.index.get_indexer(events)
        have = np.flatnonzero(pos >= 0)
        stored = reuse[DIGEST_COLUMN].to_numpy(object)[pos[have]].astype("S32")
        same = have[stored == digest[have]]
        for k in res:
            res[k][same] = reuse[k].to_numpy()[pos[same]]
        fresh[same] = False
    del reuse  # copied into res; the caller holds no other reference
    todo = jr.index[fresh & (jr["status"] == "captured").to_numpy()]
    files = _waveform_files(run_dir, jr, todo)
    # the journal table is not held while the waveforms are analysed (at 100,000 events it
    # is 36 MB, more than a batch's codes): it is read again below, unchanged under the lock
    del jr
    release_freed_memory()  # what the table's reading freed, before the batches' peak
    pending: deque[tuple[np.ndarray, float, int, Job]] = deque()

    def collect() -> None:  # the oldest batch's numbers into res (their rows are their own)
        ix, dt, n, job = pending.popleft()
        part = job.result()
        for k in METRIC_COLUMNS:
            res[k][ix] = part[k]
        res["flag_not_captured"][ix] = False
        res["dt_s"][ix] = dt
        res["record_s"][ix] = n * dt

    # batches computed in forked workers while this process reads the next; at most one
    # batch per worker in flight (memory stays that of a few batches)
    with WorkerPool(workers) as pool:
        for batch_events in _batches(run_dir, files, channel, batch, batch_bytes):
            ix = np.array([ev.index for ev in batch_events])
            v_in = np.array([ev.v_in for ev in batch_events])
            volts[ix] = np.where(np.isfinite(v_in), v_in, volts[ix])
            first = batch_events[0]
            job = pool.submit(
                _batch_metrics,
                np.stack([ev.codes for ev in batch_events]),
                first.dt,
                np.array([ev.t0 for ev in batch_events]),
                np.array([ev.gain for ev in batch_events]),
                np.array([ev.offset for ev in batch_events]),
                np.array([ev.code_min for ev in batch_events]),
                np.array([ev.code_max for ev in batch_events]),
                volts[ix],
                ohms[ix],
            )
            del batch_events
            pending.append((ix, first.dt, first.codes.size, job))
            del first
            while len(pending) >= pool.workers:
                collect()
        while pending:
            collect()
    jr = with_capture(journal_frame(run_dir))
    if not np.array_equal(jr["event"].to_numpy(np.int64), events):
        raise RunFolderError(f"{run_dir / 'journal.jsonl'}: changed while it was analysed")
    res[DIGEST_COLUMN] = digest.astype(str)
    # columns side by side, none copied (a column assigned into a table is copied: 28 MB
    # more at 100,000 events)
    out = pd.concat([jr, pd.DataFrame(res, index=jr.index, copy=False)], axis=1)
    log.info(
        "%s: analysed %s captured events, reused %s unchanged rows",
        run_dir,
        len(todo),
        int((~fresh).sum()),
    )
    return out, len(todo)


def analysis_options(
    confidence: float, coverage: float, seed: int, safe_residual_volts: float | None
) -> dict[str, Any]:
    """The options recorded beside groups.csv (rig.analysis.provenance); the report reads
    them back with :func:`rig.analysis.provenance.read_options`."""
    return {
        "confidence": confidence,
        "coverage": coverage,
        "seed": seed,
        "safe_residual_volts": safe_residual_volts,
    }


def _record(
    run_dir: Path,
    confidence: float,
    coverage: float,
    seed: int,
    safe_volts: float | None,
    sd_path: Path | None,
    channel: str,
) -> None:
    from rig.analysis.incremental import metrics_options, stats_options
    from rig.analysis.provenance import record_options

    opts = {**analysis_options(confidence, coverage, seed, safe_volts), **stats_options()}
    from rig.store.waveform import sha256_file

    metrics_path = run_dir / "metrics.parquet"
    # the table's own checksum: a later analysis reuses rows only of the very file written here
    made = {**metrics_options(channel), "table_sha256": sha256_file(metrics_path)}
    record_options(metrics_path, "metrics", made, {"journal.jsonl": run_dir / "journal.jsonl"})
    inputs = {
        "metrics.parquet": run_dir / "metrics.parquet",
        "manifest.json": run_dir / "manifest.json",
    }
    record_options(run_dir / "groups.csv", "groups", opts, inputs)
    if sd_path is not None:
        record_options(sd_path, "selfdischarge", opts, inputs)


def analysis_mismatch(run_dir: str | Path) -> str | None:
    """Why the analysis files of a run folder do not match its data (one line), or None.

    metrics.parquet must have been made from the journal as it is now, and groups.csv (and
    selfdischarge.csv) from that metrics.parquet and manifest; files from before options
    were recorded are accepted as they are."""
    from rig.analysis.provenance import mismatch, read_options

    run_dir = Path(run_dir)
    checks = [
        ("metrics.parquet", {"journal.jsonl": run_dir / "journal.jsonl"}),
        (
            "groups.csv",
            {
                "metrics.parquet": run_dir / "metrics.parquet",
                "manifest.json": run_dir / "manifest.json",
            },
        ),
    ]
    if (run_dir / "selfdischarge.csv").exists():
        checks.append(("selfdischarge.csv", checks[1][1]))
    for name, inputs in checks:
        path = run_dir / name
        if not path.exists():
            return f"{name} does not exist"
        if read_options(path) is None:
            continue  # written before options were recorded
        why = mismatch(path, {}, inputs)
        if why:
            return why
    return None


def recorded_analysis_options(run_dir: str | Path) -> dict[str, Any]:
    """The options groups.csv was made with (keyword arguments of :func:`analyze_run`), or {}."""
    from rig.analysis.provenance import read_options

    rec = read_options(Path(run_dir) / "groups.csv")
    if rec is None:
        return {}
    keys = ("confidence", "coverage", "seed", "safe_residual_volts")
    return {k: rec.options[k] for k in keys if rec.options.get(k) is not None}


def analyze_run(
    run_dir: str | Path,
    *,
    confidence: float = 0.95,
    coverage: float = 0.99,
    safe_residual_volts: float | None = None,
    seed: int = 0,
    full: bool = False,
    table: bool = True,
    workers: int | None = None,
) -> AnalysisResult:
    """Analyse a run folder; writes metrics.parquet, groups.csv and (delay sweeps only)
    selfdischarge.csv into it.

    Incremental: when metrics.parquet was written by the same metric code, only the events
    that are new or whose journal row changed are read and analysed, the others keep their
    stored rows (the same numbers a full analysis gives; :mod:`rig.analysis.incremental`);
    groups.csv and selfdischarge.csv are recomputed from the whole table. When nothing at
    all changed (journal, manifest, code, options), the stored tables are returned as read.
    full: analyse every event again, whatever is stored. Not an option of the results (it
    changes none of them), so it is not recorded beside groups.csv.

    confidence, coverage: of the one-sided normal upper tolerance bound in groups.csv.
    safe_residual_volts: residual voltage counted as safe, V, for the self-discharge
        threshold; None: the manifest's ``safe_residual_volts``, else 60 V (IEC 61010-1).
    seed: seed of the bootstrap's random generator (results are reproducible).
    table: hold the per-event table in the result (False: not held; ``result.metrics`` then
        reads metrics.parquet as it is when asked for).
    workers: processes analysing batches side by side (see :func:`compute_metrics`).
    """
    from rig.analysis.options import check_confidence, check_coverage
    from rig.analysis.selfdischarge import DEFAULT_SAFE_VOLTS, has_delay_sweep, self_discharge
    from rig.analysis.stats import group_stats, limits_from_manifest
    from rig.store.atomic import atomic_write

    confidence, coverage = check_confidence(confidence), check_coverage(coverage)
    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    if safe_residual_volts is None:
        bench_limits = (manifest.get("bench") or {}).get("limits") or {}
        found = bench_limits.get("safe_residual_volts") if isinstance(bench_limits, dict) else None
        if found is None:
            found = find_setting(manifest, "safe_residual_volts")
        safe_residual_volts = float(found) if found is not None else DEFAULT_SAFE_VOLTS
    channel = "current"
    metrics_path = run_dir / "metrics.parquet"
    groups_path = run_dir / "groups.csv"
    from rig.analysis import incremental as inc

    if not full:
        opts = analysis_options(confidence, coverage, seed, safe_residual_volts)
        stored = inc.up_to_date(run_dir, {**opts, **inc.stats_options()}, channel)
        if stored is not None:  # nothing changed since: no file is read or written again
            g, sd = stored
            log.info("%s: analysis up to date", run_dir)
            m = read_parquet_table(metrics_path, columns=None if table else ["status"])
            n = int((m["status"] == "captured").sum())
            sd_path = run_dir / "selfdischarge.csv" if sd is not None else None
            m = m if table else None
            return AnalysisResult(m, g, sd, metrics_path, groups_path, sd_path, 0, n)
    # the stored rows are passed without a name here, so that _metrics_table can free them
    # once copied (they grow with the events)
    metrics, analysed = _metrics_table(
        run_dir,
        channel,
        BATCH_EVENTS,
        BATCH_BYTES,
        None
        if full
        else inc.reusable_metrics(metrics_path, inc.metrics_options(channel), RESULT_SCHEMA),
        workers,
    )
    if (run_dir / "plan.json").exists():
        plan = iter_plan(run_dir)  # counted as it is read (the list grows with the events)
    else:
        log.warning("%s: no plan.json; planned counts are taken from the journal", run_dir)
        plan = None
    limits = limits_from_manifest(manifest, source=run_dir / "manifest.json")
    rng = np.random.default_rng(seed)
    groups = group_stats(metrics, plan, limits, confidence=confidence, coverage=coverage, rng=rng)
    # atomic: a process killed here leaves the previous tables, never a truncated one
    atomic_write(metrics_path, functools.partial(metrics.to_parquet, index=False))
    atomic_write(groups_path, lambda p: groups.to_csv(p, index=False))
    sd, sd_path = None, None
    if has_delay_sweep(metrics):
        hazard = find_setting(manifest, "hazardous_live_volts")
        sd = self_discharge(
            metrics,
            safe_residual_volts=safe_residual_volts,
            confidence=confidence,
            # hazardous-live 60 V d.c.: IEC 61010-1 before edition 3 (the bench file's default)
            hazard_volts=float(hazard) if hazard is not None else 60.0,
        )
        sd_path = run_dir / "selfdischarge.csv"
        atomic_write(sd_path, lambda p: sd.to_csv(p, index=False))
    _record(run_dir, confidence, coverage, seed, safe_residual_volts, sd_path, channel)
    log.info("analysis of %s written", run_dir)
    n_captured = int((metrics["status"] == "captured").sum())
    return AnalysisResult(
        metrics if table else None,
        groups,
        sd,
        metrics_path,
        groups_path,
        sd_path,
        analysed=analysed,
        reused=n_captured - analysed,
    )
