"""How much of a metric's spread is between units and how much between events of one unit.

One-way random-effects analysis of variance, per group of the other keys (model, mode,
capture, volts, load, delay): a units (serials), n_i events of unit i, N = sum n_i.

    SS_between = sum_i n_i (mean_i - mean)^2,   MS_between = SS_between / (a - 1)
    SS_within  = sum_i sum_j (x_ij - mean_i)^2, MS_within  = SS_within / (N - a)
    n0 = (N - sum_i n_i^2 / N) / (a - 1)         (= n for equal group sizes)
    var_within  = MS_within
    var_between = max(0, (MS_between - MS_within) / n0)
    F = MS_between / MS_within, p from the F(a - 1, N - a) distribution

Source: the random-effects model of one-factor experiments, D. C. Montgomery, "Design and
Analysis of Experiments", chapter 3 ("The random effects model"), with n0 for unequal group
sizes as in S. R. Searle, G. Casella, C. E. McCulloch, "Variance Components", 1992, section
3.5 (from memory). A negative estimate of var_between (MS_between < MS_within) is set to 0,
as is common practice. ``share_between`` is var_between / (var_between + var_within) (the
intraclass correlation). Values follow the per-run analysis: captured events, finite values,
magnitude of signed metrics.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats as sps

from rig.analysis.stats import SIGNED

__all__ = ["VARIANCE_COLUMNS", "one_way_random_effects", "variance_split"]

VARIANCE_COLUMNS = (
    "units",
    "n",
    "n0",
    "ms_between",
    "ms_within",
    "f",
    "p",
    "var_between",
    "var_within",
    "share_between",
)


def one_way_random_effects(values: Sequence[np.ndarray]) -> dict[str, float]:
    """The ANOVA estimates (VARIANCE_COLUMNS) from one array of values per unit."""
    groups = [np.asarray(v, dtype=float) for v in values if len(v)]
    a = len(groups)
    sizes = np.array([g.size for g in groups], dtype=float)
    big_n = float(sizes.sum())
    nan = math.nan
    out: dict[str, float] = dict.fromkeys(VARIANCE_COLUMNS, nan)
    out.update(units=a, n=big_n)
    if a < 2 or big_n - a < 1:
        return out
    means = np.array([g.mean() for g in groups])
    grand = float(sum(g.sum() for g in groups) / big_n)
    ss_b = float(np.sum(sizes * (means - grand) ** 2))
    ss_w = float(sum(np.sum((g - m) ** 2) for g, m in zip(groups, means, strict=True)))
    ms_b, ms_w = ss_b / (a - 1), ss_w / (big_n - a)
    n0 = (big_n - float(np.sum(sizes**2)) / big_n) / (a - 1)
    var_b = max(0.0, (ms_b - ms_w) / n0)
    f = ms_b / ms_w if ms_w > 0 else math.inf
    out.update(
        n0=n0,
        ms_between=ms_b,
        ms_within=ms_w,
        f=f,
        p=float(sps.f.sf(f, a - 1, big_n - a)) if math.isfinite(f) else 0.0,
        var_between=var_b,
        var_within=ms_w,
        share_between=var_b / (var_b + ms_w) if var_b + ms_w > 0 else nan,
    )
    return out


def variance_split(
    events: pd.DataFrame,
    metric: str,
    unit: str = "serial",
    by: Sequence[str] = ("model", "mode", "capture", "volts", "load", "delay_s"),
) -> pd.DataFrame:
    """Per group of ``by``: the split of ``metric``'s variance between the ``unit`` values and
    between events of one unit (columns: ``by``, then VARIANCE_COLUMNS). ``events`` holds
    the dataset's rows (rig.dataset.query.load_events)."""
    v = events[metric].astype("float64")
    if metric in SIGNED:
        v = v.abs()
    df = events.assign(value=v)
    df = df[~df["flag_not_captured"].astype(bool) & np.isfinite(df["value"])]
    rows: list[dict[str, Any]] = []
    for key, grp in df.groupby(list(by), sort=True, dropna=False):
        per_unit = [g["value"].to_numpy() for _, g in grp.groupby(unit, sort=True)]
        rows.append({**dict(zip(by, key, strict=True)), **one_way_random_effects(per_unit)})
    return pd.DataFrame(rows, columns=[*by, *VARIANCE_COLUMNS])
