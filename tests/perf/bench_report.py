"""Benchmark: report generation time, for a synthetic run and for the demo's run.

Synthetic run (default): a synthetic analysed run (tests/report_fixtures.py: 2 meters x 3 modes
x 2 voltages x 25 events, plus a delay sweep; 40,000 samples per event) in a temporary folder,
then rig.report.page.write_report on it with the figures drawn in this process only
(``workers=1``) and with the default worker processes, and a third time with a baseline run
(target: under ~15 s).

Demo run (``--demo``): the whole ``rig report RUN`` command (imports, report.html with its
figures, certificate.pdf) as a fresh process, like a user types it, on a run made by
``rig demo`` (``--demo RUN`` uses that folder; ``--demo new`` makes one first, about a
minute). ``--against REV`` times the same command with the tree of git revision REV (exported
to a temporary folder) in alternation with this tree, so both see the same machine load, and
prints the ratio of the medians. Target (issue 14): under 5 s on a 2-core machine. The
machine may be shared: the wall time is printed with the CPU time of the process and its
workers (user + system), which moves less with the load.

Prints the figures; asserts nothing. Run by hand::

    python tests/perf/bench_report.py
    python tests/perf/bench_report.py --demo new --against HEAD~3 --repeat 3
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from rig.analysis.compare import compare_runs, write_comparison  # noqa: E402
from rig.report.page import write_report  # noqa: E402
from tests.report_fixtures import build_run  # noqa: E402


def synthetic() -> None:
    rng = np.random.default_rng(2026)
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        run = build_run(tmp, rng, run_id="bench-run", reps=25)
        base = build_run(tmp, rng, run_id="bench-base", reps=25, gain_scale=1.1)
        write_comparison(compare_runs(run, base), run, base)
        t_fixture = time.perf_counter() - t0
        n = sum(1 for _ in (run / "waveforms").glob("*.npz"))
        t1 = time.perf_counter()
        write_report(run, workers=1)
        t_serial = time.perf_counter() - t1
        t1 = time.perf_counter()
        path = write_report(run)
        t_report = time.perf_counter() - t1
        t2 = time.perf_counter()
        path_b = write_report(run, base)
        t_base = time.perf_counter() - t2
        size = path.stat().st_size
        print(f"events with waveforms : {n}")
        print(f"fixture build (2 runs): {t_fixture:6.1f} s")
        print(f"report, no workers    : {t_serial:6.1f} s")
        print(f"report                : {t_report:6.1f} s  ({size / 1e6:.1f} MB HTML)")
        print(f"report with baseline  : {t_base:6.1f} s  ({path_b.stat().st_size / 1e6:.1f} MB)")
        print(f"seconds per event     : {t_report / n * 1e3:6.1f} ms")


def _timed(tree: Path, run: Path) -> tuple[float, float]:
    """(wall s, CPU s of the process and its workers) of ``rig report run`` with ``tree``."""
    env = {**os.environ, "PYTHONPATH": str(tree)}
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    # cwd is the run's parent, not a source tree, so that only PYTHONPATH decides the code
    subprocess.run(
        [sys.executable, "-m", "rig.cli", "report", str(run)],
        cwd=run.parent,
        env=env,
        check=True,
        stdout=subprocess.DEVNULL,
    )
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def demo(run_arg: str, against: str | None, repeat: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        if run_arg == "new":
            res = Path(tmp) / "results"
            env = {**os.environ, "PYTHONPATH": str(ROOT)}
            subprocess.run(
                [sys.executable, "-m", "rig.cli", "demo", "--results", str(res), "--quiet"],
                cwd=tmp,
                env=env,
                check=True,
                stdout=subprocess.DEVNULL,
            )
            run = next(p for p in res.iterdir() if p.is_dir())
        else:
            run = Path(run_arg).resolve()
        trees = {"this tree": ROOT}
        if against:
            old = Path(tmp) / "against"
            old.mkdir()
            archive = subprocess.run(
                ["git", "-C", str(ROOT), "archive", against], check=True, capture_output=True
            ).stdout
            subprocess.run(["tar", "-x", "-C", str(old)], input=archive, check=True)
            trees = {against: old, "this tree": ROOT}
        events = sum(1 for _ in (run / "waveforms").iterdir())
        print(f"demo run: {run.name} ({events} waveform files)")
        for tree in trees.values():  # once untimed: byte-compiles the sources, warms the cache
            _timed(tree, run)
        times: dict[str, list[tuple[float, float]]] = {k: [] for k in trees}
        for _ in range(repeat):
            for name, tree in trees.items():
                times[name].append(_timed(tree, run))
        med = {}
        for name, got in times.items():
            walls = [w for w, _ in got]
            cpus = [c for _, c in got]
            med[name] = (statistics.median(walls), statistics.median(cpus))
            print(
                f"rig report, {name:>10}: wall median {med[name][0]:5.2f} s "
                f"(runs {', '.join(f'{w:.2f}' for w in walls)}), "
                f"CPU median {med[name][1]:5.2f} s"
            )
        if against:
            (w0, c0), (w1, c1) = med[against], med["this tree"]
            print(f"ratio this tree / {against}: wall {w1 / w0:.2f}, CPU {c1 / c0:.2f}")
        print(f"load average (1, 5, 15 min): {', '.join(f'{x:.1f}' for x in os.getloadavg())}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--demo", metavar="RUN", help="time `rig report RUN` ('new': make a run)")
    ap.add_argument("--against", metavar="REV", help="git revision to time alongside")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per tree (default 3)")
    args = ap.parse_args()
    if args.demo:
        demo(args.demo, args.against, args.repeat)
    else:
        synthetic()


if __name__ == "__main__":
    main()
