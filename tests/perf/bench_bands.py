"""Benchmark: the report's streamed waveform bands (rig.analysis.bands) against the number of
events: time per event and peak traced memory, and the stacking they replace.

Feeds synthetic long-capture records (26,000 samples at 5 us, a damped exponential of random
amplitude on 4-code noise, seeded) one at a time through a BandAccumulator, for each count of
``--events`` (default 1000,10000,20000), and prints time per event, the estimator's bytes, the peak
memory traced by tracemalloc while streaming (records are made on the fly and dropped), and
what stacking the same records as float64 (the old report) would have taken. Asserts nothing.
Run by hand: ``python tests/perf/bench_bands.py [--events 1000,10000,100000]``.
"""

from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from rig.analysis.bands import BandAccumulator, band_grid  # noqa: E402

N_SAMPLES = 26_000
DT = 5e-6
T0 = -1000 * DT


def _stream(n_events: int, rng: np.random.Generator) -> tuple[float, int, int, bool]:
    """(seconds per event, estimator bytes, peak traced bytes, still exact) for n events."""
    t = T0 + DT * np.arange(N_SAMPLES)
    shape = np.exp(-np.clip(t, 0, None) / 5e-3) * (t > 0)
    grid = band_grid(T0, DT, N_SAMPLES, (-2e-4, 2e-3))
    acc = BandAccumulator(grid, span=80.0)
    tracemalloc.start()
    start = time.perf_counter()
    for _ in range(n_events):
        record = rng.uniform(5, 40) * shape + rng.normal(0, 4 * 1.2e-3, N_SAMPLES)
        acc.add(record)
    per_event = (time.perf_counter() - start) / n_events
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    acc.result()
    return per_event, acc.nbytes, peak, acc.values.exact


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", default="1000,10000,20000", help="comma-separated event counts")
    args = ap.parse_args()
    counts = [int(x) for x in args.events.split(",")]
    rng = np.random.default_rng(14)
    print(
        f"records of {N_SAMPLES} samples; grid of {band_grid(T0, DT, N_SAMPLES, (-2e-4, 2e-3)).width} points"
    )
    print("events   ms/event  estimator MB  peak traced MB  exact  stacked float64 MB (old)")
    rows = []
    for n in counts:
        per, held, peak, exact = _stream(n, rng)
        rows.append((n, peak))
        stacked = n * N_SAMPLES * 8 / 1e6
        print(
            f"{n:6d}   {per * 1e3:8.2f}  {held / 1e6:12.1f}  {peak / 1e6:14.1f}  {exact!s:5}"
            f"  {stacked:10.0f}"
        )
    if len(rows) > 1:
        (n0, p0), (n1, p1) = rows[-2], rows[-1]
        print(f"peak memory ratio {n1}/{n0} events: {p1 / p0:.2f}")


if __name__ == "__main__":
    main()
