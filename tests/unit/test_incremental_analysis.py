"""Incremental analysis: after a run grows (or a journal row changes), analysing only the new
or changed events gives exactly the tables a full analysis gives, reads only their files, and
a stored metrics.parquet that cannot be trusted is never reused.

The reference is the full analysis itself (``analyze_run(..., full=True)``) compared with
pandas.testing.assert_frame_equal(check_exact=True); the run folders are the invented ones of
tests/unit/test_analysis.py.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import rig.analysis.analyze as analyze
import rig.analysis.batches as batches
from rig.analysis.analyze import analyze_run, compute_metrics
from rig.analysis.incremental import DIGEST_COLUMN, metrics_options
from rig.analysis.provenance import read_options, record_options
from rig.store.waveform import load_waveform, save_waveform, sha256_file
from tests.unit.test_analysis import make_run


def _journal(run: Path) -> list[dict]:
    return [json.loads(x) for x in (run / "journal.jsonl").read_text().splitlines() if x]


def _write_journal(run: Path, rows: list[dict]) -> None:
    (run / "journal.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))


def _count_loads(monkeypatch) -> list[Path]:
    calls: list[Path] = []
    monkeypatch.setattr(
        batches, "load_waveform", lambda p: calls.append(Path(p)) or load_waveform(p)
    )
    return calls


def _assert_same(a, b) -> None:
    pd.testing.assert_frame_equal(a.metrics, b.metrics, check_exact=True)
    pd.testing.assert_frame_equal(a.groups, b.groups, check_exact=True)


def test_extended_run_with_a_retaken_event_equals_a_full_analysis(tmp_path, monkeypatch):
    run = make_run(tmp_path, "grow", rng=np.random.default_rng(31), reps=12, drop={5})
    rows = _journal(run)
    _write_journal(run, rows[:9])  # the run was interrupted after 9 events
    first = analyze_run(run)
    assert first.analysed == 8 and first.reused == 0  # event 5 was not captured
    # resumed: the rest of the events, and event 2 retaken with another waveform (its last
    # journal row wins), event 4 journalled again with another measured voltage
    wf = load_waveform(run / rows[2]["file"])
    wf = dataclasses.replace(wf, codes=np.round(wf.codes * 0.9).astype(wf.codes.dtype))
    rel = "waveforms/e000002-retake.npz"
    retake = {**rows[2], "file": rel, "sha256": save_waveform(run / rel, wf)}
    changed = {**rows[4], "charged_volts": 90.0}
    _write_journal(run, [*rows, retake, changed])
    calls = _count_loads(monkeypatch)
    inc = analyze_run(run)
    new = {r["file"] for r in rows[9:] if r["file"]} | {rel, rows[4]["file"]}
    assert sorted(str(p.relative_to(run)) for p in calls) == sorted(new)
    assert inc.analysed == len(new) and inc.reused == 6  # events 0, 1, 3, 6, 7, 8
    calls.clear()
    full = analyze_run(run, full=True)
    assert len(calls) == inc.analysed + inc.reused  # --full reads every captured event
    _assert_same(inc, full)
    # the retaken event's numbers are the new waveform's (the charge 10 % lower) and the
    # changed voltage reached c_equiv: reused rows would have kept the old ones
    old = first.metrics.set_index("event")
    m = inc.metrics.set_index("event")
    assert m.at[2, "charge_c"] == pytest.approx(0.9 * old.at[2, "charge_c"], rel=0.02)
    assert m.at[4, "c_equiv_f"] == pytest.approx(old.at[4, "c_equiv_f"] * 100.0 / 90.0)
    # and what is on disk is what was returned
    pd.testing.assert_frame_equal(pd.read_parquet(full.metrics_path), full.metrics)


def test_a_second_analysis_of_an_unchanged_run_reads_no_waveform(tmp_path, monkeypatch):
    run = make_run(tmp_path, "same", rng=np.random.default_rng(32), reps=5)
    before = analyze_run(run)
    files = {p.name: p.read_bytes() for p in run.iterdir() if p.is_file()}
    calls = _count_loads(monkeypatch)
    again = analyze_run(run)  # nothing changed: the stored tables, nothing rewritten
    assert calls == [] and again.analysed == 0 and again.reused == 10
    assert {p.name: p.read_bytes() for p in run.iterdir() if p.is_file()} == files
    pd.testing.assert_frame_equal(again.metrics, before.metrics, check_exact=True)
    pd.testing.assert_frame_equal(again.groups, pd.read_csv(run / "groups.csv"))
    # other options of the group statistics: the metrics are kept, the groups recomputed
    other = analyze_run(run, confidence=0.9)
    assert calls == [] and other.analysed == 0
    assert (other.groups["utl_confidence"] == 0.9).all()
    pd.testing.assert_frame_equal(
        other.groups, analyze_run(run, confidence=0.9, full=True).groups, check_exact=True
    )
    calls.clear()
    # other statistics code than recorded beside groups.csv: the groups are made again
    side = json.loads((run / "groups.csv.options.json").read_text())
    side["options"]["stats_code"] = "0" * 64
    (run / "groups.csv.options.json").write_text(json.dumps(side))
    (run / "groups.csv").write_text("meter,mode,volts,metric,median,verdict\n")
    assert analyze_run(run, confidence=0.9).analysed == 0 and calls == []
    assert len(pd.read_csv(run / "groups.csv")) == len(other.groups)
    # metrics code or options other than the recorded ones: every event again
    side = json.loads((run / "metrics.parquet.options.json").read_text())
    side["options"]["metric_code"] = "0" * 64
    (run / "metrics.parquet.options.json").write_text(json.dumps(side))
    assert analyze_run(run).analysed == 10 and len(calls) == 10


def test_batch_make_up_does_not_change_any_number(tmp_path):
    # incremental analysis batches the new events differently from a full one; every event
    # must come out the same alone or among others (including the float64 energy sum)
    run = make_run(tmp_path, "batches", rng=np.random.default_rng(33), reps=7)
    whole = compute_metrics(run)
    for batch, size in ((1, 1 << 30), (3, 1 << 30), (512, 10_000)):
        got = compute_metrics(run, batch=batch, batch_bytes=size)
        pd.testing.assert_frame_equal(got, whole, check_exact=True)


def _forge(run: Path, table: pd.DataFrame | bytes) -> None:
    """Replace metrics.parquet and give it a sidecar that vouches for it (the same code and
    its checksum), so that only the table's own content can reveal it."""
    path = run / "metrics.parquet"
    if isinstance(table, bytes):
        path.write_bytes(table)
    else:
        table.to_parquet(path, index=False)
    rec = read_options(path)
    opts = {**metrics_options("current"), "table_sha256": sha256_file(path)}
    record_options(path, rec.kind, opts, {"journal.jsonl": run / "journal.jsonl"})


