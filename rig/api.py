"""The notebook API: stored runs as pandas DataFrames and waveforms of a group as numpy arrays.

Example (a run of the bundled demo; the demo's names are fictitious)::

    from rig.api import load_run, group_waveforms
    df = load_run("results/<run>")                     # one row per event
    t, i, rows = group_waveforms("results/<run>", meter="Candidate A", mode="AC V",
                                 capture="peak", volts=1000.0)
    # t: (samples,) seconds from the trigger; i: (events, samples) amperes; rows: their rows

Into any load (identify a group's source from its events into two or more loads, predict)::

    src = identify("results/<run>", ["short", "1k"], meter="Candidate A", mode="AC V",
                   volts=1000.0)
    p = predict(src, read_load("sequences/loads/logic-3v3.toml"), np.random.default_rng(1))
    p.value["peak_a"], p.low["peak_a"], p.high["peak_a"], p.energy_parts

Nothing here writes into the run folder (``predict_run`` writes predicted.csv when asked). This module only hands on the public names of the
stages below it, so a notebook needs one import.

Across runs (rig.dataset): ``list_runs``, ``build_dataset``, ``group_summary`` (pandas, DuckDB
or Dask), ``variance_split`` and ``individuals_chart`` over ``load_events(dataset)``.
"""

from rig.analysis.identify import identify
from rig.analysis.predict import predict
from rig.analysis.predictrun import predict_run, resolve_load
from rig.analysis.runs import group_waveforms, load_event_waveform, load_run
from rig.analysis.sourcenet import FosterSource
from rig.dataset import (
    build_dataset,
    group_summary,
    individuals_chart,
    list_runs,
    load_events,
    variance_split,
)
from rigbase.loadfile import read_load

__all__ = [
    "FosterSource",
    "build_dataset",
    "group_summary",
    "group_waveforms",
    "identify",
    "individuals_chart",
    "list_runs",
    "load_event_waveform",
    "load_events",
    "load_run",
    "predict",
    "predict_run",
    "read_load",
    "resolve_load",
    "variance_split",
]
