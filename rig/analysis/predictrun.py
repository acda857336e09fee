"""A run's groups to identified sources and predictions (behind ``rig predict``, the notebook
API and the report's predicted section).

A group is one meter, serial, mode, charge voltage and delay; it can be identified when its
events went into at least two loads (:func:`rig.analysis.identify.identify`). Predictions go
into ``predicted.csv`` in the run folder: ``meter, serial, mode, volts, delay_s, load, metric,
value, low, high, measured`` (``measured`` = the median of the group's events into a run load
of the same name, else empty), one row per group x load x metric.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.identify import identify, path_of_load
from rig.analysis.predict import METRICS, Prediction, predict
from rig.analysis.runs import load_run
from rig.analysis.sourcenet import FosterSource
from rig.store.atomic import atomic_write
from rig.store.runfolder import read_manifest
from rigbase.errors import FileFormatError
from rigbase.loadfile import LoadModel, load_from_spec
from rigbase.nonlinear import Part

__all__ = [
    "PREDICT_COLUMNS",
    "PREDICT_GROUP_KEYS",
    "identifiable_groups",
    "identify_groups",
    "predict_run",
    "record_after_trigger",
    "resolve_load",
]

PREDICT_GROUP_KEYS = ("meter", "serial", "mode", "volts", "delay_s")
PREDICT_COLUMNS = PREDICT_GROUP_KEYS + ("load", "metric", "value", "low", "high", "measured")
_MEASURED = {
    "peak_a": ("abs_peak_a", "min"),
    "charge_c": ("charge_c", "max"),
    "energy_j": ("energy_j", "max"),
}


def resolve_load(
    spec: str, manifest: dict[str, Any] | None = None, base: Path | None = None
) -> LoadModel:
    """A load from a spec: the name of one of the run's bench loads (its whole discharge path:
    load, wiring, sense, contacts), a load file (``.toml``) or a resistance (``"10"``,
    ``"1k"``). FileFormatError names the spec when it is none of these."""
    bench = (manifest or {}).get("bench") or {}
    if any(x.get("name") == spec for x in bench.get("loads") or []):
        ohms, henry = path_of_load(manifest or {}, spec, 0.0)
        parts = [Part("R", "R", "a", "m" if henry > 0 else "0", ohms)]
        if henry > 0:
            parts.append(Part("L", "L", "m", "0", henry))
        return LoadModel(spec, "a", "0", tuple(parts))
    try:
        return load_from_spec(spec, base)
    except FileFormatError:
        raise
    except ValueError as exc:
        raise FileFormatError(spec, "load", str(exc)) from None


def record_after_trigger(manifest: dict[str, Any], default: float = 0.05) -> float:
    """The longest span (s) any capture of the run's sequence records after its trigger:
    the window over which the measured charge is integrated."""
    seq = manifest.get("sequence") or {}
    caps = list((seq.get("scope_captures") or {}).values()) or [seq.get("scope") or {}]
    spans = [
        float(c["points"]) * float(c["sample_interval_s"]) + float(c.get("trigger_offset_s", 0))
        for c in caps
        if c.get("points") and c.get("sample_interval_s")
    ]
    return max(spans) if spans else default


def identifiable_groups(df: pd.DataFrame) -> list[dict[str, Any]]:
    """Group keys of the captured events whose group went into at least two loads."""
    ok = df[df["status"] == "captured"]
    out = []
    for key, g in ok.groupby(list(PREDICT_GROUP_KEYS), dropna=False):
        if g["load"].nunique() >= 2:
            out.append(dict(zip(PREDICT_GROUP_KEYS, key, strict=True)))
    return out


def identify_groups(
    run_dir: str | Path, fit_loads: Sequence[str] | None = None
) -> list[tuple[dict[str, Any], FosterSource]]:
    """Identify every identifiable group of a run (``fit_loads``: the loads to fit, default
    every load of the group)."""
    df = load_run(run_dir)
    out = []
    for keys in identifiable_groups(df):
        g = df[np.logical_and.reduce([df[k] == v for k, v in keys.items()])]
        loads = list(fit_loads) if fit_loads else sorted(g["load"].unique())
        if len(set(loads) & set(g["load"])) < 2:
            continue
        out.append((keys, identify(run_dir, loads, **keys)))
    return out


def _measured(df: pd.DataFrame, keys: dict[str, Any], load: str, metric: str) -> float:
    col, pick = _MEASURED[metric]
    g = df[np.logical_and.reduce([df[k] == v for k, v in keys.items()]) & (df["load"] == load)]
    g = g[g["status"] == "captured"]
    if g.empty or col not in g:
        return float("nan")
    # the capture that resolves the metric: finest sampling for the peak, longest record else
    by = g.groupby("capture")["dt_s" if pick == "min" else "record_s"].first()
    cap = by.idxmin() if pick == "min" else by.idxmax()
    return float(g.loc[g["capture"] == cap, col].median())


def predict_run(
    run_dir: str | Path,
    loads: Sequence[str],
    rng: np.random.Generator,
    fit_loads: Sequence[str] | None = None,
    window_s: float | None = None,
    series_ohms: float = 0.0,
    series_henry: float = 0.0,
    samples: int = 8,
    base: Path | None = None,
    write: bool = True,
) -> tuple[pd.DataFrame, list[tuple[dict[str, Any], FosterSource, list[Prediction]]]]:
    """Identify each group and predict into ``loads``; writes ``predicted.csv`` (``write``).
    ``window_s`` defaults to the longest record after the trigger in the run."""
    run = Path(run_dir)
    manifest = read_manifest(run)
    df = load_run(run)
    models = [resolve_load(s, manifest, base) for s in loads]
    if window_s is None:
        window_s = record_after_trigger(manifest)
    rows, detail = [], []
    for keys, src in identify_groups(run, fit_loads):
        preds = []
        for spec, model in zip(loads, models, strict=True):
            p = predict(src, model, rng, window_s, None, series_ohms, series_henry, samples)
            preds.append(p)
            for m in METRICS:
                rows.append(
                    {
                        **keys,
                        "load": spec,
                        "metric": m,
                        "value": p.value[m],
                        "low": p.low[m],
                        "high": p.high[m],
                        "measured": _measured(df, keys, spec, m),
                    }
                )
        detail.append((keys, src, preds))
    table = pd.DataFrame(rows, columns=list(PREDICT_COLUMNS))
    if write:
        # atomic like every derived table: a kill half-way leaves the previous file
        atomic_write(run / "predicted.csv", lambda p: table.to_csv(p, index=False))
    return table, detail
