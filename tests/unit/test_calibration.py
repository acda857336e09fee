"""Calibration records of a bench file (rig/planning/calibration.py) and the due-date check."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from rig.planning.benchfile import read_bench_file
from rig.planning.calibration import overdue
from rig.runner.signoff import check_calibration, sign_off
from rigbase.errors import FileFormatError, LimitError

from ..dialect_support import dialect_bench

GOOD = """
[calibration.current]
gain = 0.98
offset_amps = "-20m"
calibrated = 2025-03-01
due = "2026-03-01"

[calibration.voltage]
ratio = 1002.5
calibrated = 2025-03-01
due = 2026-03-01
"""


def _read(tmp_path: Path, extra: str):
    return read_bench_file(dialect_bench(tmp_path, "b", extra=extra))


def test_records_are_read_and_the_measured_ratio_is_used(tmp_path: Path) -> None:
    bench = _read(tmp_path, GOOD)
    cal = bench.calibration
    assert cal.current_gain == 0.98 and cal.current_offset_amps == pytest.approx(-0.02)
    assert bench.divider_ratio == 1002.5  # replaces [sense.voltage] divider_ratio = 1000
    assert [r.item for r in cal.records] == ["current", "voltage"]
    assert cal.records[0].due == "2026-03-01"  # a TOML string date and a TOML date alike
    assert bench.raw["calibration"]["current_gain"] == 0.98


def test_due_dates(tmp_path: Path) -> None:
    cal = _read(tmp_path, GOOD).calibration
    assert overdue(cal, dt.date(2026, 3, 1)) == []  # due today is still in date
    assert [r.item for r in overdue(cal, dt.date(2026, 3, 2))] == ["current", "voltage"]


@pytest.mark.parametrize(
    "edit, key, words",
    [
        (('due = "2026-03-01"', 'due = "2024-03-01"'), "calibration.current.due", "before"),
        (('due = "2026-03-01"', 'due = "March"'), "calibration.current.due", "not a date"),
        (('due = "2026-03-01"\n', ""), "calibration.current.due", "give both"),
        (("gain = 0.98", "gain = -1"), "calibration.current.gain", ""),
        (("gain = 0.98", "gane = 0.98"), "calibration.current.gane", ""),
    ],
)
def test_bad_records_name_the_key(tmp_path: Path, edit, key, words) -> None:
    with pytest.raises(FileFormatError) as info:
        _read(tmp_path, GOOD.replace(*edit))
    assert f"[{key}]" in str(info.value) and words in str(info.value)


def test_past_due_refused_on_the_simulated_bench_and_without_a_terminal(tmp_path: Path) -> None:
    bench = _read(tmp_path, GOOD)
    with pytest.raises(LimitError, match=r"\[calibration.current\] due 2026-03-01 has passed"):
        check_calibration(bench, dt.date(2027, 1, 1), ask=lambda prompt: "overdue")
    assert check_calibration(bench, dt.date(2026, 1, 1), ask=None) == []


def test_real_hardware_asks_and_records_the_acceptance(tmp_path: Path) -> None:
    from dataclasses import replace

    real = replace(_read(tmp_path, GOOD), simulation=None)
    asked: list[str] = []
    accepted = check_calibration(
        real, dt.date(2027, 1, 1), ask=lambda p: asked.append(p) or "overdue"
    )
    assert accepted == ["current", "voltage"] and "Type 'overdue'" in asked[0]
    with pytest.raises(LimitError):
        check_calibration(real, dt.date(2027, 1, 1), ask=lambda p: "yes")
    with pytest.raises(LimitError, match="operator's name"):
        sign_off(real, None, None, accepted, dt.datetime(2027, 1, 1, tzinfo=dt.UTC))
    block = sign_off(real, "B. Person", None, accepted, dt.datetime(2027, 1, 1, tzinfo=dt.UTC))
    assert block["sign_off"].startswith("Started by B. Person on 2027-01-01T00:00:00+00:00")
    assert "overdue, accepted: current, voltage" in block["sign_off"]
