"""One writer per run folder, and signals at any moment, as a user meets them (subprocesses).

Every moment is chosen from the run's own progress - a journal count, the manifest's status -
never from elapsed time, so the check a test was written for always runs.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from rig.store.lock import RunLock
from rig.store.runfolder import read_journal, verify_run

from .test_runner import BENCH, write_sequence

ROOT = Path(__file__).resolve().parents[2]
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def _start(*args: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "rig.cli", *args],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=ROOT,
        env=ENV,
    )


def _finish(proc: subprocess.Popen, timeout: float = 600) -> tuple[int, str]:
    out, err = proc.communicate(timeout=timeout)
    return proc.returncode, out + err


def _journalled(run: Path) -> int:
    try:
        return len(read_journal(run))
    except Exception:  # the folder may not exist yet
        return 0


def _wait_for(cond, proc: subprocess.Popen, what: str, timeout: float = 300) -> None:
    """Poll the run's progress (not a time to wait); fail if the process ends first."""
    end = time.monotonic() + timeout
    while not cond():
        if proc.poll() is not None:
            pytest.fail(f"process ended before {what}: {proc.communicate()}")
        if time.monotonic() > end:
            proc.kill()
            pytest.fail(f"no progress to {what}")
        time.sleep(0.01)


def _run_dir(results: Path) -> Path | None:
    runs = [p for p in results.iterdir() if p.is_dir() and not p.name.startswith(".")]
    return runs[0] if runs else None


def _start_run(tmp_path: Path, reps: int = 12, report: bool = False) -> tuple:
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=reps, points=2000)
    results = tmp_path / "results"
    results.mkdir()
    args = ["run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet"]
    proc = _start(*args, *(() if report else ("--no-report",)))
    return proc, results


def _interrupted_run(tmp_path: Path, at: int = 3) -> Path:
    proc, results = _start_run(tmp_path)
    _wait_for(lambda: (r := _run_dir(results)) is not None and _journalled(r) >= at, proc, "k")
    proc.send_signal(signal.SIGINT)
    code, text = _finish(proc)
    assert code == 130, text
    return _run_dir(results)


def _assert_once_each(run: Path) -> None:
    events = [r["event"] for r in read_journal(run)]
    assert len(events) == len(set(events)), "duplicate events"
    assert verify_run(run).ok, verify_run(run).problems


def test_two_resumes_one_writer(tmp_path):
    run = _interrupted_run(tmp_path)
    a = _start("resume", str(run), "--no-report", "--quiet")
    b = _start("resume", str(run), "--no-report", "--quiet")
    (ca, ta), (cb, tb) = _finish(a), _finish(b)
    assert sorted([ca, cb]) == [0, 2], (ta, tb)
    loser = ta if ca == 2 else tb
    assert "in use by another process (pid " in loser and "resume" in loser
    assert len([ln for ln in loser.splitlines() if ln.startswith("rig: error")]) == 1
    _assert_once_each(run)
    assert len(read_journal(run)) == 12


@pytest.mark.parametrize("second", ["resume", "analyze", "report"])
def test_second_process_during_a_run_is_refused(tmp_path, second):
    proc, results = _start_run(tmp_path, reps=300)
    _wait_for(lambda: (r := _run_dir(results)) is not None and _journalled(r) >= 2, proc, "2")
    run = _run_dir(results)
    code, text = _finish(_start(second, str(run)))
    assert code == 2, text
    assert f"pid {proc.pid} on " in text and ", run" in text, text
    assert "Traceback" not in text
    code, text = _finish(proc)
    assert code == 0, text
    _assert_once_each(run)
    assert len(read_journal(run)) == 300


def test_report_during_analyze_is_refused(tmp_path):
    run = _interrupted_run(tmp_path)
    with RunLock(run, "analyze"):  # an analysis in progress (this process holds the lock)
        code, text = _finish(_start("report", str(run)))
    assert code == 2 and f"pid {os.getpid()} " in text and "analyze" in text, text
    assert not (run / "report.html").exists()


@pytest.mark.parametrize("at", [1, 5, 11])
def test_sigterm_at_a_journal_count_prints_the_journalled_count(tmp_path, at):
    proc, results = _start_run(tmp_path)
    _wait_for(lambda: (r := _run_dir(results)) is not None and _journalled(r) >= at, proc, "k")
    proc.send_signal(signal.SIGTERM)
    code, text = _finish(proc)
    run = _run_dir(results)
    n = len(read_journal(run))
    assert code == 130, text
    assert f": {n}/12 events" in text or f"holds {n} journalled events" in text, text
    _assert_once_each(run)
    assert json.loads((run / "manifest.json").read_text())["status"] in ("interrupted", "complete")


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT, signal.SIGKILL])
def test_signal_during_the_end_of_run_analysis(tmp_path, sig):
    """The moment: the manifest says complete (the runner's bookkeeping is done) and the
    analysis has begun; the process holds the lock until it exits."""
    proc, results = _start_run(tmp_path, reps=6, report=True)

    def analysing() -> bool:
        r = _run_dir(results)
        if r is None or not (r / "manifest.json").exists():
            return False
        return json.loads((r / "manifest.json").read_text()).get("status") == "complete"

    _wait_for(analysing, proc, "the analysis")
    proc.send_signal(sig)
    code, text = _finish(proc)
    run = _run_dir(results)
    if sig != signal.SIGKILL:
        assert code == 130, text
        assert "interrupted by" in text and "holds 6 journalled events" in text, text
    _assert_once_each(run)
    metrics = run / "metrics.parquet"
    if metrics.exists():  # written atomically: complete or absent, never truncated
        import pandas as pd

        assert len(pd.read_parquet(metrics)) == 6
    code, text = _finish(_start("report", str(run)))  # the lock died with the process
    assert code == 0, text