@pytest.mark.parametrize(
    ("damage", "says"),
    [
        (lambda m: b"PAR1 not a parquet file", "unreadable"),
        (lambda m: m.drop(columns=["peak_a"]), "lacks column(s) peak_a"),
        (lambda m: m.drop(columns=[DIGEST_COLUMN]), f"lacks column(s) {DIGEST_COLUMN}"),
        (lambda m: m.assign(peak_a=m["peak_a"].astype(str)), "of another type"),
        (lambda m: pd.concat([m, m.tail(1)]), "repeated"),
        (None, "not the table its options record describes"),
    ],
    ids=["unreadable", "no-peak", "no-digest", "text-peak", "repeated-event", "edited"],
)
def test_a_table_that_cannot_be_trusted_is_analysed_again(
    tmp_path, monkeypatch, caplog, damage, says
):
    run = make_run(tmp_path, "bad", rng=np.random.default_rng(34), reps=4)
    good = analyze_run(run)
    if damage is None:  # edited by hand after the analysis; its sidecar no longer matches
        edited = good.metrics.assign(peak_a=good.metrics["peak_a"] * 2)
        edited.to_parquet(run / "metrics.parquet", index=False)
    else:
        _forge(run, damage(good.metrics))
    calls = _count_loads(monkeypatch)
    with caplog.at_level(logging.WARNING, logger="rig.analysis.incremental"):
        again = analyze_run(run)
    assert says in caplog.text and "analysing every event" in caplog.text
    assert len(calls) == 8 and again.analysed == 8
    _assert_same(again, good)


def test_a_table_of_another_run_reuses_nothing(tmp_path, monkeypatch):
    a = make_run(tmp_path, "a", rng=np.random.default_rng(35), reps=4)
    b = make_run(tmp_path, "b", rng=np.random.default_rng(36), reps=4)
    ref = analyze_run(b, full=True)
    analyze_run(a)
    for name in ("metrics.parquet", "metrics.parquet.options.json"):
        shutil.copy(a / name, b / name)  # copied with its own sidecar: valid, but not b's
    calls = _count_loads(monkeypatch)
    got = analyze_run(b)
    assert len(calls) == 8 and got.reused == 0
    _assert_same(got, ref)


