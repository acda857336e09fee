"""Failed starts are recorded and verify says so; resume with a corrected bench file."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from rig.cli import main
from rig.store.runfolder import read_journal, read_manifest, verify_run

from .test_runner import BENCH, write_sequence


def _runs(results: Path) -> list[Path]:
    return [p for p in results.iterdir() if p.is_dir()]


def test_closed_port_is_a_failed_start(tmp_path, capsys):
    text = BENCH.read_text().replace(
        'resource = "sim"', 'resource = "TCPIP0::127.0.0.1::9::SOCKET"'
    )
    bench = tmp_path / "bench.toml"
    bench.write_text(text[: text.index("[simulation]")])
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=2, points=2000)
    seq.write_text(seq.read_text().replace('sim_model = "demo-a"\n', ""))
    results = tmp_path / "results"
    args = ["run", str(seq), "--bench", str(bench), "--results", str(results), "--quiet"]
    assert main([*args, "--confirm-hv", "500", "--operator", "Test operator"]) == 3
    (run,) = _runs(results)
    m = read_manifest(run)
    assert m["status"] == "failed to start"
    assert "supply: cannot open TCPIP0::127.0.0.1::9::SOCKET" in m["error"]
    capsys.readouterr()
    assert main(["verify", str(run)]) == 1
    out = capsys.readouterr().out
    assert "failed to start: ConnectionLost: supply" in out and "incomplete; resumable" not in out


def test_signal_before_the_bench_opened_is_a_failed_start(tmp_path, monkeypatch):
    import rig.runner.opener as opener

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(opener, "open_bench", interrupted)
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=2, points=2000)
    results = tmp_path / "results"
    code = main(["run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet"])
    assert code == 130
    (run,) = _runs(results)
    m = read_manifest(run)
    assert m["status"] == "failed to start" and "before the bench opened" in m["error"]


def _faulty_run(tmp_path: Path) -> tuple[Path, Path]:
    faulty = tmp_path / "faulty.toml"
    text = BENCH.read_text().replace(
        "[simulation.faults]", "[simulation.faults]\nscpi_error_every = 60", 1
    )
    faulty.write_text(text)
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=8, points=2000)
    results = tmp_path / "results"
    args = ["run", str(seq), "--bench", str(faulty), "--results", str(results), "--quiet"]
    assert main([*args, "--no-report"]) == 3
    (run,) = _runs(results)
    assert 0 < len(read_journal(run)) < 8
    return run, faulty


def test_resume_with_a_corrected_bench_file(tmp_path, capsys):
    run, faulty = _faulty_run(tmp_path)
    assert main(["resume", str(run), "--bench", str(BENCH), "--no-report", "--quiet"]) == 0
    assert sorted(r["event"] for r in read_journal(run)) == list(range(8))
    assert verify_run(run).ok
    assert (run / "bench.original.toml").read_text() == faulty.read_text()
    assert (run / "bench.toml").read_text() == BENCH.read_text()
    assert json.loads((run / "manifest.json").read_text())["bench_file"] == str(BENCH)


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [('charge_ohms = "100k"', 'charge_ohms = "200k"', "parts.charge_ohms"),
     ("max_volts = 1100", "max_volts = 1000", "limits.max_volts")],
)  # fmt: skip
def test_resume_refuses_a_bench_that_changes_the_measurement(tmp_path, capsys, old, new, key):
    run, faulty = _faulty_run(tmp_path)
    changed = tmp_path / "changed.toml"
    changed.write_text(BENCH.read_text().replace(old, new))
    before = (run / "journal.jsonl").read_bytes()
    capsys.readouterr()
    assert main(["resume", str(run), "--bench", str(changed), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert key in err and str(changed) in err and "changes the measurement" in err, err
    assert (run / "journal.jsonl").read_bytes() == before
    assert (run / "bench.toml").read_text() == faulty.read_text()


def test_scope_that_never_triggers_exits_3_naming_the_group_and_reports_cleanly(tmp_path, capsys):
    bench = tmp_path / "never.toml"
    bench.write_text(
        BENCH.read_text().replace("scope_never_triggers = false", "scope_never_triggers = true")
    )
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=3, points=2000)
    results = tmp_path / "results"
    args = ["run", str(seq), "--bench", str(bench), "--results", str(results), "--quiet"]
    assert main(args) == 3
    out = capsys.readouterr().out
    assert "no event captured in group(s): T-0001/AC V/main/500.0/short/0.0" in out
    (run,) = _runs(results)
    assert read_manifest(run)["groups_without_capture"] == ["T-0001/AC V/main/500.0/short/0.0"]
    assert main(["report", str(run)]) == 0  # warnings are errors in the tests: none leaks
