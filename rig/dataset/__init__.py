"""A dataset across runs: the stage after analysis. The catalog lists run folders (status,
meters, counts, dates); the build gathers many analysed runs into one Parquet dataset, one
file per run, idempotently; the queries answer group statistics across runs per unit and per
model (on pandas, DuckDB or Dask, one answer), the split of variance between units and between
events of one unit (one-way random-effects ANOVA), and trends per unit over time on a Shewhart
individuals and moving-range chart with limits from baseline runs.
"""

from rig.dataset.build import (
    EVENT_COLUMNS,
    BuildSummary,
    build_dataset,
    events_dir,
    read_runs_table,
)
from rig.dataset.catalog import CATALOG_COLUMNS, find_runs, list_runs, run_entry
from rig.dataset.cluster import dask_client
from rig.dataset.control import CHART_NAME, D2, D4, individuals_chart
from rig.dataset.distribute import analyze_runs
from rig.dataset.query import ENGINES, STAT_COLUMNS, group_summary, load_events
from rig.dataset.variance import VARIANCE_COLUMNS, one_way_random_effects, variance_split

__all__ = [
    "CATALOG_COLUMNS",
    "CHART_NAME",
    "D2",
    "D4",
    "ENGINES",
    "EVENT_COLUMNS",
    "STAT_COLUMNS",
    "VARIANCE_COLUMNS",
    "BuildSummary",
    "analyze_runs",
    "build_dataset",
    "dask_client",
    "events_dir",
    "find_runs",
    "group_summary",
    "individuals_chart",
    "list_runs",
    "load_events",
    "one_way_random_effects",
    "read_runs_table",
    "run_entry",
    "variance_split",
]
