"""Shared text and helpers of the input-file tests (test_files.py, test_sequence_files.py):
the demo bench, a small netlist and sequence, and the one-error checks.

Each malformed case checks that the one FileFormatError names the file, the dotted key, the
problem and the line where that key stands (the line is found here independently, by
searching the written text for the edited line).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rigbase.errors import FileFormatError

ROOT = Path(__file__).resolve().parents[1]
SEQUENCES = ROOT / "sequences"
SIM_BENCH = SEQUENCES / "benches" / "sim-demo.toml"
LAB_BENCH = SEQUENCES / "benches" / "lab-template.toml"

NETLIST = """
[meter]
format = 1
model = "Unit-test meter"
modes = ["AC V", "AC mV", "DC V"]
input = "VIN"
common = "COM"

[[element]]
name = "C_in"
kind = "C"
nodes = ["VIN", "COM"]
farads = 1e-6
"""

SEQUENCE = """\
[sequence]
name = "unit test"
repetitions = 3
order = "grouped"

[[meters]]
model = "Meter X"
serial = "X-1"
modes = ["AC V", "DC V"]
sim_model = "net.toml"

[[meters]]
model = "Meter Y"
serial = "Y-1"
modes = ["AC V"]
sim_model = "net.toml"

[charge]
volts = [500, 1000]
dwell_s = 0.5

[discharge]
loads = ["short", "500R"]
delays_s = [0, 0.1]

[bleed]
hold_s = 0.2

[scope]
sample_interval_s = "1n"
points = 20000
trigger_offset_s = "-2u"

[[limits]]
metric = "abs_peak_a"
max = 15
"""


def edit(text: str, old: str, new: str) -> str:
    """Replace ``old`` (which must occur exactly once) by ``new``."""
    assert text.count(old) == 1, f"{old!r} occurs {text.count(old)} times"
    return text.replace(old, new)


def line_of(text: str, needle: str) -> int:
    """1-based line of the only non-comment line containing ``needle``."""
    hits = [
        i
        for i, line in enumerate(text.splitlines(), 1)
        if needle in line and not line.lstrip().startswith("#")
    ]
    assert len(hits) == 1, f"{needle!r} on lines {hits}"
    return hits[0]


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def bench_error(tmp_path: Path, text: str) -> FileFormatError:
    path = write(tmp_path, "bench.toml", text)
    with pytest.raises(FileFormatError) as info:
        load_bench(path)
    err = info.value
    assert err.path == str(path)
    assert str(path) in str(err) and err.problem in str(err)
    return err


def seq_error(tmp_path: Path, text: str, bench) -> FileFormatError:
    write(tmp_path, "net.toml", NETLIST)
    path = write(tmp_path, "seq.toml", text)
    with pytest.raises(FileFormatError) as info:
        load_sequence(path, bench)
    err = info.value
    assert err.path == str(path)
    assert str(path) in str(err) and err.problem in str(err)
    if err.key:
        assert f"[{err.key}]" in str(err)
    return err
