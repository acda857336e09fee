"""CLI safety gates that need no bench: the hazardous-live confirmation on real hardware."""

from __future__ import annotations

from types import SimpleNamespace

import pytest

from rig.cli import main
from rig.cli.running import _confirm_hv
from rigbase.errors import LimitError, SafetyError


def bench(simulated: bool, hazardous: float = 60.0):
    # 60 V d.c.: hazardous-live d.c. level of IEC 61010-1 editions before 3 (edition 3, 2010:
    # 70 V d.c.); clause 6.3.1 a) (clause number from memory)
    return SimpleNamespace(
        simulation=object() if simulated else None,
        limits=SimpleNamespace(hazardous_live_volts=hazardous),
    )


def plan(volts: float):
    return SimpleNamespace(max_volts=volts)


def test_simulated_bench_needs_no_confirmation():
    _confirm_hv(plan(1000.0), bench(simulated=True), None)


def test_real_bench_below_hazardous_live_needs_no_confirmation():
    _confirm_hv(plan(50.0), bench(simulated=False), None)


def test_real_bench_above_hazardous_live_without_terminal_refuses(monkeypatch):
    monkeypatch.setattr("sys.stdin", SimpleNamespace(isatty=lambda: False))
    with pytest.raises(SafetyError, match="--confirm-hv 1000"):
        _confirm_hv(plan(1000.0), bench(simulated=False), None)


def test_confirmation_must_match_the_highest_voltage():
    _confirm_hv(plan(1000.0), bench(simulated=False), 1000.0)
    with pytest.raises(LimitError, match="does not match"):
        _confirm_hv(plan(1000.0), bench(simulated=False), 500.0)


def test_typed_confirmation(monkeypatch):
    monkeypatch.setattr("sys.stdin", SimpleNamespace(isatty=lambda: True))
    monkeypatch.setattr("builtins.input", lambda prompt: "1000")
    _confirm_hv(plan(1000.0), bench(simulated=False), None)
    monkeypatch.setattr("builtins.input", lambda prompt: "yes")
    with pytest.raises(SafetyError, match="not given"):
        _confirm_hv(plan(1000.0), bench(simulated=False), None)


def test_measure_command_on_a_textbook_rc_discharge(tmp_path, capsys):
    """1 kV on 100 pF through 1500 ohm (the HBM network of ANSI/ESDA/JEDEC JS-001):
    Q = CV = 100 nC, tau = RC = 150 ns, C = Q / V = 100 pF (RC relations, any circuits
    textbook)."""
    import json

    import numpy as np

    t = np.arange(-200, 20000) * 1e-9
    i = np.where(t >= 0, 1000 / 1500 * np.exp(-np.clip(t, 0, None) / 150e-9), 0.0)
    path = tmp_path / "rc.csv"
    np.savetxt(path, np.c_[t, i], delimiter=",", header="time_s,current_a", comments="")
    code = main(["measure", str(path), "--charge-volts", "1000", "--load-ohms", "1500", "--json"])
    out = json.loads(capsys.readouterr().out)
    assert code == 0
    assert out["charge_c"] == pytest.approx(100e-9, rel=0.01)
    assert out["tau_s"] == pytest.approx(150e-9, rel=0.01)
    assert out["c_equiv_f"] == pytest.approx(100e-12, rel=0.01)


@pytest.mark.parametrize(("run_code", "demo_code"), [(0, 0), (1, 0), (2, 2), (3, 3), (130, 130)])
def test_demo_exit_code_follows_the_readme(monkeypatch, run_code, demo_code):
    """README, "Exit codes": the demo's failing verdicts are the demonstration (exit 0 once it
    ran); bad input, bench trouble and interruptions keep their codes."""
    import argparse

    from rig.cli import running

    monkeypatch.setattr(running, "cmd_run", lambda ns: run_code)
    assert running.cmd_demo(argparse.Namespace(results="results", quiet=True)) == demo_code
