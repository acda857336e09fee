"""Analysis of a run folder: the journal, the per-event metrics of its waveform files
(computed by :mod:`rig.analysis.metrics`) and the files written back into the folder.

:func:`analyze_run` applies this to a run folder and writes ``metrics.parquet``,
``groups.csv`` and, for delay sweeps, ``selfdischarge.csv`` (see DEVELOPERS.md).
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.metrics import event_metrics
from rig.analysis.stats import GROUP_KEYS, with_capture
from rig.store.runfolder import read_journal, read_manifest, read_plan
from rig.store.schema import METRIC_COLUMNS
from rig.store.waveform import load_waveform
from rigbase.errors import RunFolderError

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
    """What :func:`analyze_run` computed and where it wrote it."""

    metrics: pd.DataFrame
    groups: pd.DataFrame
    selfdischarge: pd.DataFrame | None
    metrics_path: Path
    groups_path: Path
    selfdischarge_path: Path | None

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


def journal_frame(run_dir: str | Path) -> pd.DataFrame:
    """The journal as a DataFrame, one row per event (last entry wins after a resume)."""
    rows = read_journal(run_dir)
    if not rows:
        raise RunFolderError(f"{Path(run_dir) / 'journal.jsonl'}: no events journalled")
    df = pd.DataFrame(rows)
    missing = [c for c in ("event", "status", "file", "volts", "load_ohms") if c not in df]
    if missing:
        raise RunFolderError(f"{Path(run_dir) / 'journal.jsonl'}: rows lack {', '.join(missing)}")
    return df.drop_duplicates("event", keep="last").sort_values("event").reset_index(drop=True)


def _batches(run_dir: Path, jr: pd.DataFrame, channel: str, batch: int) -> Iterator[tuple]:
    """Captured events grouped by record shape, loaded ``batch`` events at a time:
    yields (journal index, stacked codes, per-event gain/offset/rails, dt, t0)."""
    captured = jr.index[jr["status"] == "captured"]
    headers = {}
    for i in captured:
        rel = jr.at[i, "file"]
        if not isinstance(rel, str) or not rel:
            raise RunFolderError(
                f"{run_dir / 'journal.jsonl'}: event {jr.at[i, 'event']} "
                "is captured but names no waveform file"
            )
        headers[i] = run_dir / rel
    # Read each file once; keep a batch in memory at a time.
    pending: list[tuple[int, Any]] = []
    for i, path in headers.items():
        try:
            wf = load_waveform(path)
        except FileNotFoundError:
            raise RunFolderError(f"{path}: waveform file missing") from None
        except (ValueError, OSError) as exc:
            raise RunFolderError(f"{path}: unreadable waveform ({exc})") from None
        if channel not in wf.channels:
            raise RunFolderError(f"{path} [channels]: no {channel!r} channel")
        pending.append((i, wf))
        if len(pending) >= batch:
            yield from _flush(pending, channel)
            pending = []
    yield from _flush(pending, channel)


def _flush(pending: list[tuple[int, Any]], channel: str) -> Iterator[tuple]:
    by_shape: dict[tuple, list[tuple[int, Any]]] = {}
    for i, wf in pending:
        # a free-running sample clock gives every record its own sub-sample t0: group by
        # the whole number of pre-trigger samples and pass t0 per event
        pre = int(np.ceil(-wf.t0 / wf.dt - 1e-9))
        by_shape.setdefault((wf.n, wf.dt, pre, wf.codes.dtype.str), []).append((i, wf))
    for (_, dt, _, _), items in by_shape.items():
        t0 = np.array([wf.t0 for _, wf in items])
        k = [wf.index(channel) for _, wf in items]
        codes = np.stack([wf.codes[j] for (_, wf), j in zip(items, k, strict=True)])
        gain = np.array([wf.gain[j] for (_, wf), j in zip(items, k, strict=True)])
        offset = np.array([wf.offset[j] for (_, wf), j in zip(items, k, strict=True)])
        lo = np.array([wf.code_min[j] for (_, wf), j in zip(items, k, strict=True)])
        hi = np.array([wf.code_max[j] for (_, wf), j in zip(items, k, strict=True)])
        yield [i for i, _ in items], codes, gain, offset, lo, hi, dt, t0, _input_volts(items)


def _input_volts(items: list[tuple[int, Any]]) -> np.ndarray:
    """The meter's input voltage just before each discharge: the mean of the divider
    channel ("voltage") over its pre-trigger samples, V (NaN without that channel)."""
    out = np.full(len(items), np.nan)
    for k, (_, wf) in enumerate(items):
        if "voltage" not in wf.channels:
            continue
        j = wf.index("voltage")
        n_pre = int(np.floor(-wf.t0 / wf.dt))
        if n_pre < 2:
            continue
        codes = wf.codes[j, : n_pre - n_pre // 10].astype(np.float64)
        out[k] = float(codes.mean() * wf.gain[j] + wf.offset[j])
    return out


def compute_metrics(
    run_dir: str | Path, *, channel: str = "current", batch: int = 512
) -> pd.DataFrame:
    """Journal columns plus the per-event metrics of a run folder, without writing anything.

    The voltage for c_equiv is the meter's input just before the discharge: the pre-trigger
    mean of the divider channel when the waveform has one, else the journal's
    ``charged_volts`` (divider at the end of the dwell), else the supply readback
    (``supply_volts``), else the setpoint ``volts``. Besides METRIC_COLUMNS each event gets ``dt_s``
    (sample interval, s) and ``record_s`` (record span, samples x dt, s) of its waveform
    (NaN when not captured), and rows without a ``capture`` (older runs) get "main".
    """
    run_dir = Path(run_dir)
    jr = with_capture(journal_frame(run_dir))
    volts = pd.to_numeric(jr["volts"], errors="coerce").to_numpy(float)
    if "supply_volts" in jr:
        readback = pd.to_numeric(jr["supply_volts"], errors="coerce").to_numpy(float)
        volts = np.where(np.isfinite(readback), readback, volts)
    if "charged_volts" in jr:
        measured = pd.to_numeric(jr["charged_volts"], errors="coerce").to_numpy(float)
        volts = np.where(np.isfinite(measured), measured, volts)
    ohms = pd.to_numeric(jr["load_ohms"], errors="coerce").to_numpy(float)
    res = {k: np.full(len(jr), np.nan) for k in METRIC_COLUMNS}
    for k in ("flag_clipped", "flag_truncated", "flag_below_noise"):
        res[k] = np.zeros(len(jr), dtype=bool)
    res["flag_not_captured"] = np.ones(len(jr), dtype=bool)
    res["polarity"] = np.zeros(len(jr), dtype=np.int8)
    res["pulses"] = np.zeros(len(jr), dtype=np.int64)
    dt_s = np.full(len(jr), np.nan)
    record_s = np.full(len(jr), np.nan)
    for idx, codes, gain, offset, lo, hi, dt, t0, v_in in _batches(run_dir, jr, channel, batch):
        ix = np.asarray(idx)
        volts[ix] = np.where(np.isfinite(v_in), v_in, volts[ix])
        dt_s[ix] = dt
        record_s[ix] = codes.shape[1] * dt
        part = event_metrics(
            codes,
            dt=dt,
            t0=t0,
            gain=gain,
            offset=offset,
            code_min=lo,
            code_max=hi,
            charge_volts=volts[ix],
            load_ohms=ohms[ix],
        )
        for k in METRIC_COLUMNS:
            res[k][ix] = part[k]
        res["flag_not_captured"][ix] = False
    out = jr.copy()
    for k in METRIC_COLUMNS:
        out[k] = res[k]
    out["dt_s"] = dt_s
    out["record_s"] = record_s
    log.info("analysed %s events of %s", int((~res["flag_not_captured"]).sum()), run_dir)
    return out


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
) -> None:
    from rig.analysis.provenance import record_options

    opts = analysis_options(confidence, coverage, seed, safe_volts)
    record_options(
        run_dir / "metrics.parquet", "metrics", {}, {"journal.jsonl": run_dir / "journal.jsonl"}
    )
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
) -> AnalysisResult:
    """Analyse a run folder; writes metrics.parquet, groups.csv and (delay sweeps only)
    selfdischarge.csv into it.

    confidence, coverage: of the one-sided normal upper tolerance bound in groups.csv.
    safe_residual_volts: residual voltage counted as safe, V, for the self-discharge
        threshold; None: the manifest's ``safe_residual_volts``, else 60 V (IEC 61010-1).
    seed: seed of the bootstrap's random generator (results are reproducible).
    """
    from rig.analysis.options import check_confidence, check_coverage
    from rig.analysis.selfdischarge import DEFAULT_SAFE_VOLTS, has_delay_sweep, self_discharge
    from rig.analysis.stats import group_stats, limits_from_manifest
    from rig.store.atomic import atomic_write

    confidence, coverage = check_confidence(confidence), check_coverage(coverage)
    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    metrics = compute_metrics(run_dir)
    try:
        plan = read_plan(run_dir)
    except RunFolderError:
        log.warning("%s: no plan.json; planned counts are taken from the journal", run_dir)
        plan = None
    limits = limits_from_manifest(manifest, source=run_dir / "manifest.json")
    rng = np.random.default_rng(seed)
    groups = group_stats(metrics, plan, limits, confidence=confidence, coverage=coverage, rng=rng)
    metrics_path = run_dir / "metrics.parquet"
    groups_path = run_dir / "groups.csv"
    # atomic: a process killed here leaves the previous tables, never a truncated one
    atomic_write(metrics_path, lambda p: metrics.to_parquet(p, index=False))
    atomic_write(groups_path, lambda p: groups.to_csv(p, index=False))
    if safe_residual_volts is None:
        bench_limits = (manifest.get("bench") or {}).get("limits") or {}
        found = bench_limits.get("safe_residual_volts") if isinstance(bench_limits, dict) else None
        if found is None:
            found = find_setting(manifest, "safe_residual_volts")
        safe_residual_volts = float(found) if found is not None else DEFAULT_SAFE_VOLTS
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
    _record(run_dir, confidence, coverage, seed, safe_residual_volts, sd_path)
    log.info("analysis of %s written", run_dir)
    return AnalysisResult(metrics, groups, sd, metrics_path, groups_path, sd_path)
