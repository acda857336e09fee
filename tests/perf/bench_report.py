"""Benchmark: report generation time for a run of about 300 events (target: under ~15 s).

Builds a synthetic analysed run (tests/report_fixtures.py: 2 meters x 3 modes x 2 voltages x
25 events, plus a delay sweep; 40,000 samples per event) in a temporary folder, then times
rig.report.page.write_report on it, a second time with a baseline run. Prints the figures; asserts
nothing. Run by hand: ``python tests/perf/bench_report.py``.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from rig.analysis.compare import compare_runs, write_comparison  # noqa: E402
from rig.report.page import write_report  # noqa: E402
from tests.report_fixtures import build_run  # noqa: E402


def main() -> None:
    rng = np.random.default_rng(2026)
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        run = build_run(tmp, rng, run_id="bench-run", reps=25)
        base = build_run(tmp, rng, run_id="bench-base", reps=25, gain_scale=1.1)
        write_comparison(compare_runs(run, base), run, base)
        t_fixture = time.perf_counter() - t0
        n = sum(1 for _ in (run / "waveforms").glob("*.npz"))
        t1 = time.perf_counter()
        path = write_report(run)
        t_report = time.perf_counter() - t1
        t2 = time.perf_counter()
        path_b = write_report(run, base)
        t_base = time.perf_counter() - t2
        size = path.stat().st_size
        print(f"events with waveforms : {n}")
        print(f"fixture build (2 runs): {t_fixture:6.1f} s")
        print(f"report                : {t_report:6.1f} s  ({size / 1e6:.1f} MB HTML)")
        print(f"report with baseline  : {t_base:6.1f} s  ({path_b.stat().st_size / 1e6:.1f} MB)")
        print(f"seconds per event     : {t_report / n * 1e3:6.1f} ms")


if __name__ == "__main__":
    main()
