"""The run folder's tables as the report reads them, and the selections its sections share.

metrics.parquet and groups.csv are checked for the columns the report needs (RunFolderError
naming the file and the columns otherwise); charges become magnitudes and a ``flagged``
column marks events carrying any flag of :data:`FLAG_TEXT`. The capture roles (finest sample
interval for the |peak|, longest record for the charge) are decided here from dt_s and
record_s, never from the capture names.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.analyze import analysis_mismatch
from rig.analysis.stats import GROUP_KEYS, with_capture
from rig.store.runfolder import read_manifest
from rig.store.tables import read_csv_table, read_parquet_table
from rigbase.errors import RunFolderError
from rigbase.units import eng

FLAG_TEXT = {
    "flag_not_captured": "not captured",
    "flag_clipped": "clipped (beyond the scope range)",
    "flag_truncated": "truncated (record ended before the tail)",
    "flag_below_noise": "below noise",
}


_GROUP_KEYS = list(GROUP_KEYS)  # defined once in rig.analysis.stats


_NEEDED = ["meter", "mode", "volts", "load", "delay_s", "abs_peak_a", "charge_c", "file"]

# journal bookkeeping the report shows nowhere: not read, since the table grows with the
# events (at 100,000 events these columns are a third of it)
_NOT_SHOWN = (
    "key",
    "sha256",
    "journal_digest",
    "meter_index",
    "supply_volts",
    "charged_volts",
    "residual_volts",
    "t_bench_s",
    "rep",
    "repetition",
    "time",
)


def _load_metrics(run: Path) -> pd.DataFrame:
    path = run / "metrics.parquet"
    if not path.exists():
        raise RunFolderError(f"{path}: no metrics; analyse the run before the report")
    df = with_capture(read_parquet_table(path, exclude=_NOT_SHOWN))
    missing = [c for c in _NEEDED if c not in df.columns]
    if missing:
        raise RunFolderError(f"{path} [{', '.join(missing)}]: column missing")
    flags = [c for c in FLAG_TEXT if c in df.columns]
    # no copy: the table was just read, and a copy would double it (65 MB at 100,000 events)
    # charges are shown as magnitudes, as groups.csv summarises them (polarity is in its column)
    df["charge_c"] = pd.to_numeric(df["charge_c"], errors="coerce").abs()
    df["flagged"] = df[flags].fillna(False).astype(bool).any(axis=1) if flags else False
    return df


def _load_groups(run: Path) -> pd.DataFrame:
    path = run / "groups.csv"
    if not path.exists():
        raise RunFolderError(f"{path}: no group statistics; analyse the run before the report")
    g = read_csv_table(path, keep_default_na=True)
    need = ["meter", "mode", "volts", "metric", "median", "verdict"]
    missing = [c for c in need if c not in g.columns]
    if missing:
        raise RunFolderError(f"{path} [{', '.join(missing)}]: column missing")
    optional = ["median_ci_low", "median_ci_high", "utl", "limit", "share_over_limit", "max"]
    for c in _GROUP_KEYS + optional:  # older or partial tables: show what is there
        if c not in g.columns:
            g[c] = np.nan
    # an all-empty column reads as float: cast before filling (pandas refuses "" in float64)
    g["verdict"] = g["verdict"].astype(object).fillna("").astype(str).str.strip()
    return with_capture(g)


@dataclass(frozen=True)
class RunTables:
    """What a run's documents (report and certificate) are made from, read once."""

    manifest: dict[str, Any]
    metrics: pd.DataFrame  # metrics.parquet as the report reads it (:func:`_load_metrics`)
    groups: pd.DataFrame  # groups.csv (:func:`_load_groups`)


def read_run_tables(run: Path) -> RunTables:
    """The manifest, metrics and group table of ``run``. Raises RunFolderError when the run
    has no manifest, has not been analysed, or was analysed from other events or options
    than it holds now (rig.analysis.analyze.analysis_mismatch)."""
    man = read_manifest(run)
    stale = analysis_mismatch(run) if (run / "metrics.parquet").exists() else None
    if stale:
        raise RunFolderError(
            f"{run}: {stale}; run `rig analyze {run}` (or `rig report`, which re-analyses) first"
        )
    return RunTables(man, _load_metrics(run), _load_groups(run))


def _peak_metric(g: pd.DataFrame) -> str:
    """The groups.csv metric of the peak's size: ``abs_peak_a`` if summarised, else ``peak_a``
    (which rig.analysis.stats summarises by magnitude)."""
    names = set(g["metric"].astype(str))
    return "abs_peak_a" if "abs_peak_a" in names or "peak_a" not in names else "peak_a"


def _capture_text(m: pd.DataFrame, capture: str) -> str:
    """``capture “peak”: 1 ns × 20000 samples = 20 µs`` from the events' dt_s and record_s."""
    sel = _where(m, m["capture"] == capture) if "capture" in m else m
    if {"dt_s", "record_s"} <= set(sel.columns) and sel["dt_s"].notna().any():
        dt = float(sel["dt_s"].median())
        span = float(sel["record_s"].median())
        return (
            f"capture “{capture}”: {eng(dt, 's')} × {round(span / dt)} samples = {eng(span, 's')}"
        )
    return f"capture “{capture}”"


def _several_captures(df: pd.DataFrame) -> bool:
    return "capture" in df.columns and df["capture"].nunique() > 1


def _where(df: pd.DataFrame, sel: pd.Series) -> pd.DataFrame:
    """The rows of ``df`` where ``sel``; ``df`` itself when that is every row. A selection is a
    copy, and the run's table grows with the events (41 MB at 100,000): the usual selections
    of the report (one capture, the shortest delay, one load) are often all of it."""
    return df if bool(sel.all()) else df[sel]


def _at_zero_delay(df: pd.DataFrame) -> pd.DataFrame:
    """Rows at the smallest delay of their (meter, mode, capture, volts, load) group."""
    if df.empty:
        return df
    d = df["delay_s"].fillna(0.0)
    keys = [k for k in ("meter", "mode", "capture", "volts", "load") if k in df.columns]
    dmin = d.groupby([df[k] for k in keys]).transform("min")
    return _where(df, d == dmin)
