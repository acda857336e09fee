"""Bad input gets one line and exit 2, never a traceback: limits decided once for check and run,
option checks, damaged run-folder files, and a hypothesis search over all of them."""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rig.cli import main
from rig.planning.limits import LIMITS, checked_plan, plan_size
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rig.store.runfolder import RunWriter
from rigbase.errors import FileFormatError
from tests.integration.test_runner import BENCH, write_sequence


def _cli(capsys, *argv: str) -> tuple[int, str]:
    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out + out.err


def _one_line_refusal(code: int, text: str, *words: str) -> None:
    assert code == 2, text
    errors = [ln for ln in text.splitlines() if ln.startswith("rig: error")]
    assert len(errors) == 1, text
    assert "Traceback" not in text
    for w in words:
        assert w in errors[0], errors[0]


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ("repetitions = 2", "repetitions = 100000000000", "sequence.repetitions"),
        ("hold_s = 0.05", "hold_s = 1e30", "bleed.hold_s"),
        ("dwell_s = 1.0", "dwell_s = 1e9", "charge.dwell_s"),
        ("points = 2000", "points = 20000000", "scope.points"),
        ("points = 2000", "points = 999", "scope.points"),
        ("delays_s = [0.0]", "delays_s = [0.0, 1e12]", "discharge.delays_s"),
    ],
)
def test_check_refuses_exactly_what_run_refuses(tmp_path, capsys, old, new, key):
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=2, points=2000)
    text = seq.read_text().replace("trigger_offset_s = -1e-6", "trigger_offset_s = -1e-7")
    assert old in text
    seq.write_text(text.replace(old, new))
    t0 = time.perf_counter()
    code_c, out_c = _cli(capsys, "check", str(seq), "--bench", str(BENCH))
    assert time.perf_counter() - t0 < 30  # nothing is built before the size is known
    _one_line_refusal(code_c, out_c, key)
    results = tmp_path / "results"
    code_r, out_r = _cli(
        capsys, "run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet"
    )
    _one_line_refusal(code_r, out_r, key)
    err = lambda s: next(ln for ln in s.splitlines() if ln.startswith("rig: error"))  # noqa: E731
    assert err(out_c) == err(out_r)  # one function decides for both
    assert not results.exists() or not any(results.iterdir())  # the bench was never opened


def test_plan_size_is_computed_without_building_the_plan(tmp_path):
    seq_path = write_sequence(tmp_path, modes=("AC V", "DC V"), volts=(100, 200), reps=7)
    bench = load_bench(BENCH)
    seq = load_sequence(seq_path, bench)
    assert plan_size(seq) == len(checked_plan(seq, bench).events) == 2 * 2 * 7
    seq_path.write_text(seq_path.read_text().replace("repetitions = 7", "repetitions = 25001"))
    seq = load_sequence(seq_path, bench)
    assert plan_size(seq) == 100_004 > LIMITS["events"]
    with pytest.raises(FileFormatError, match="100,004 events"):
        checked_plan(seq, bench)


@pytest.mark.parametrize(
    ("argv", "option"),
    [
        (["analyze", "RUN", "--confidence", "2"], "--confidence"),
        (["analyze", "RUN", "--coverage", "nan"], "--coverage"),
        (["analyze", "RUN", "--confidence", "0"], "--confidence"),
        (["compare", "RUN", "--baseline", "RUN", "--tolerance", "-1"], "--tolerance"),
        (["compare", "RUN", "--baseline", "RUN", "--tolerance", "inf"], "--tolerance"),
        (["measure", "TRACE", "--charge-volts", "nan", "--load-ohms", "1"], "--charge-volts"),
        (["measure", "TRACE", "--charge-volts", "100", "--load-ohms", "0"], "--load-ohms"),
        (
            ["measure", "NPY", "--charge-volts", "100", "--load-ohms", "1", "--dt", "inf"],
            "--dt",
        ),
        (
            ["measure", "TRACE", "--charge-volts", "1", "--load-ohms", "1", "--shunt", "-2"],
            "--shunt",
        ),
    ],
)
def test_bad_options_are_refused_in_one_line(tmp_path, capsys, argv, option):
    run = tmp_path / "run"
    RunWriter.create(tmp_path, "run", {"status": "complete"}, [{"event": 0, "key": "k"}]).close()
    trace = tmp_path / "t.csv"
    trace.write_text("time,current\n0,0\n1e-9,1\n2e-9,0.5\n3e-9,0.2\n4e-9,0.1\n")
    npy = tmp_path / "t.npy"
    np.save(npy, np.linspace(0, 1, 32))
    subs = {"RUN": str(run), "TRACE": str(trace), "NPY": str(npy)}
    before = sorted(p.name for p in run.iterdir())
    code, text = _cli(capsys, *[subs.get(a, a) for a in argv])
    _one_line_refusal(code, text, option)
    assert sorted(p.name for p in run.iterdir()) == before  # nothing overwritten


def _measure_file(tmp_path: Path, name: str, data: bytes) -> Path:
    p = tmp_path / name
    p.write_bytes(data)
    return p