def test_the_analyze_command_has_a_full_switch(tmp_path, capsys):
    from rig.cli import main

    run = make_run(tmp_path, "cli", rng=np.random.default_rng(37), reps=3)
    assert main(["analyze", str(run)]) == 0
    assert main(["analyze", str(run)]) == 0
    assert "analysed 0 captured events, kept 6 unchanged" in capsys.readouterr().out
    assert main(["analyze", str(run), "--full"]) == 0
    assert "analysed 6 captured events, kept 0 unchanged" in capsys.readouterr().out
    # --full is not an option of the results: the report's record of them is unchanged
    assert "full" not in read_options(run / "groups.csv").options


def test_long_records_give_the_same_metrics_alone_or_in_a_batch():
    # a float32 sum of squares over 10^5 samples differed in its last bits between a row
    # alone and the same row among others; every metric must not
    from rig.analysis.metrics import event_metrics
    from rig.store.schema import METRIC_COLUMNS

    rng = np.random.default_rng(38)
    n, pre = 100_001, 5000
    t = np.arange(n) - pre
    i = np.where(t >= 0, 60.0 * np.exp(-np.maximum(t, 0) / 3000.0), 0.0)
    codes = np.round(i * rng.uniform(0.8, 1.2, (9, 1)) + rng.normal(0, 1.5, (9, n)))
    codes = codes.astype(np.int8)
    kw = {"dt": 1e-9, "t0": -pre * 1e-9, "gain": 0.05, "load_ohms": 0.05}
    whole = event_metrics(codes, **kw)
    alone = [event_metrics(codes[k : k + 1], **kw) for k in range(len(codes))]
    assert np.isfinite(whole["energy_j"]).all()  # compared as numbers, not as NaN
    for name in METRIC_COLUMNS:
        got = np.concatenate([a[name] for a in alone])
        np.testing.assert_array_equal(got, whole[name], err_msg=name)


def test_a_journal_that_grows_during_the_analysis_is_refused(tmp_path, monkeypatch):
    # the journal table is read twice (before the waveforms, and again to be joined with the
    # results); a run that wrote meanwhile (the lock prevents it) must not mismatch the two
    run = make_run(tmp_path, "moving", rng=np.random.default_rng(35), reps=4)
    rows = _journal(run)
    _write_journal(run, rows[:-1])

    def grow(p):
        _write_journal(run, rows)
        return load_waveform(p)

    monkeypatch.setattr(batches, "load_waveform", grow)
    with pytest.raises(analyze.RunFolderError, match="changed while it was analysed"):
        compute_metrics(run)


def test_a_result_without_its_table_reads_the_one_written(tmp_path):
    run = make_run(tmp_path, "lean", rng=np.random.default_rng(36), reps=4)
    held = analyze_run(run)
    lean = analyze_run(run, full=True, table=False)  # as the commands call it
    assert lean._metrics is None
    pd.testing.assert_frame_equal(lean.metrics, held.metrics, check_exact=True)
    again = analyze_run(run, table=False)  # up to date: only the status column is read
    assert again._metrics is None and again.reused == held.analysed
    pd.testing.assert_frame_equal(again.metrics, held.metrics, check_exact=True)


def batches_in_workers_equal_batches_here(folder: str) -> None:
    """Run in a fresh interpreter (the pool forks only where no other thread runs)."""
    from rigbase.workers import WorkerPool

    assert WorkerPool(2).workers == 2  # the workers really are forked here
    run = make_run(Path(folder), "forked", rng=np.random.default_rng(37), reps=9)
    here = compute_metrics(run, batch=4, workers=1)
    forked = compute_metrics(run, batch=4, workers=2)
    pd.testing.assert_frame_equal(forked, here, check_exact=True)


@pytest.mark.skipif(
    "fork" not in __import__("multiprocessing").get_all_start_methods(), reason="no fork"
)
def test_batches_analysed_in_worker_processes_give_the_same_table(tmp_path):
    from tests.fresh import run_python

    code = (
        "import tests.unit.test_incremental_analysis as t\n"
        f"t.batches_in_workers_equal_batches_here({str(tmp_path)!r})\n"
    )
    out = run_python(code)
    assert out.returncode == 0, out.stderr[-4000:]
