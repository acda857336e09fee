"""Calibration records on a run: applied to the stored scaling, recorded, reported, and a
record past due stops `rig run` with one line before anything is switched on."""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from rig.cli import main
from rig.store.runfolder import read_journal
from rig.store.waveform import load_waveform

from ..dialect_support import ROOT, dialect_bench
from .test_runner import write_sequence

FUTURE = (dt.date.today() + dt.timedelta(days=365)).isoformat()
CAL = """
[calibration.current]
gain = {gain}
offset_amps = {offset}
calibrated = {cal}
due = {due}
certificate = "demo cert 7"

[calibration.voltage]
ratio = 1000
calibrated = {cal}
due = {due}

[calibration.deskew]
voltage_s = 2.5e-9
"""


def _bench(
    tmp_path: Path, name: str, gain: float = 1.0, offset: float = 0.0, due: str = FUTURE
) -> Path:
    cal = "2019-01-15" if due < "2025" else "2025-01-15"
    return dialect_bench(
        tmp_path, name, extra=CAL.format(gain=gain, offset=offset, due=due, cal=cal)
    )


def test_past_due_stops_the_run_with_one_line(tmp_path: Path) -> None:
    seq = write_sequence(tmp_path, modes=("DC V",), volts=(500,), reps=1, points=2000)
    bench = _bench(tmp_path, "late", due="2020-01-01")
    results = tmp_path / "results"
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "rig.cli",
            "run",
            str(seq),
            "--bench",
            str(bench),
            "--results",
            str(results),
            "--quiet",
        ],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=ROOT,
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "[calibration.current] due 2020-01-01 has passed" in lines[0]
    assert str(bench) in lines[0] and "recalibrate" in lines[0]
    assert not results.exists()  # no run folder: nothing was started


def test_calibration_is_applied_recorded_and_reported(tmp_path: Path) -> None:
    seq = write_sequence(tmp_path, modes=("DC V",), volts=(500,), reps=2, points=2000)
    runs = {}
    for name, gain, offset in (("plain", 1.0, 0.0), ("cal", 2.0, 0.5)):
        results = tmp_path / f"res-{name}"
        args = [
            "run",
            str(seq),
            "--bench",
            str(_bench(tmp_path, name, gain, offset)),
            "--results",
            str(results),
            "--quiet",
            "--operator",
            "A. Tester",
        ]
        if name == "plain":
            args.append("--no-report")
        assert main(args) == 0
        (runs[name],) = results.iterdir()
    rows = {n: read_journal(r) for n, r in runs.items()}
    for a, b in zip(rows["plain"], rows["cal"], strict=True):
        wa, wb = load_waveform(runs["plain"] / a["file"]), load_waveform(runs["cal"] / b["file"])
        np.testing.assert_array_equal(wa.codes, wb.codes)  # same seed, same samples
        # amperes = nominal amperes / gain - offset_amps, on the current row only
        assert wb.gain[0] == wa.gain[0] / 2.0
        assert np.isclose(wb.offset[0], wa.offset[0] / 2.0 - 0.5, rtol=0, atol=1e-12)
        assert wb.gain[1] == wa.gain[1] and wb.offset[1] == wa.offset[1]
    man = json.loads((runs["cal"] / "manifest.json").read_text())
    items = {r["item"]: r for r in man["calibration"]}
    assert items["current"]["gain"] == 2.0 and items["current"]["due"] == FUTURE
    assert items["voltage"]["ratio"] == 1000 and items["deskew"]["voltage_s"] == 2.5e-9
    assert man["operator"]["name"] == "A. Tester"
    assert (
        "A. Tester" in man["operator"]["sign_off"]
        and "calibration in date" in man["operator"]["sign_off"]
    )
    html = (runs["cal"] / "report.html").read_text(encoding="utf-8")
    assert "Calibration and sign-off" in html
    assert '<table class="calibration">' in html
    assert "demo cert 7" in html and FUTURE in html and "2.5e-09" in html