@pytest.mark.parametrize(
    ("name", "data", "words"),
    [
        ("t.csv", b"time,current\n0,\xff\xfe\n", "not UTF-8"),
        ("t.csv", b"", "empty file"),
        ("t.csv", b"time,current\n0,1\n1,nan\n2,0\n3,0\n", "NaN"),
        ("t.npy", None, "NaN or infinite"),
        ("t.npy", b"\x93NUMPY\x01\x00trunc", "not a plain NumPy array"),
    ],
)
def test_measure_refuses_bad_traces(tmp_path, capsys, name, data, words):
    if data is None:
        p = tmp_path / name
        np.save(p, np.array([0.0, np.nan, 1.0, 2.0]))
    else:
        p = _measure_file(tmp_path, name, data)
    args = ["measure", str(p), "--charge-volts", "100", "--load-ohms", "1", "--dt", "1e-9"]
    code, text = _cli(capsys, *args)
    _one_line_refusal(code, text, str(p), words)


def test_bom_is_named(tmp_path, capsys):
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=1)
    seq.write_bytes(b"\xef\xbb\xbf" + seq.read_bytes())
    code, text = _cli(capsys, "check", str(seq), "--bench", str(BENCH))
    _one_line_refusal(code, text, "byte-order mark", str(seq))


def test_sim_model_outside_meters_folder_is_reported_against_the_sequence_key(tmp_path, capsys):
    bad = tmp_path / "elsewhere.toml"
    bad.write_text("not = [valid")
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=1)
    seq.write_text(seq.read_text().replace('sim_model = "demo-a"', f'sim_model = "{bad}"'))
    code, text = _cli(capsys, "check", str(seq), "--bench", str(BENCH))
    _one_line_refusal(code, text, f"{seq}:", "sim_model", str(bad))


# --------------------------------------------------------------------------------------------
# hypothesis: damaged files anywhere, never a traceback


def _damage(data: bytes, cut: int, junk: bytes, mode: int) -> bytes:
    """Truncate, splice junk into, or replace a file's bytes."""
    cut = cut % (len(data) + 1)
    if mode == 0:
        return data[:cut]
    if mode == 1:
        return data[:cut] + junk + data[cut:]
    return junk


_RUN_FILES = ("journal.jsonl", "manifest.json", "plan.json", "metrics.parquet", "groups.csv")


@pytest.fixture(scope="module")
def analysed_run(tmp_path_factory) -> Path:
    """A small run with its analysis, made once (real waveforms, no instrument)."""
    from tests.report_fixtures import build_run

    base = tmp_path_factory.mktemp("runs")
    return build_run(base, np.random.default_rng(5), reps=3, delays=(), volts=(300.0,))


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    target=st.sampled_from(_RUN_FILES + ("bench", "sequence", "trace")),
    cut=st.integers(0, 10_000),
    junk=st.binary(max_size=40)
    | st.sampled_from([b"[1,2]\n", b'{"event": "x"}\n', b"\xef\xbb\xbf", b"\x00\xff"]),
    mode=st.integers(0, 2),
)
def test_no_traceback_ever_reaches_the_user(
    tmp_path, capsys, analysed_run, target, cut, junk, mode
):
    work = tmp_path / f"w{abs(hash((target, cut, junk, mode)))}"
    run = work / "run"
    shutil.copytree(analysed_run, run)
    if target in _RUN_FILES:
        f = run / target
        f.write_bytes(_damage(f.read_bytes() if f.exists() else b"", cut, junk, mode))
        # the commands that read the damaged file (the report is slow: only for its tables)
        reader = "report" if target in ("metrics.parquet", "groups.csv") else "analyze"
        commands = [["verify", str(run)], [reader, str(run)]]
    elif target == "trace":
        f = work / "t.csv"
        f.write_bytes(_damage(b"time,current\n0,0\n1e-9,1\n2e-9,0.5\n3e-9,0\n", cut, junk, mode))
        commands = [["measure", str(f), "--charge-volts", "10", "--load-ohms", "1"]]
    else:
        seq = write_sequence(work, modes=("AC V",), volts=(500,), reps=1)
        bench = work / "bench.toml"
        bench.write_bytes(BENCH.read_bytes())
        f = seq if target == "sequence" else bench
        f.write_bytes(_damage(f.read_bytes(), cut, junk, mode))
        commands = [["check", str(seq), "--bench", str(bench)]]
    for argv in commands:
        code, text = _cli(capsys, *argv)
        assert "Traceback" not in text, (argv, text)
        assert code in (0, 1, 2, 3), (argv, code, text)
        errors = [ln for ln in text.splitlines() if ln.startswith("rig: ")]
        assert len(errors) <= 1, text
        if code == 2:
            assert errors and ("internal error" not in errors[0]), text
            assert str(f.name) in errors[0] or str(run) in errors[0] or "--" in errors[0], text


def test_the_run_fixture_is_complete(analysed_run):
    m = json.loads((analysed_run / "manifest.json").read_text())
    assert m["status"] == "complete"
    assert (analysed_run / "metrics.parquet").exists()
