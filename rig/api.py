"""The notebook API: stored runs as pandas DataFrames and waveforms of a group as numpy arrays.

Example (a run of the bundled demo; the demo's names are fictitious)::

    from rig.api import load_run, group_waveforms
    df = load_run("results/<run>")                     # one row per event
    t, i, rows = group_waveforms("results/<run>", meter="Candidate A", mode="AC V",
                                 capture="peak", volts=1000.0)
    # t: (samples,) seconds from the trigger; i: (events, samples) amperes; rows: their rows

Nothing here writes into the run folder. This module only hands on the public names of the
stages below it, so a notebook needs one import.

Across runs (rig.dataset): ``list_runs``, ``build_dataset``, ``group_summary`` (pandas, DuckDB
or Dask), ``variance_split`` and ``individuals_chart`` over ``load_events(dataset)``.
"""

from rig.analysis.runs import group_waveforms, load_event_waveform, load_run
from rig.dataset import (
    build_dataset,
    group_summary,
    individuals_chart,
    list_runs,
    load_events,
    variance_split,
)

__all__ = [
    "build_dataset",
    "group_summary",
    "group_waveforms",
    "individuals_chart",
    "list_runs",
    "load_event_waveform",
    "load_events",
    "load_run",
    "variance_split",
]
