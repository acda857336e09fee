"""Benchmark of the group statistics (groups.csv) on large synthetic metric tables (run by
hand: python tests/perf/bench_group_stats.py).

Prints, for 10,000 and 100,000 events split into --groups groups: the time and the peak
traced memory (tracemalloc) of rig.analysis.stats.group_stats over every default metric, the
interval method the groups got, and the ratios 100k / 10k (target of issue 14: time ratio at
most 11, memory growing no faster than the table itself). Options: --sizes, --groups,
--repeat (best of).
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np
import pandas as pd

from rig.analysis.stats import DEFAULT_METRICS, MEDIAN_CI_BOOTSTRAP_MAX, group_stats


def table(n: int, groups: int, rng: np.random.Generator) -> pd.DataFrame:
    """n invented events in ``groups`` groups (modes), every default metric lognormal."""
    data = {
        "event": np.arange(n),
        "meter": "Candidate A",
        "serial": "S-1",
        "mode": np.array([f"mode {k}" for k in range(groups)])[np.arange(n) % groups],
        "capture": "main",
        "volts": 500.0,
        "load": "short",
        "delay_s": 0.0,
        "flag_not_captured": np.zeros(n, dtype=bool),
        "polarity": np.ones(n, dtype=np.int8),
    }
    for name in DEFAULT_METRICS:
        data[name] = rng.lognormal(0.0, 0.3, n)
    return pd.DataFrame(data)


def measure(n: int, groups: int, repeat: int) -> tuple[float, float, str]:
    """(best time s, peak traced memory MB, methods) of group_stats on n events."""
    m = table(n, groups, np.random.default_rng(1))
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        g = group_stats(m, None, rng=np.random.default_rng(0))
        best = min(best, time.perf_counter() - t)
    tracemalloc.start()
    group_stats(m, None, rng=np.random.default_rng(0))
    peak = tracemalloc.get_traced_memory()[1] / 1e6
    tracemalloc.stop()
    return best, peak, ",".join(sorted(set(g["median_ci_method"].dropna())))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000])
    ap.add_argument("--groups", type=int, default=4)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    print(
        f"group_stats, {len(DEFAULT_METRICS)} metrics, {args.groups} groups; "
        f"bootstrap up to {MEDIAN_CI_BOOTSTRAP_MAX} values per group, order statistic beyond"
    )
    rows = []
    for n in args.sizes:
        t, mb, how = measure(n, args.groups, args.repeat)
        rows.append((n, t, mb))
        print(f"  n = {n:>8,}: {t:7.3f} s, peak traced {mb:8.1f} MB, median CI: {how}")
    if len(rows) >= 2:
        (n0, t0, m0), (n1, t1, m1) = rows[0], rows[-1]
        print(f"  ratio {n1:,} / {n0:,}: time {t1 / t0:.1f}, memory {m1 / m0:.1f}")


if __name__ == "__main__":
    main()
