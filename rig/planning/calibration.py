"""Calibration records of a bench: the current sense, the divider probe, the deskew.

The bench file's optional ``[calibration]`` table::

    [calibration.current]        # shunt or probe on scope input 1
    gain = 1.002                 # its true transfer / its nominal one (readings are divided by it)
    offset_amps = 0.0            # its zero error, A (subtracted from every current sample)
    calibrated = 2026-03-01      # date of the calibration (TOML date or "YYYY-MM-DD")
    due = 2027-03-01             # next calibration due
    certificate = "lab cert 17"  # optional free text

    [calibration.voltage]        # HV divider probe on scope input 2
    ratio = 1003.5               # measured ratio; replaces [sense.voltage] divider_ratio
    calibrated = 2026-03-01
    due = 2027-03-01

    [calibration.deskew]
    voltage_s = 2e-9             # the voltage input lags the current input by this, s

How a run uses them (:mod:`rig.runner.cycle`): the gain and offset of the current sense and
the measured divider ratio are applied to the scaling stored with every waveform (``gain``
and ``offset`` of the ``.npz``), so analysis reads calibrated amperes and volts with no
further step. The deskew is recorded, not applied: it is stored in the manifest with the
rest, and a reader that aligns the two channels shifts the voltage samples' times by
``-voltage_s`` (no metric of the analysis uses the voltage channel's timing). A record past
its due date stops ``rig run`` before anything is switched on (:func:`overdue`).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from rigbase.tomlcheck import Table

__all__ = ["CALIBRATION_KEYS", "Calibration", "CalibrationRecord", "overdue", "read_calibration"]

CALIBRATION_KEYS = ("current", "voltage", "deskew")


@dataclass(frozen=True)
class CalibrationRecord:
    """One calibrated item: what, its correction, its dates (ISO strings)."""

    item: str  # "current" | "voltage"
    correction: dict[str, float]
    calibrated: str | None
    due: str | None
    certificate: str = ""


@dataclass(frozen=True)
class Calibration:
    """The bench's calibration records (all optional; defaults change nothing)."""

    current_gain: float = 1.0  # true / nominal transfer of the current sense
    current_offset_amps: float = 0.0  # zero error of the current sense, A
    divider_ratio: float | None = None  # measured divider ratio, replaces the nominal one
    deskew_voltage_s: float = 0.0  # voltage input lag behind the current input, s
    records: tuple[CalibrationRecord, ...] = ()

    def rows(self) -> list[dict[str, Any]]:
        """The records as plain rows for the manifest and the report."""
        out = [
            {
                "item": r.item,
                **r.correction,
                "calibrated": r.calibrated,
                "due": r.due,
                "certificate": r.certificate,
            }
            for r in self.records
        ]
        if self.deskew_voltage_s:
            out.append({"item": "deskew", "voltage_s": self.deskew_voltage_s})
        return out


def _date(t: Table, name: str) -> str | None:
    value = t.data.get(name)
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        return value.date().isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value.strip()).isoformat()
        except ValueError:
            pass
    raise t.error(name, f"{value!r} is not a date (write 2027-03-01)")


def _dates(t: Table) -> tuple[str | None, str | None]:
    cal, due = _date(t, "calibrated"), _date(t, "due")
    if cal is not None and due is not None and due < cal:
        raise t.error("due", f"due date {due} is before the calibration date {cal}")
    if (cal is None) != (due is None):
        raise t.error("due" if due is None else "calibrated", "give both calibrated and due")
    return cal, due


def read_calibration(top: Table) -> Calibration:
    """The ``[calibration]`` table of a bench file (``top`` is the file's top level)."""
    if not top.has("calibration"):
        return Calibration()
    table = top.table("calibration", CALIBRATION_KEYS)
    records: list[CalibrationRecord] = []
    gain, offset, ratio, deskew = 1.0, 0.0, None, 0.0
    if table.has("current"):
        c = table.table("current", ("gain", "offset_amps", "calibrated", "due", "certificate"))
        gain = c.number("gain", 1.0, positive=True)
        offset = c.number("offset_amps", 0.0)
        cal, due = _dates(c)
        records.append(
            CalibrationRecord(
                "current",
                {"gain": gain, "offset_amps": offset},
                cal,
                due,
                c.string("certificate", ""),
            )
        )
    if table.has("voltage"):
        v = table.table("voltage", ("ratio", "calibrated", "due", "certificate"))
        ratio = v.number("ratio", minimum=1.0)
        cal, due = _dates(v)
        records.append(
            CalibrationRecord("voltage", {"ratio": ratio}, cal, due, v.string("certificate", ""))
        )
    if table.has("deskew"):
        deskew = table.table("deskew", ("voltage_s",)).number("voltage_s", 0.0)
    return Calibration(gain, offset, ratio, deskew, tuple(records))


def overdue(cal: Calibration, today: dt.date) -> list[CalibrationRecord]:
    """The records whose due date is before ``today`` (due today is still in date)."""
    return [r for r in cal.records if r.due is not None and r.due < today.isoformat()]
