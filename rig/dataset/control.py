"""Trends per unit over time: the Shewhart individuals and moving-range (I-MR) chart.

Chart: individuals and moving range, NIST/SEMATECH e-Handbook of Statistical Methods, section
6.3.2.2 ("Individuals Control Charts"). The points x_1..x_k are in time order; the moving
range is MR_i = |x_i - x_(i-1)|. The limits come from the baseline (phase I) points only:

    center = mean of the baseline x,  MRbar = mean of the baseline moving ranges
    UCL, LCL = center +/- 3 MRbar / d2,  d2 = 1.128 (n = 2), i.e. center +/- 2.66 MRbar
    MR chart: center MRbar, UCL = D4 MRbar, D4 = 3.267, LCL = 0

(d2 and D4 for subgroups of 2 as in the handbook's table of control chart constants; the
values and the section number are from memory.) A point
beyond a limit is flagged. ``level="run"`` charts one point per run (the median of the run's
events), ``level="event"`` every event. Values follow the per-run analysis: captured events,
finite values, magnitude of signed metrics.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd

from rig.analysis.stats import SIGNED
from rigbase.errors import FileFormatError

__all__ = ["CHART_NAME", "D2", "D4", "individuals_chart"]

CHART_NAME = "Shewhart individuals and moving range (I-MR), NIST/SEMATECH e-Handbook 6.3.2.2"
D2 = 1.128  # subgroups of 2 (table of control chart constants; from memory)
D4 = 3.267  # subgroups of 2 (from memory)


def individuals_chart(
    events: pd.DataFrame,
    metric: str,
    baseline_runs: Iterable[str],
    by: Sequence[str] = ("serial", "mode", "capture", "volts", "load", "delay_s"),
    level: str = "run",
) -> pd.DataFrame:
    """The I-MR chart of ``metric`` per group of ``by`` (one chart per unit and setting).

    Returns one row per point: the ``by`` columns, ``run_id``, ``time``, ``value``, ``mr``,
    ``baseline`` (bool), ``center``, ``lcl``, ``ucl``, ``mr_center``, ``mr_ucl``, ``out``
    (beyond a limit of either chart). A group needs two baseline points for limits (NaN
    otherwise)."""
    if level not in ("run", "event"):
        raise FileFormatError("query", "level", f"{level!r} is not 'run' or 'event'")
    base = set(baseline_runs)
    v = events[metric].astype("float64")
    if metric in SIGNED:
        v = v.abs()
    df = events.assign(value=v)
    df = df[~df["flag_not_captured"].astype(bool) & np.isfinite(df["value"])]
    if level == "run":
        df = (
            df.groupby([*by, "run_id"], sort=False, dropna=False)
            .agg(time=("time", "min"), value=("value", "median"))
            .reset_index()
        )
    else:
        df = df[[*by, "run_id", "time", "event", "value"]]
    order = ["time", "run_id"] + (["event"] if level == "event" else [])
    out = []
    for _, grp in df.groupby(list(by), sort=True, dropna=False):
        g = grp.sort_values(order, kind="stable").reset_index(drop=True)
        g["mr"] = g["value"].diff().abs()
        g["baseline"] = g["run_id"].isin(base)
        bx = g.loc[g["baseline"], "value"].to_numpy()
        bmr = np.abs(np.diff(bx))
        center = float(bx.mean()) if bx.size >= 2 else np.nan
        mrbar = float(bmr.mean()) if bmr.size else np.nan
        g["center"] = center
        g["lcl"] = center - 3.0 * mrbar / D2
        g["ucl"] = center + 3.0 * mrbar / D2
        g["mr_center"] = mrbar
        g["mr_ucl"] = D4 * mrbar
        g["out"] = (g["value"] > g["ucl"]) | (g["value"] < g["lcl"]) | (g["mr"] > g["mr_ucl"])
        out.append(g)
    cols = [*by, "run_id", "time"] + (["event"] if level == "event" else [])
    cols += ["value", "mr", "baseline", "center", "lcl", "ucl", "mr_center", "mr_ucl", "out"]
    if not out:
        return pd.DataFrame(columns=cols)
    return pd.concat(out, ignore_index=True)[cols]
