"""``rig predict`` with a saved source, its bad-input exits, and the sequence's [predict] key."""

from __future__ import annotations

from pathlib import Path

import pytest

from rig.analysis.sourcenet import FosterSource
from rig.cli import main
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rigbase.errors import FileFormatError
from rigbase.loadfile import BUNDLED_LOADS
from tests.file_fixtures import NETLIST, SEQUENCE, SIM_BENCH, write


def _source(tmp_path: Path) -> Path:
    cov = [[0.0] * 5 for _ in range(5)]
    for k in range(5):
        cov[k][k] = 1e-4
    src = FosterSource(
        1000.0,
        10e-9,
        (22.0, 2.2e5),
        (4.7e-10, 1e-7),
        tuple(map(tuple, cov)),
        {"peak": 0.005, "charge": 0.01},
        {"peak": 0.005, "charge": 0.01},
    )
    path = tmp_path / "src.json"
    src.save(path)
    return path


def test_predict_from_a_saved_source(tmp_path, capsys):
    code = main(
        [
            "predict",
            "--source",
            str(_source(tmp_path)),
            "--load",
            "10",
            "--load",
            "logic-3v3.toml",
            "--samples",
            "2",
            "--wiring-henry",
            "200n",
            "--out",
            str(tmp_path),
        ]
    )
    out = capsys.readouterr().out
    assert code == 0, out
    assert "10 ohm: peak_a" in out and "3.3 V logic input: peak_a" in out
    assert (tmp_path / "figures" / "predicted-0.png").exists()


@pytest.mark.parametrize(
    ("argv", "says"),
    [
        (["predict", "--load", "10"], "give a run folder or --source"),
        (["predict", "--source", "SRC", "--load", "banana"], "banana"),
        (["predict", "--source", "SRC", "--load", "missing.toml"], "load file not found"),
    ],
)
def test_bad_input_exits_2_with_one_line(tmp_path, capsys, argv, says):
    argv = [str(_source(tmp_path)) if a == "SRC" else a for a in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert says in err and len(err.splitlines()) == 1


def test_sequence_predict_loads(tmp_path):
    sim_bench = load_bench(SIM_BENCH)
    write(tmp_path, "net.toml", NETLIST)
    text = SEQUENCE + '\n[predict]\nloads = ["short", "10", "led-string.toml"]\n'
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    assert seq.predict_loads == ("short", "10", "led-string.toml")
    assert (BUNDLED_LOADS / "led-string.toml").exists()
    bad = SEQUENCE + '\n[predict]\nloads = ["10", "nowhere.toml"]\n'
    with pytest.raises(FileFormatError, match="nowhere.toml"):
        load_sequence(write(tmp_path, "bad.toml", bad), sim_bench)
    bad = SEQUENCE + '\n[predict]\nloads = ["ten"]\n'
    with pytest.raises(FileFormatError, match=r"predict\.loads\[0\]"):
        load_sequence(write(tmp_path, "bad2.toml", bad), sim_bench)


def test_report_section_shows_predicted_beside_measured(tmp_path):
    import pandas as pd

    from rig.report.predicted import section_predicted

    assert "names no [predict] loads" in section_predicted(tmp_path, {})
    rows = [
        {
            "meter": "Candidate A",
            "serial": "S",
            "mode": "AC V",
            "volts": 1000.0,
            "delay_s": 0.0,
            "load": "10R",
            "metric": m,
            "value": v,
            "low": 0.9 * v,
            "high": 1.1 * v,
            "measured": meas,
        }
        for m, v, meas in (
            ("peak_a", 21.5, 21.4),
            ("charge_c", 9.1e-5, float("nan")),
            ("energy_j", 9e-5, 9e-5),
        )
    ]
    pd.DataFrame(rows).to_csv(tmp_path / "predicted.csv", index=False)
    html = section_predicted(tmp_path, {})
    assert "Candidate A" in html and "21.5 A" in html and "21.4 A" in html
    assert "91 µC" in html and "–" in html  # no measured charge into that load
