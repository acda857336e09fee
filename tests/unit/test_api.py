"""The notebook API on synthetic run folders (built by tests.unit.test_analysis.make_run)."""

from __future__ import annotations

import numpy as np
import pytest

from rig.analysis.analyze import METRIC_COLUMNS, analyze_run
from rig.api import group_waveforms, load_event_waveform, load_run
from rigbase.errors import RunFolderError
from tests.unit.test_analysis import DT, GAIN, PRE, N, make_run


def test_load_run_journal_then_metrics(tmp_path):
    run = make_run(tmp_path, "api", rng=np.random.default_rng(1), reps=3, drop={1})
    before = load_run(run)
    assert len(before) == 6 and "peak_a" not in before
    assert list(before["status"]).count("not_captured") == 1
    analyze_run(run)
    after = load_run(run)
    assert set(METRIC_COLUMNS) <= set(after.columns) and len(after) == 6
    with pytest.raises(RunFolderError, match="no such run folder"):
        load_run(tmp_path / "missing")


def test_group_waveforms_and_one_event(tmp_path):
    run = make_run(
        tmp_path, "api2", rng=np.random.default_rng(2), reps=4, drop={1}, volts=(100.0, 200.0)
    )
    t, values, rows = group_waveforms(run, mode="ACV", volts=200.0)
    assert values.shape == (4, N) and len(rows) == 4
    assert set(rows["volts"]) == {200.0} and set(rows["mode"]) == {"ACV"}
    np.testing.assert_allclose(t, (np.arange(N) - PRE) * DT)
    # the stored codes times the gain: the peak of a 200 V, 50 ohm RC discharge is about 4 A
    # (Ohm's law; the invented events scatter by 2 %)
    assert np.allclose(values.max(axis=1), 4.0, rtol=0.1)
    # the lost event is left out
    _, v100, r100 = group_waveforms(run, mode="ACV", volts=100.0)
    assert v100.shape[0] == 3 and 1 not in set(r100["event"])
    # a list matches any of its values; no match gives empty arrays
    _, both, _ = group_waveforms(run, mode=["ACV", "ACmV"], volts=[100.0])
    assert both.shape[0] == 7
    _, none, rows0 = group_waveforms(run, mode="DCV")
    assert none.shape == (0, 0) and rows0.empty
    with pytest.raises(KeyError, match="colour"):
        group_waveforms(run, colour="red")

    wf = load_event_waveform(run, 0)
    first = rows.iloc[0]["event"]
    np.testing.assert_allclose(load_event_waveform(run, first).values("current"), values[0])
    assert wf.gain[0] == GAIN and wf.channels == ("current",)
    with pytest.raises(RunFolderError, match="event 1 has no waveform"):
        load_event_waveform(run, 1)
    with pytest.raises(RunFolderError, match="no event 999"):
        load_event_waveform(run, 999)
    with pytest.raises(RunFolderError, match="no 'voltage' channel"):
        group_waveforms(run, channel="voltage", mode="ACV")
