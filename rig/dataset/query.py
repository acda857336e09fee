"""Group statistics across the runs of a dataset, on one of three engines with one answer.

The values summarised follow the per-run analysis (rig.analysis.stats, ``groups.csv``): only
captured events (``flag_not_captured`` false), only finite values, and the signed metrics
(``peak_a``, ``charge_c``) by magnitude. Per group of ``by`` columns: ``n``, ``mean``,
``std`` and ``var`` (sample, ddof 1), ``min``, ``median``, ``max``.

Engines: ``"pandas"`` (in memory, the reference), ``"duckdb"`` (SQL straight on the Parquet
files, out of core) and ``"dask"`` (a Dask DataFrame on a local cluster, or on the scheduler
at ``scheduler``; partitions are read and reduced one at a time, so the data may be larger
than memory). DuckDB's ``median`` is the interpolated one (quantile_cont 0.5), as numpy's;
the Dask median is exact (a shuffle). Dask and DuckDB are imported on first use.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.stats import SIGNED
from rig.dataset.build import EVENT_COLUMNS, events_dir
from rigbase.errors import FileFormatError, RunFolderError

__all__ = ["ENGINES", "STAT_COLUMNS", "group_summary", "load_events"]

ENGINES = ("pandas", "duckdb", "dask")
STAT_COLUMNS = ("n", "mean", "std", "var", "min", "median", "max")


def _files(dataset: str | Path) -> str:
    folder = events_dir(dataset)
    if not any(folder.glob("*.parquet")):
        raise RunFolderError(f"{folder}: no runs in this dataset (add some with `rig catalog`)")
    return str(folder / "*.parquet")


def _check(metric: str, by: Sequence[str], where: Mapping[str, Any]) -> None:
    for col in (metric, *by, *where):
        if col not in EVENT_COLUMNS:
            raise FileFormatError("query", col, "not a column of the dataset")


def load_events(
    dataset: str | Path, columns: Sequence[str] | None = None, where: Mapping[str, Any] = {}
) -> pd.DataFrame:
    """The dataset's events (all runs) as one pandas DataFrame, filtered by ``where``
    (column = value; a list matches any of its values)."""
    import pyarrow.dataset as pads

    table = pads.dataset(events_dir(dataset), format="parquet").to_table(
        columns=list(dict.fromkeys([*(columns or EVENT_COLUMNS), *where]))
    )
    df = table.to_pandas()
    for col, want in where.items():
        df = df[df[col].isin(want if isinstance(want, list | tuple) else [want])]
    return df.reset_index(drop=True)


def _values(df: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Captured rows, finite values, magnitude for signed metrics: column ``value``."""
    v = df[metric].astype("float64")
    if metric in SIGNED:
        v = v.abs()
    out = df.assign(value=v)
    return out[~out["flag_not_captured"].astype(bool) & np.isfinite(out["value"])]


def _pandas(dataset, metric, by, where) -> pd.DataFrame:
    df = _values(load_events(dataset, [metric, "flag_not_captured", *by], where), metric)
    g = df.groupby(list(by), sort=True, dropna=False)["value"]
    out = g.agg(["count", "mean", "std", "var", "min", "median", "max"])
    return out.rename(columns={"count": "n"}).reset_index()


def _sql_where(where: Mapping[str, Any]) -> tuple[str, list[Any]]:
    parts, params = [], []
    for col, want in where.items():
        vals = list(want) if isinstance(want, list | tuple) else [want]
        parts.append(f'"{col}" IN ({", ".join("?" * len(vals))})')
        params += vals
    return "".join(f" AND {p}" for p in parts), params


def _duckdb(dataset, metric, by, where) -> pd.DataFrame:
    import duckdb

    value = f'abs("{metric}")' if metric in SIGNED else f'"{metric}"'
    keys = ", ".join(f'"{k}"' for k in by)
    cond, params = _sql_where(where)
    sql = (
        f"SELECT {keys}, count(v) AS n, avg(v) AS mean, stddev_samp(v) AS std, "
        f"var_samp(v) AS var, min(v) AS min, median(v) AS median, max(v) AS max FROM ("
        f"SELECT {keys}, CAST({value} AS DOUBLE) AS v FROM read_parquet(?) "
        f"WHERE NOT flag_not_captured AND isfinite({value}){cond}) GROUP BY {keys} "
        f"ORDER BY {keys}"
    )
    with duckdb.connect() as con:
        return con.execute(sql, [_files(dataset), *params]).df()


def _dask(dataset, metric, by, where, scheduler: str | None) -> pd.DataFrame:
    import dask.dataframe as dd

    from rig.dataset.cluster import dask_client

    cols = list(dict.fromkeys([metric, "flag_not_captured", *by, *where]))
    with dask_client(scheduler):
        ddf = dd.read_parquet(str(events_dir(dataset)), columns=cols)
        for col, want in where.items():
            ddf = ddf[ddf[col].isin(list(want) if isinstance(want, list | tuple) else [want])]
        v = ddf[metric].astype("float64")
        if metric in SIGNED:
            v = abs(v)
        ddf = ddf.assign(value=v)
        ddf = ddf[~ddf["flag_not_captured"].astype(bool) & ~ddf["value"].isna()]
        ddf = ddf[(ddf["value"] != np.inf) & (ddf["value"] != -np.inf)]
        g = ddf.groupby(list(by), dropna=False)["value"]
        out = g.agg(["count", "mean", "std", "var", "min", "median", "max"], shuffle_method="tasks")
        out = out.compute()
    if isinstance(out.columns, pd.MultiIndex):  # dask names them (value, statistic)
        out.columns = out.columns.get_level_values(-1)
    out = out.rename(columns={"count": "n"}).reset_index()
    return out.sort_values(list(by)).reset_index(drop=True)


def group_summary(
    dataset: str | Path,
    metric: str,
    by: Sequence[str] = ("model", "mode", "capture", "volts", "load", "delay_s"),
    where: Mapping[str, Any] = {},
    *,
    engine: str = "pandas",
    scheduler: str | None = None,
) -> pd.DataFrame:
    """Statistics of ``metric`` per group of ``by`` over every run in the dataset (columns:
    the ``by`` columns, then STAT_COLUMNS), sorted by the group keys. ``by`` with
    ``serial`` gives them per unit, without it per model."""
    by = list(by)
    _check(metric, by, where)
    if engine == "pandas":
        out = _pandas(dataset, metric, by, where)
    elif engine == "duckdb":
        _files(dataset)
        out = _duckdb(dataset, metric, by, where)
    elif engine == "dask":
        _files(dataset)
        out = _dask(dataset, metric, by, where, scheduler)
    else:
        raise FileFormatError("query", "engine", f"{engine!r} is not one of {', '.join(ENGINES)}")
    out["n"] = out["n"].astype("int64")
    for col in by:  # one dtype per key whatever the engine, so the answers compare
        out[col] = out[col].astype(EVENT_COLUMNS[col].replace("string", "object"))
    return out[[*by, *STAT_COLUMNS]].sort_values(by).reset_index(drop=True)
