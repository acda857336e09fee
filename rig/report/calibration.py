"""The report's calibration section: the bench's calibration records and who ran it.

Reads the manifest's ``calibration`` rows (:mod:`rig.planning.calibration`, written by
``rig run``) and ``operator`` block; a run from before calibration records says so.
"""

from __future__ import annotations

from typing import Any

from rig.report.html import _kv, _table, esc

__all__ = ["section_calibration"]

_COLUMNS = (
    ("item", "Item"),
    ("gain", "Gain"),
    ("offset_amps", "Offset (A)"),
    ("ratio", "Divider ratio"),
    ("voltage_s", "Deskew, voltage lag (s)"),
    ("calibrated", "Calibrated"),
    ("due", "Due"),
    ("certificate", "Certificate"),
)


def _cell(value: object) -> str:
    if value is None or value == "":
        return "–"
    if isinstance(value, float):
        return esc(f"{value:.6g}")
    return esc(value)


def section_calibration(man: dict[str, Any]) -> str:
    """HTML of the calibration table and the operator's sign-off."""
    rows = man.get("calibration")
    who = man.get("operator") if isinstance(man.get("operator"), dict) else {}
    parts = []
    if who:
        parts.append(_kv([("Operator", who.get("name")), ("Sign-off", who.get("sign_off"))]))
    if not rows:
        parts.append("<p>No calibration records in the bench file of this run.</p>")
        return "".join(parts)
    body = [[_cell(r.get(k)) for k, _ in _COLUMNS] for r in rows if isinstance(r, dict)]
    parts.append(_table([h for _, h in _COLUMNS], body, "calibration"))
    parts.append(
        "<p class='n'>Gain and offset of the current sense and the divider ratio were applied "
        "to the stored scaling of every waveform; the deskew is recorded, not applied.</p>"
    )
    return "".join(parts)
