"""Per-event metrics of many run folders on Dask: one task per run, each the same
:func:`rig.analysis.analyze.analyze_run` as ``rig analyze``, so the results are those of the
single-process path by construction (tests/unit/test_dataset.py compares them). Runs are
spread over the workers of a local cluster, or of the scheduler at ``scheduler``; a worker
must see the run folders at the same paths (a shared file system on a real cluster).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from rig.dataset.cluster import dask_client

__all__ = ["analyze_runs"]


def _analyze(run_dir: str) -> str:
    """One run on a worker; returns the metrics file written."""
    from rig.analysis.analyze import analyze_run

    return str(analyze_run(run_dir, table=False).metrics_path)


def analyze_runs(run_dirs: Sequence[str | Path], scheduler: str | None = None) -> list[Path]:
    """Analyse every run folder (writes metrics.parquet, groups.csv... into each) on Dask;
    returns the metrics files in the order given. A failing run raises its error here."""
    if not run_dirs:
        return []
    with dask_client(scheduler) as client:
        futures = client.map(_analyze, [str(p) for p in run_dirs], pure=False)
        return [Path(p) for p in client.gather(futures)]
