"""Synthetic analysed run folders for the dataset tests and benchmark (invented meters and data).

:func:`write_metrics_run` writes what the dataset stage reads from a run folder: a manifest, a
plan, a journal and a ``metrics.parquet`` whose columns are those of DEVELOPERS.md ("Analysis
outputs"). The metric values are drawn from a random-effects model with known parts: per
model a mean, per unit (serial) an offset of standard deviation ``unit_sd``, per event noise
of standard deviation ``event_sd``, so the variance split has a known answer. No waveforms:
the dataset never reads them.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd

from rig.store.schema import METRIC_COLUMNS

__all__ = ["write_metrics_run"]

MODES = ("AC V", "DC V")
CAPTURES = (("peak", 1e-9, 2e-5), ("charge", 2e-7, 5.5e-2))


def write_metrics_run(
    root: Path,
    run_id: str,
    rng: np.random.Generator,
    *,
    model: str = "Candidate A",
    serial: str = "DEMO-A-0001",
    started: datetime,
    reps: int = 20,
    volts: tuple[float, ...] = (500.0, 1000.0),
    peak_per_volt: float = 0.03,
    unit_offset: float = 0.0,
    event_sd: float = 0.4,
    not_captured: int = 1,
) -> Path:
    """An analysed run folder ``root/run_id`` with ``reps`` events per (mode, capture, volts)
    group; |peak| = peak_per_volt x volts + unit_offset + N(0, event_sd) amperes, the charge
    proportional to it. ``not_captured`` events per run are journalled as not captured."""
    run = root / run_id
    run.mkdir(parents=True)
    rows = []
    event = 0
    for mode in MODES:
        for cap, _dt, _span in CAPTURES:
            for v in volts:
                peak = peak_per_volt * v + unit_offset + rng.normal(0.0, event_sd, reps)
                for rep in range(reps):
                    rows.append(
                        {
                            "event": event,
                            "key": f"m0|{mode}|{cap}|{v:g}|short|0|r{rep:03d}",
                            "meter_index": 0,
                            "meter": model,
                            "serial": serial,
                            "mode": mode,
                            "capture": cap,
                            "volts": v,
                            "load": "short",
                            "load_ohms": 0.05,
                            "delay_s": 0.0,
                            "rep": rep,
                            "status": "captured",
                            "time": (started + timedelta(seconds=1.5 * event)).isoformat(),
                            "file": f"waveforms/e{event:06d}.zarr.zip",
                            "peak": float(peak[rep]),
                        }
                    )
                    event += 1
    lost = set(rng.choice(len(rows), size=min(not_captured, len(rows)), replace=False).tolist())
    m = pd.DataFrame(rows)
    peak = m.pop("peak").to_numpy()
    for col in METRIC_COLUMNS:
        m[col] = False if col.startswith("flag_") else np.nan
    m["peak_a"] = peak
    m["abs_peak_a"] = np.abs(peak)
    m["polarity"] = 1.0
    m["charge_c"] = peak * 1.5e-6 * (1 + rng.normal(0, 0.01, len(m)))
    m["energy_j"] = 0.5 * m["charge_c"] * m["volts"]
    m["tau_s"] = rng.lognormal(np.log(2e-3), 0.05, len(m))
    m["pulses"] = 1.0
    m["dt_s"] = [dict((c, d) for c, d, _ in CAPTURES)[c] for c in m["capture"]]
    m["record_s"] = [dict((c, s) for c, _, s in CAPTURES)[c] for c in m["capture"]]
    gone = m.index.isin(sorted(lost))
    m.loc[gone, "status"] = "not_captured"
    m.loc[gone, "file"] = None
    m.loc[gone, "flag_not_captured"] = True
    m.loc[gone, ["peak_a", "abs_peak_a", "charge_c", "energy_j", "tau_s"]] = np.nan
    m.to_parquet(run / "metrics.parquet", index=False)
    journal = m[["event", "key", "meter", "serial", "mode", "capture", "volts", "load"]].copy()
    journal["status"] = m["status"]
    with open(run / "journal.jsonl", "w", encoding="utf-8") as fh:
        for rec in journal.to_dict("records"):
            fh.write(json.dumps(rec) + "\n")
    (run / "plan.json").write_text(
        json.dumps([{"event": int(e), "key": f"e{int(e)}"} for e in m["event"]])
    )
    manifest = {
        "format": 1,
        "run_id": run_id,
        "status": "complete",
        "started": started.isoformat(),
        "ended": (started + timedelta(seconds=1.5 * len(m))).isoformat(),
        "sequence": {"meters": [{"model": model, "serial": serial}]},
    }
    (run / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    return run
