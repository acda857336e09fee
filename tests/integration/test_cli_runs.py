"""The `rig` command as a user runs it: in a subprocess, killed at random moments, resumed."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from rig.cli import main
from rig.store.runfolder import read_journal, read_plan

from .test_runner import BENCH, write_sequence

ROOT = Path(__file__).resolve().parents[2]


def rig(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "rig.cli", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=ROOT,
    )


def only_run(results: Path) -> Path:
    runs = [p for p in results.iterdir() if p.is_dir()]
    assert len(runs) == 1, runs
    return runs[0]


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGKILL], ids=["SIGINT", "SIGKILL"])
def test_killed_run_verifies_and_resumes(tmp_path, seed, sig):
    rng = np.random.default_rng(seed)
    seq = write_sequence(tmp_path, modes=("AC V", "DC V"), volts=(1000,), reps=15, points=2000)
    results = tmp_path / "results"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "rig.cli",
            "run",
            str(seq),
            "--bench",
            str(BENCH),
            "--results",
            str(results),
            "--no-report",
            "--quiet",
        ],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    # strike when the journal holds a random count of events (the run's own progress, not a
    # time: a kill after the last event would silently skip the checks below)
    at = int(rng.integers(1, 26))
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        runs = [p for p in results.glob("*") if (p / "journal.jsonl").exists()]
        if runs and len(read_journal(runs[0])) >= at:
            break
        time.sleep(0.005)
    assert proc.poll() is None, "the run ended before the chosen moment"
    os.kill(proc.pid, sig)
    out, err = proc.communicate(timeout=120)
    run = only_run(results)
    manifest = json.loads((run / "manifest.json").read_text())
    if sig == signal.SIGINT and manifest["status"] == "interrupted":
        # the signal landed inside the run: the runner said how it ended, and went safe
        assert proc.returncode == 130, out + err
        assert "Ctrl-C" in out + err and "safe state reached" in out + err
        assert manifest["exit_path"] == "Ctrl-C" and manifest["safe_state"]["reached"]

    journal_before = read_journal(run)  # readable whatever the moment of the kill
    assert at <= len(journal_before) < len(read_plan(run))  # the kill landed inside the run
    v = rig("verify", str(run))
    assert "events journalled" in v.stdout
    if len(journal_before) < len(read_plan(run)):
        assert v.returncode == 1 and "rig resume" in v.stdout

    r = rig("resume", str(run), "--no-report", "--quiet")
    assert r.returncode == 0, r.stdout + r.stderr
    v = rig("verify", str(run))
    assert v.returncode == 0, v.stdout
    table = pd.read_parquet(run / "events.parquet")
    planned = [p["event"] for p in read_plan(run)]
    assert sorted(table["event"].tolist()) == planned  # each planned event exactly once


def test_run_analyze_report_from_the_cli(tmp_path):
    seq = write_sequence(tmp_path, modes=("AC V", "DC V"), volts=(500, 1000), reps=5, points=4000)
    results = tmp_path / "results"
    r = rig("run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "HIGH VOLTAGE" in r.stdout
    run = only_run(results)
    for name in (
        "manifest.json",
        "plan.json",
        "journal.jsonl",
        "events.parquet",
        "metrics.parquet",
        "groups.csv",
        "report.html",
        "sequence.toml",
        "bench.toml",
    ):
        assert (run / name).exists(), name
    assert rig("verify", str(run)).returncode == 0


GOOD_SEQUENCE = """
[sequence]
name = "bad-input check"
repetitions = 2
[[meters]]
model = "Test meter"
serial = "T-1"
modes = ["AC V"]
sim_model = "demo-a"
[charge]
volts = [500]
dwell_s = 0.5
[discharge]
loads = ["short"]
"""

# (file kind, text edit on the good file, text the one-line message must contain)
BAD_INPUTS = {
    "seq-unknown-key": (
        "seq",
        ("repetitions = 2", "repetitions = 2\nrepetitons = 3"),
        "repetitions",
    ),
    "seq-toml-syntax": ("seq", ("[charge]", "[charge"), "line"),
    "seq-wrong-type": ("seq", ("repetitions = 2", 'repetitions = "many"'), "repetitions"),
    "seq-volts-over-max": ("seq", ("volts = [500]", "volts = [500, 5000]"), "volts"),
    "seq-unknown-load": ("seq", ('loads = ["short"]', 'loads = ["open"]'), "open"),
    "seq-unknown-mode": ("seq", ('modes = ["AC V"]', 'modes = ["AC kV"]'), "AC kV"),
    "seq-bad-si-string": ("seq", ("dwell_s = 0.5", 'dwell_s = "half a second"'), "dwell_s"),
    "seq-no-meters": ("seq", ("[[meters]]", "[[meterz]]"), "meter"),
    "bench-negative-ohms": ("bench", ('charge_ohms = "100k"', "charge_ohms = -5"), "charge_ohms"),
    "bench-duplicate-channels": ("bench", ("bleed = 3", "bleed = 2"), "bleed"),
    "bench-mixed-sim-and-real": (
        "bench",
        (
            'resource = "sim"\nprofile = "scpi1999"\ntimeout_s = 5',
            'resource = "TCPIP0::127.0.0.1::5025::SOCKET"\nprofile = "scpi1999"\ntimeout_s = 5',
        ),
        "sim",
    ),
    "bench-unknown-profile": (
        "bench",
        ('profile = "scpi1999"', 'profile = "scpi1998"'),
        "scpi1998",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_bad_input_is_one_line_and_exit_2(tmp_path, capsys, case):
    kind, (old, new), must = BAD_INPUTS[case]
    seq = tmp_path / "seq.toml"
    bench = tmp_path / "bench.toml"
    seq_text, bench_text = GOOD_SEQUENCE, BENCH.read_text()
    if kind == "seq":
        assert old in seq_text
        seq_text = seq_text.replace(old, new, 1)
    else:
        assert old in bench_text
        bench_text = bench_text.replace(old, new, 1)
    seq.write_text(seq_text)
    bench.write_text(bench_text)
    code = main(["check", str(seq), "--bench", str(bench)])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1, err
    bad = seq if kind == "seq" else bench
    assert str(bad) in err and must in err, err


def test_good_input_of_the_bad_input_checks_is_good(tmp_path, capsys):
    seq = tmp_path / "seq.toml"
    seq.write_text(GOOD_SEQUENCE)
    assert main(["check", str(seq), "--bench", str(BENCH)]) == 0


def test_missing_file_is_one_line_and_exit_2(tmp_path, capsys):
    code = main(["check", str(tmp_path / "nope.toml"), "--bench", str(BENCH)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "nope.toml" in err


def test_corrupt_run_folder_is_one_line_and_exit_2(tmp_path, capsys):
    (tmp_path / "manifest.json").write_text("{not json")
    code = main(["verify", str(tmp_path)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "manifest.json" in err and len(err.splitlines()) == 1


def test_help_shows_the_caution(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    out = capsys.readouterr().out
    assert "HIGH VOLTAGE" in out and "licensed practice" in out


def test_verify_names_a_damaged_waveform(tmp_path):
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=3, points=2000)
    results = tmp_path / "results"
    r = rig(
        "run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet", "--no-report"
    )
    assert r.returncode == 0, r.stdout + r.stderr
    run = only_run(results)
    victim = sorted((run / "waveforms").iterdir())[1]
    data = bytearray(victim.read_bytes())
    data[-10] ^= 0xFF  # one flipped byte
    victim.write_bytes(bytes(data))
    v = rig("verify", str(run))
    assert v.returncode == 1
    assert f"waveforms/{victim.name}: checksum differs" in v.stdout


def test_compare_gates_a_repair_workflow(tmp_path):
    """Same meter, same bench seed: equivalent (exit 0). Another meter model: not (exit 1)."""
    results = tmp_path / "results"
    runs = []
    for name, model in (("base", "demo-a"), ("after", "demo-a"), ("other", "demo-b")):
        d = tmp_path / name
        d.mkdir()
        seq = write_sequence(d, modes=("AC V",), volts=(1000,), reps=20, points=3000)
        seq.write_text(seq.read_text().replace('sim_model = "demo-a"', f'sim_model = "{model}"'))
        out = results / name
        r = rig("run", str(seq), "--bench", str(BENCH), "--results", str(out), "--quiet")
        assert r.returncode == 0, r.stdout + r.stderr
        runs.append(only_run(out))
    base, after, other = runs
    same = rig("compare", str(after), "--baseline", str(base))
    assert same.returncode == 0, same.stdout
    assert "all groups equivalent" in same.stdout
    diff = rig("compare", str(other), "--baseline", str(base))
    assert diff.returncode == 1, diff.stdout
    assert "different" in diff.stdout
    assert list(other.glob("compare-*.csv"))
