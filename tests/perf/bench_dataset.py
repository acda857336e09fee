"""Benchmark of the dataset across runs (run by hand: python tests/perf/bench_dataset.py).

Writes synthetic analysed run folders of 1,000 events each (tests/dataset_fixtures.py: metrics
tables of invented meters, five units of two models), then for 10,000 and 100,000 events
prints: the dataset build time (from nothing), the time of adding the same runs again (must
add nothing), the query times (group statistics per model and per unit on pandas, DuckDB and
Dask; the variance split; the I-MR trend), the peak Python heap of the build and of the
pandas query (tracemalloc; Arrow's own buffers are not traced), the peak resident memory of
the whole measuring process (each size in a fresh process; includes writing the runs), and
the ratios 100k / 10k (target: time ratio <= 11, i.e. linear).
Options: --small, --large (events), --no-dask.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from rig.dataset import (  # noqa: E402
    build_dataset,
    group_summary,
    individuals_chart,
    list_runs,
    load_events,
    variance_split,
)
from tests.dataset_fixtures import write_metrics_run  # noqa: E402

PER_RUN = 1000  # events per run: 2 modes x 2 captures x 2 voltages x 125 repetitions
UNITS = [("Candidate A", f"A-{k:04d}", 0.3 * k) for k in range(3)] + [
    ("Candidate B", f"B-{k:04d}", 2.0 + 0.3 * k) for k in range(2)
]


def make_runs(root: Path, events: int, rng: np.random.Generator) -> list[Path]:
    t0 = datetime(2026, 1, 5, 8, 0, tzinfo=UTC)
    runs = []
    for k in range(events // PER_RUN):
        model, serial, off = UNITS[k % len(UNITS)]
        started = t0 + timedelta(days=k)
        runs.append(
            write_metrics_run(
                root,
                f"{started:%Y%m%d}-{k:05d}-{serial}",
                rng,
                model=model,
                serial=serial,
                started=started,
                reps=PER_RUN // 8,
                unit_offset=off,
            )
        )
    return runs


def timed(fn, *args, trace: bool = False, **kw):
    """(result, seconds, peak traced bytes or 0)."""
    if trace:
        tracemalloc.start()
    t = time.perf_counter()
    out = fn(*args, **kw)
    dt = time.perf_counter() - t
    peak = tracemalloc.get_traced_memory()[1] if trace else 0
    if trace:
        tracemalloc.stop()
    return out, dt, peak


def measure(events: int, dask: bool) -> dict[str, float]:
    rng = np.random.default_rng(events)
    res: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as tmp:
        root, ds = Path(tmp) / "results", Path(tmp) / "ds"
        runs = make_runs(root, events, rng)
        _, res["catalog s"], _ = timed(list_runs, root)
        s, res["build s"], _ = timed(build_dataset, ds, runs)
        assert len(s.added) == len(runs)
        # memory traced on a second, fresh build (tracing slows allocation several-fold)
        _, _, res["build peak MB"] = timed(build_dataset, Path(tmp) / "ds2", runs, trace=True)
        s, res["re-add s"], _ = timed(build_dataset, ds, runs)
        assert not s.added and not s.replaced
        by_model = ["model", "mode", "capture", "volts"]
        by_unit = ["model", "serial", "mode", "capture", "volts"]
        ref, res["pandas per model s"], _ = timed(group_summary, ds, "peak_a", by_model)
        _, _, res["pandas peak MB"] = timed(group_summary, ds, "peak_a", by_model, trace=True)
        duck, res["duckdb per model s"], _ = timed(
            group_summary, ds, "peak_a", by_model, engine="duckdb"
        )
        _, res["duckdb per unit s"], _ = timed(
            group_summary, ds, "peak_a", by_unit, engine="duckdb"
        )
        assert np.allclose(duck["mean"], ref["mean"], rtol=1e-12)
        if dask:
            dk, res["dask per model s"], _ = timed(
                group_summary, ds, "peak_a", by_model, engine="dask"
            )
            assert np.allclose(dk["std"], ref["std"], rtol=1e-12)
        ev, res["load events s"], _ = timed(load_events, ds, where={"capture": "peak"})
        _, res["variance split s"], _ = timed(variance_split, ev, "peak_a")
        base = sorted({str(r) for r in ev["run_id"]})[:10]
        _, res["I-MR trend s"], _ = timed(individuals_chart, ev, "peak_a", base)
    res["build peak MB"] /= 1e6
    res["pandas peak MB"] /= 1e6
    res["process peak RSS MB"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", type=int, default=10_000)
    ap.add_argument("--large", type=int, default=100_000)
    ap.add_argument("--no-dask", action="store_true", help="skip the Dask engine")
    ap.add_argument("--one", type=int, help=argparse.SUPPRESS)  # measure one size, print JSON
    args = ap.parse_args()
    if args.one:
        print(json.dumps(measure(args.one, not args.no_dask)))
        return

    def fresh(n: int) -> dict[str, float]:
        cmd = [sys.executable, __file__, "--one", str(n)] + (["--no-dask"] if args.no_dask else [])
        done = subprocess.run(cmd, capture_output=True, text=True, check=True)
        return json.loads(done.stdout.strip().splitlines()[-1])

    small, large = fresh(args.small), fresh(args.large)
    print(f"{'':24} {args.small:>10,} {args.large:>10,} {'ratio':>7}")
    for key in small:
        print(f"{key:24} {small[key]:10.3f} {large[key]:10.3f} {large[key] / small[key]:7.2f}")
    print("target: time ratio <= 11 for 10x the events (the Dask time includes its cluster start)")


if __name__ == "__main__":
    main()
