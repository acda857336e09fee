"""`rig bringup` against simulated instruments whose profile is deliberately wrong.

The simulated instrument speaks a shipped dialect (``[simulation.dialects]``) while the bench
names an edited copy of its profile, as when a user writes a profile for a new instrument.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from drivers.profile import PROFILE_DIR, Profile
from rig.cli import main

from ..dialect_support import dialect_bench


def _copy(tmp_path: Path, name: str, old: str, new: str) -> Path:
    text = (PROFILE_DIR / f"{name}.toml").read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / f"my-{name}.toml"
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    return path


def _bringup(capsys, bench: Path, role: str, out: Path) -> tuple[int, str]:
    rc = main(["bringup", str(bench), "--role", role, "--write", str(out)])
    return rc, capsys.readouterr().out


def test_wrong_command_is_named_with_the_instruments_error(tmp_path, capsys) -> None:
    wrong = _copy(tmp_path, "scope-b", "TIMebase:LENGth {points:d}", "TIMebase:POINts {points:d}")
    bench = dialect_bench(
        tmp_path, "b", scope=str(wrong), extra='[simulation.dialects]\nscope = "scope-b"\n'
    )
    rc, out = _bringup(capsys, bench, "scope", tmp_path)
    assert rc == 1
    fails = [line for line in out.splitlines() if line.strip().startswith("FAIL")]
    assert len(fails) == 1, out
    assert "[scope] set_points" in fails[0] and "'TIMebase:POINts 1000'" in fails[0]
    assert "-113" in fails[0]  # SCPI-1999 -113 Undefined header, from the instrument's queue
    last = out.strip().splitlines()[-1]
    assert last.startswith("first thing to fix: scope: my-scope-b.toml [scope] set_points")
    assert "TIMebase:POINts 1000" in last and "-113" in last
    # the steps before it matched, each with what was sent
    assert "ok   [scope] set_sample_interval" in out and "'TIMebase:STEP 1e-06'" in out


def test_wrong_termination_is_found_and_written_into_a_proposed_profile(tmp_path, capsys):
    wrong = _copy(tmp_path, "relay-line", 'write_termination = "\\r"', 'write_termination = "\\n"')
    bench = dialect_bench(
        tmp_path, "b", switch=str(wrong), extra='[simulation.dialects]\nswitch = "relay-line"\n'
    )
    rc, out = _bringup(capsys, bench, "switch", tmp_path / "proposed")
    assert rc == 1
    assert re.search(r"'ASK 1' with write termination LF, 19200 baud: no answer", out), out
    assert re.search(r"'ASK 1' with write termination CR LF, 19200 baud: 'O\\r\\n'", out), out
    assert "[link] write_termination: the instrument answers to CR LF, not LF" in out
    proposed = tmp_path / "proposed" / "my-relay-line.proposed.toml"
    assert f"proposed profile with the finding: {proposed}" in out
    assert Profile.load(proposed).dialect.link.write_termination == "\r\n"
    # the proposal works: bring-up with it matches every step (each relay alone, read back)
    fixed = dialect_bench(
        tmp_path,
        "fixed",
        switch=str(proposed),
        extra='[simulation.dialects]\nswitch = "relay-line"\n',
    )
    rc, out = _bringup(capsys, fixed, "switch", tmp_path / "again")
    assert rc == 0, out
    assert out.count("ok   get_closed") == 10  # 5 bench relays x (closed, open)
    assert "FAIL" not in out


def test_instrument_that_answers_nothing_to_idn(tmp_path, capsys) -> None:
    wrong = _copy(tmp_path, "supply-c", "[common]\n", '[common]\nidentify = "*IDN?"\n')
    bench = dialect_bench(
        tmp_path, "b", supply=str(wrong), extra='[simulation.dialects]\nsupply = "supply-c"\n'
    )
    rc, out = _bringup(capsys, bench, "supply", tmp_path)
    assert rc == 1
    assert "*IDN? not answered" in out
    assert "[common] identify: the instrument answers nothing to it" in out
    proposed = Profile.load(tmp_path / "my-supply-c.proposed.toml")
    assert not proposed.has_operation("common", "identify")


@pytest.mark.parametrize("role", ["supply", "switch", "scope"])
def test_shipped_profiles_bring_up_cleanly(tmp_path, capsys, role) -> None:
    bench = dialect_bench(tmp_path, "b", supply="supply-b", switch="switch-b", scope="scope-c")
    rc, out = _bringup(capsys, bench, role, tmp_path)
    assert rc == 0, out
    assert "every step matched" in out
