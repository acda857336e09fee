"""The run store's integrity rules, one test each: one writer, atomic files, journal shape,
duplicate and torn lines, failed starts. Each test plants the fault and checks the refusal."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from rig.store.atomic import atomic_write, atomic_write_text
from rig.store.lock import RunLock, RunLockedError
from rig.store.runfolder import (
    FAILED_TO_START,
    JOURNAL,
    RunWriter,
    read_journal,
    read_manifest,
    read_plan,
    verify_run,
)
from rig.store.waveform import Waveform, load_waveform
from rigbase.errors import RunFolderError

PLAN = [{"event": i, "key": f"k{i}"} for i in range(4)]


def _wave() -> Waveform:
    return Waveform(
        codes=np.zeros((1, 8), np.int8),
        gain=np.ones(1),
        offset=np.zeros(1),
        code_min=np.full(1, -128),
        code_max=np.full(1, 127),
        dt=1e-9,
        t0=0.0,
        channels=("current",),
        units=("A",),
    )


def _run(tmp_path: Path, events: int = 2) -> Path:
    w = RunWriter.create(tmp_path, "r", {"status": "created"}, PLAN)
    with w:
        for i in range(events):
            w.commit({"event": i, "key": f"k{i}"}, _wave())
    return w.path


def test_create_leaves_no_staging_folder_and_locks_while_open(tmp_path):
    w = RunWriter.create(tmp_path, "r", {"status": "created"}, PLAN)
    assert [p.name for p in tmp_path.iterdir()] == ["r"]
    with pytest.raises(RunLockedError, match=rf"pid {os.getpid()} on .*run"):
        RunWriter.reopen(w.path)
    w.close()
    RunWriter.reopen(w.path).close()  # released on close


def test_lock_of_a_killed_process_is_released_by_the_os(tmp_path):
    code = (
        "import sys,time; from rig.store.lock import RunLock; "
        f"k = RunLock({str(tmp_path)!r}, 'run').acquire(); print('held', flush=True); "
        "time.sleep(60)"
    )
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, env=env)
    try:
        assert proc.stdout.readline().strip() == b"held"
        with pytest.raises(RunLockedError, match=f"pid {proc.pid} "):
            RunLock(tmp_path).acquire()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc.stdout.close()
    for _ in range(50):  # the kernel drops the lock with the process
        try:
            RunLock(tmp_path).acquire().release()
            break
        except RunLockedError:
            time.sleep(0.05)
    else:
        pytest.fail("lock not released after SIGKILL")


def test_atomic_write_keeps_the_old_file_when_writing_fails(tmp_path):
    target = tmp_path / "t.json"
    atomic_write_text(target, "old")

    def failing(p: Path) -> None:
        p.write_text("half")
        raise OSError(28, "No space left on device")

    with pytest.raises(OSError):
        atomic_write(target, failing)
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["t.json"]  # no temporary left


def test_commit_refuses_a_duplicate_event(tmp_path):
    w = RunWriter.create(tmp_path, "r", {}, PLAN)
    with w:
        w.commit({"event": 0, "key": "k0"}, None)
        with pytest.raises(RunFolderError, match="already in the journal"):
            w.commit({"event": 0, "key": "k0"}, None)
    assert len(read_journal(w.path)) == 1


def test_verify_finds_a_duplicated_event(tmp_path):
    run = _run(tmp_path)
    with open(run / JOURNAL, "ab") as fh:
        fh.write((run / JOURNAL).read_bytes().splitlines(keepends=True)[0])
    v = verify_run(run)
    assert any("appears more than once" in p for p in v.problems)


def test_torn_last_line_is_ignored_and_dropped_on_reopen(tmp_path):
    run = _run(tmp_path)
    with open(run / JOURNAL, "ab") as fh:
        fh.write(b'{"event": 2, "key": "k2"')
    assert [r["event"] for r in read_journal(run)] == [0, 1]
    assert any("torn" in n for n in verify_run(run).notes)
    RunWriter.reopen(run).close()
    assert (run / JOURNAL).read_bytes().endswith(b"\n")


@pytest.mark.parametrize(
    ("line", "words"),
    [
        (b"[1, 2]\n", "JSON list"),
        (b'{"event": "3"}\n', "not a non-negative integer"),
        (b'{"event": 1.5}\n', "not a non-negative integer"),
        (b'{"event": true}\n', "not a non-negative integer"),
        (b'{"event": 3, "file": "../../etc/passwd"}\n', "not a waveforms/ file name"),
        (b"\xff\xfe\n", "not JSON"),
    ],
)
def test_a_malformed_journal_line_is_one_error_naming_the_line(tmp_path, line, words):
    run = _run(tmp_path)
    with open(run / JOURNAL, "ab") as fh:
        fh.write(line)
    with pytest.raises(RunFolderError, match=f"{JOURNAL}:3: .*{words}"):
        read_journal(run)
    assert not verify_run(run).ok


@pytest.mark.parametrize(
    ("name", "content", "words"),
    [
        ("manifest.json", "[1]", "expected a JSON object"),
        ("plan.json", '{"a": 1}', "expected a JSON list"),
        ("plan.json", '[{"event": 0}]', "entry 0 is not an event object"),
        ("plan.json", '[{"event": -1, "key": "k"}]', "not a non-negative integer"),
    ],
)
def test_manifest_and_plan_of_the_wrong_shape_are_refused(tmp_path, name, content, words):
    run = _run(tmp_path)
    (run / name).write_text(content)
    reader = read_manifest if name == "manifest.json" else read_plan
    with pytest.raises(RunFolderError, match=words):
        reader(run)


def test_truncated_waveform_is_a_run_folder_error(tmp_path):
    run = _run(tmp_path)
    (f,) = (run / "waveforms").glob("e000000.*")  # the store's current format
    f.write_bytes(f.read_bytes()[:40])
    with pytest.raises(RunFolderError, match="unreadable waveform"):
        load_waveform(f)
    assert any("checksum differs" in p for p in verify_run(run).problems)


def test_failed_start_is_recorded_and_verify_says_so(tmp_path):
    w = RunWriter.create(tmp_path, "r", {"status": "created"}, PLAN)
    with w:
        w.mark_failed_start("ConnectionLost: supply: cannot open")
    m = read_manifest(w.path)
    assert m["status"] == FAILED_TO_START and "cannot open" in m["error"]
    v = verify_run(w.path)
    assert v.ok and any("failed to start: ConnectionLost" in n for n in v.notes)
    assert not any("rig resume` continues" in n for n in v.notes)


def test_verify_reports_an_unreadable_metrics_table(tmp_path):
    run = _run(tmp_path)
    (run / "metrics.parquet").write_bytes(b"PAR1 truncated")
    assert any("metrics.parquet: unreadable" in p for p in verify_run(run).problems)


def test_lock_file_names_the_holder(tmp_path):
    with RunLock(tmp_path, "analyze"):
        holder = json.loads((tmp_path / ".lock").read_text())
        assert holder["pid"] == os.getpid() and holder["purpose"] == "analyze"


def test_verify_finds_a_complete_run_with_missing_events(tmp_path):
    run = _run(tmp_path, events=2)
    assert verify_run(run).ok  # interrupted: two of four, resumable
    m = read_manifest(run)
    (run / "manifest.json").write_text(json.dumps({**m, "status": "complete"}))
    v = verify_run(run)
    assert any("status complete but 2 planned events are missing" in p for p in v.problems)


@pytest.mark.parametrize("chunk", [1, 2, 7, 64, 1 << 20])
def test_the_plan_read_in_pieces_is_the_plan_json_reads(tmp_path, chunk, monkeypatch):
    # reference: the standard library's json.loads of the whole file; every cut of the file
    # into pieces (a piece of one character included) must give the same entries
    import rig.store.runfolder as rf

    run = _run(tmp_path)
    entries = [
        {"event": i, "key": f"k{i}", "volts": 1e3 * i, "note": "a, ]b\\" + '"' * (i % 3)}
        for i in range(40)
    ]
    (run / "plan.json").write_text(" \n[ " + " ,\n".join(json.dumps(e) for e in entries) + "] ")
    monkeypatch.setattr(rf, "_PLAN_CHUNK", chunk)
    assert read_plan(run) == json.loads((run / "plan.json").read_text()) == entries
    (run / "plan.json").write_text("[]")
    assert read_plan(run) == []


@pytest.mark.parametrize(
    ("content", "words"),
    [
        ('[{"event": 0, "key": "k"}', "not closed"),
        ('[{"event": 0, "key": "k"}, {"event": 1, "key": ', "not valid JSON"),
        ("", "found nothing"),
        ('[{"event": 0, "key": "k"} {"event": 1}]', "expected ',' after entry 0"),
        ('[{"event": 0, "key": "k"}, ]', "not valid JSON"),
        ('[{"event": 0, "key": "k"}, {"event": 1}]', "entry 1 is not an event object"),
    ],
)
def test_a_cut_or_broken_plan_is_one_error_naming_it(tmp_path, content, words, monkeypatch):
    import rig.store.runfolder as rf

    run = _run(tmp_path)
    (run / "plan.json").write_text(content)
    for chunk in (3, 1 << 20):
        monkeypatch.setattr(rf, "_PLAN_CHUNK", chunk)
        with pytest.raises(RunFolderError, match=words) as err:
            read_plan(run)
        assert "plan.json" in str(err.value)
