"""The whole discharge on the simulated bench, from its ground truth (the meters' netlists).

Reference: conservation of charge (textbook): every capacitor the mode connects to the input
by a DC path discharges through the short, so the charge through the sense is V_in x the sum
of those capacitances (V_in the input voltage at the discharge, measured on the divider
channel; the divider itself is checked against closed forms in test_sim_instruments.py).
Capacitors whose far end the mode leaves floating keep their charge and are left out.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from drivers.sim.netlist import load_netlist
from rig.analysis.analyze import compute_metrics
from rig.cli import main

ROOT = Path(__file__).resolve().parents[2]
BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"
QUALIFICATION = ROOT / "sequences" / "qualification.toml"
SLOW_METER = ROOT / "tests" / "meters" / "slow-tail.toml"


def mode_farads(path: Path, mode: str) -> float:
    """Sum of the capacitances whose both ends reach COM by a DC path in ``mode``."""
    net = load_netlist(path)
    closed = net.closed_switches(mode)
    parent = {n: n for n in net.nodes()}

    def find(n: str) -> str:
        while parent[n] != n:
            n = parent[n]
        return n

    for e in net.elements:
        if e.kind in "RL" or (e.kind == "S" and e.name in closed):
            parent[find(e.a)] = find(e.b)
    root = find(net.common)
    return sum(
        e.value for e in net.elements if e.kind == "C" and find(e.a) == root and find(e.b) == root
    )


def _run(tmp_path: Path, seq: Path) -> Path:
    results = tmp_path / "results"
    code = main(
        [
            "run",
            str(seq),
            "--bench",
            str(BENCH),
            "--results",
            str(results),
            "--quiet",
            "--no-report",
        ]
    )
    assert code == 0
    (run,) = [p for p in results.iterdir() if p.is_dir()]
    return run


def test_bundled_charge_capture_holds_the_whole_charge(tmp_path: Path) -> None:
    """Both demo meters, every mode, the bundled qualification's captures (fewer events)."""
    text = QUALIFICATION.read_text()
    text = text.replace("repetitions = 25", "repetitions = 4")
    seq = tmp_path / "qualification.toml"
    seq.write_text(text)
    m = compute_metrics(_run(tmp_path, seq))
    # a pulse shorter than the sample interval still triggers (analog trigger comparator)
    assert (m["status"] == "captured").all()
    m = m[m["capture"] == "charge"]
    for (meter, mode), grp in m.groupby(["meter", "mode"]):
        path = ROOT / "drivers" / "sim" / "meters" / f"demo-{meter[-1].lower()}.toml"
        farads = mode_farads(path, mode)
        ratio = float(np.median(grp["c_equiv_f"])) / farads
        tol = 0.03 if mode.startswith("DC") else 0.02  # the targets
        assert abs(ratio - 1.0) < tol, (meter, mode, ratio)
        assert (grp["charge_c"] > 0).all(), (meter, mode)  # no event of the wrong sign
        assert not grp["flag_truncated"].any(), (meter, mode)


SLOW_SEQUENCE = """
[sequence]
name = "slow tail"
repetitions = 3
[[meters]]
model = "Candidate C"
serial = "C-1"
modes = ["AC V"]
sim_model = "{meter}"
[charge]
volts = [1000]
dwell_s = 0.5
[discharge]
loads = ["short"]
[bleed]
hold_s = 0.5
[scope]
current_range_amps = 8
current_offset_amps = 2
trigger_level_amps = 0.2
trigger_slope = "POSitive"
bits = 16
[scope.captures.charge]
sample_interval_s = "200n"
points = 275000
trigger_offset_s = "-5m"
bandwidth_hz = "2M"
sampling = "mean"
"""


def test_a_tail_longer_than_the_capture_is_warned_and_flagged(tmp_path: Path, capsys) -> None:
    """A 60 ms coupling time constant against the old 55 ms record (50 ms after the trigger):
    `rig check` names the capture and the record it needs, and every event is flagged
    truncated; the whole-discharge charge still lands near the stored charge, while the
    record alone is about exp(-50/60) = 43 % short."""
    seq = tmp_path / "slow.toml"
    seq.write_text(SLOW_SEQUENCE.format(meter=SLOW_METER.as_posix()))
    assert main(["check", str(seq), "--bench", str(BENCH)]) == 0
    out = capsys.readouterr().out
    assert "WARN" in out and "slowest discharge time constant 60" in out, out
    assert "capture 'charge' records 50 ms" in out and "set points >=" in out, out
    m = compute_metrics(_run(tmp_path, seq))
    assert m["flag_truncated"].all()
    farads = mode_farads(SLOW_METER, "AC V")
    q_true = m["charge_c"] / m["c_equiv_f"] * farads  # V_in x sum(C), V_in from the divider
    record_short = 1.0 - m["charge_record_c"] / q_true
    assert (record_short > 0.3).all(), record_short
    err = (m["charge_c"] - q_true).abs()
    assert (err < 3 * m["charge_u_c"] + 0.01 * q_true).all()
    assert np.median(m["charge_c"] / q_true) == pytest.approx(1.0, abs=0.05)


def test_check_refuses_a_misspelt_netlist(tmp_path: Path, capsys) -> None:
    """The netlist check `rig check` and `rig run` share: a misspelt key and a node name
    that matches nothing (GND for COM) and a node without a DC path to COM are refused with
    exit 2, naming file and key."""
    good = SLOW_METER.read_text()
    # two capacitors in series: their middle node has no DC path to COM, so its charge could
    # never be bled (a connectivity fact, no source needed)
    floating = (
        '\n[[element]]\nname = "C_f1"\nkind = "C"\nnodes = ["VIN", "f1"]\nfarads = 1e-9\n'
        '\n[[element]]\nname = "C_f2"\nkind = "C"\nnodes = ["f1", "COM"]\nfarads = 1e-9\n'
    )
    for bad, key in (
        (good.replace("farads = 100e-9", "farad = 100e-9"), "element.C_couple.farad"),
        (good.replace('nodes = ["e1", "COM"]', 'nodes = ["e1", "GND"]'), "element.R_acv.nodes"),
        (good + floating, "element.C_f1.nodes"),
    ):
        meter = tmp_path / "bad-meter.toml"
        meter.write_text(bad)
        seq = tmp_path / "slow.toml"
        seq.write_text(SLOW_SEQUENCE.format(meter=meter.as_posix()))
        for cmd in ("check", "run"):
            args = [cmd, str(seq), "--bench", str(BENCH)]
            if cmd == "run":
                args += ["--results", str(tmp_path / "r"), "--quiet"]
            assert main(args) == 2
            err = capsys.readouterr().err
            assert "bad-meter.toml" in err and key in err, err
        assert not (tmp_path / "r").exists()  # nothing was created or switched on
