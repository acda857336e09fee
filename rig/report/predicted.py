"""The report's predicted section: per meter and mode, the predicted peak and charge into the
loads the sequence names (``[predict] loads``), beside the measured ones where the run has
events into a load of that name.

Predictions come from ``predicted.csv`` (written by ``rig predict``); when it is missing and
the sequence names loads, they are made here (:func:`rig.analysis.predictrun.predict_run`,
parameter draws from a seeded generator, so the report is the same each time).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.predictrun import predict_run
from rig.report.html import _table, esc
from rigbase.errors import RigError
from rigbase.units import eng

__all__ = ["section_predicted"]


def _cell(r: Any, unit: str) -> str:
    return f"{eng(r.value, unit)} ({eng(r.low, unit)} – {eng(r.high, unit)})"


def section_predicted(run: Path, manifest: dict[str, Any]) -> str:
    """HTML of the section (a sentence when there is nothing to predict)."""
    path = run / "predicted.csv"
    seq = manifest.get("sequence") or {}
    loads = list(seq.get("predict_loads") or [])
    if not path.exists() and loads:
        sf = manifest.get("sequence_file")
        base = Path(sf).parent if sf else run
        try:
            predict_run(run, loads, np.random.default_rng(0), base=base)
        except (RigError, ValueError, RuntimeError) as exc:
            return f"<p>No prediction: {esc(exc)}</p>"
    df = pd.read_csv(path) if path.exists() else pd.DataFrame()
    if df.empty:
        why = (
            "the sequence names no [predict] loads"
            if not loads
            else "no group went into two or more loads, so no source could be identified"
        )
        return f"<p>No prediction: {esc(why)}.</p>"
    rows = []
    keys = ["meter", "mode", "volts", "delay_s", "load"]
    for key, g in df.groupby(keys, sort=False):
        by = {r.metric: r for r in g.itertuples()}
        pk, q = by.get("peak_a"), by.get("charge_c")
        if pk is None or q is None:
            continue
        rows.append(
            [
                esc(key[0]),
                esc(key[1]),
                esc(eng(key[2], "V")),
                esc(key[4]),
                esc(_cell(pk, "A")),
                esc(eng(pk.measured, "A") if pd.notna(pk.measured) else "–"),
                esc(_cell(q, "C")),
                esc(eng(q.measured, "C") if pd.notna(q.measured) else "–"),
            ]
        )
    header = [
        "Meter",
        "Mode",
        "Voltage",
        "Load",
        "Predicted |peak| (95 % PI)",
        "Measured",
        "Predicted charge (95 % PI)",
        "Measured",
    ]
    note = (
        "<p class='n'>Each group's source was identified from its own events into two or more "
        "loads (equivalent charged branches behind a series inductance) and solved into each "
        "load; intervals combine the fit's parameter uncertainty, the events' spread and the "
        "fit's misfit. Measured: the median of the group's events into a run load of the same "
        "name.</p>"
    )
    return note + _table(header, rows)
