"""A run interrupted on the simulated bench, analysed, resumed and analysed again: the second
analysis reads only the events the resume added, and its tables equal a full analysis of the
finished run (pandas.testing.assert_frame_equal, exact)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

import rig.analysis.batches as batches
from rig.analysis.analyze import analyze_run
from rig.planning.plan import build_plan
from rig.planning.sequence import load_sequence
from rig.runner.cycle import Runner
from rig.runner.opener import open_bench
from rig.store.runfolder import RunWriter, read_journal
from rig.store.waveform import load_waveform

from .test_runner import _exit_case, _raise, write_sequence


def test_resumed_run_analyses_only_the_new_events(tmp_path, monkeypatch):
    outcome, run, _, _, cfg = _exit_case(tmp_path, _raise(KeyboardInterrupt()))
    assert outcome.status == "interrupted"
    first = analyze_run(run)
    done = {r["file"] for r in read_journal(run) if r["file"]}
    assert first.analysed == len(done) > 0
    seq = load_sequence(
        write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=6, points=2000), cfg
    )
    plan = build_plan(seq, cfg)
    with (
        RunWriter.reopen(run) as writer,
        open_bench(cfg, first_sim_model=seq.meters[0].sim_model) as ob,
    ):
        assert Runner(ob, cfg, seq, plan, writer).run().status == "complete"
    added = {r["file"] for r in read_journal(run) if r["file"]} - done
    calls: list[str] = []
    monkeypatch.setattr(
        batches,
        "load_waveform",
        lambda p: calls.append(Path(p).relative_to(run).as_posix()) or load_waveform(p),
    )
    inc = analyze_run(run)
    assert sorted(calls) == sorted(added) and inc.reused == len(done)
    full = analyze_run(run, full=True)
    pd.testing.assert_frame_equal(inc.metrics, full.metrics, check_exact=True)
    pd.testing.assert_frame_equal(inc.groups, full.groups, check_exact=True)
