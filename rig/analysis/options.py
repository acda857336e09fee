"""Checks of the numbers a user passes as options, one function per option.

Every command (and API function) that reads one of these options calls its function here,
so ``--confidence 2`` or ``--load-ohms 0`` gets the same one-line refusal wherever it is
given: a :class:`rigbase.errors.LimitError` naming the option, the value and the range.
"""

from __future__ import annotations

import math

from rigbase.errors import LimitError

__all__ = [
    "check_charge_volts",
    "check_confidence",
    "check_coverage",
    "check_dt",
    "check_load_ohms",
    "check_shunt_ohms",
    "check_tolerance",
]


def _number(option: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise LimitError(f"{option} {value!r}: not a number")
    v = float(value)
    if not math.isfinite(v):
        raise LimitError(f"{option} {value!r}: not a finite number")
    return v


def _open_unit(option: str, value: object) -> float:
    v = _number(option, value)
    if not 0.0 < v < 1.0:
        raise LimitError(f"{option} {v:g}: must lie strictly between 0 and 1")
    return v


def _positive(option: str, value: object, unit: str) -> float:
    v = _number(option, value)
    if not v > 0.0:
        raise LimitError(f"{option} {v:g}: must be above 0 {unit}")
    return v


def check_confidence(value: object) -> float:
    """Confidence of a tolerance bound (``--confidence``): 0 < value < 1."""
    return _open_unit("--confidence", value)


def check_coverage(value: object) -> float:
    """Coverage of a tolerance bound (``--coverage``): 0 < value < 1."""
    return _open_unit("--coverage", value)


def check_tolerance(value: object) -> float:
    """Equivalence margin on a ratio of medians (``--tolerance``): 0 < value < 1."""
    return _open_unit("--tolerance", value)


def check_charge_volts(value: object) -> float:
    """Charge voltage of a measured event (``--charge-volts``), V, above 0."""
    return _positive("--charge-volts", value, "V")


def check_load_ohms(value: object) -> float:
    """Load resistance (``--load-ohms``), ohm, above 0."""
    return _positive("--load-ohms", value, "ohm")


def check_shunt_ohms(value: object) -> float | None:
    """Shunt resistance (``--shunt``), ohm, above 0; None when not given."""
    return None if value is None else _positive("--shunt", value, "ohm")


def check_dt(value: object) -> float | None:
    """Sample interval of a .npy trace (``--dt``), s, above 0; None when not given."""
    return None if value is None else _positive("--dt", value, "s")
