"""Engineering-prefix formatting for SI values: ``1.2e-8 s`` -> ``"12 ns"``.

Shared by the figures (axis scaling and tick labels) and the HTML report (table cells), so a
value reads the same everywhere. Prefixes are powers of 1000 from pico to giga; the micro
sign is U+00B5 (``ascii=True`` gives ``u`` for plain-text outputs).
"""

from __future__ import annotations

import math

__all__ = [
    "axis_label",
    "eng",
    "eng_scale",
    "metric_label",
    "metric_unit",
    "prefix_for",
]

_PREFIXES = {-15: "f", -12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}
_MIN_EXP, _MAX_EXP = min(_PREFIXES), max(_PREFIXES)


def _exp3(x: float) -> int:
    """Power of 1000 (as an exponent of 10, a multiple of 3) that puts |x| in [1, 1000)."""
    e = int(math.floor(math.log10(abs(x)) / 3.0) * 3)
    return max(_MIN_EXP, min(_MAX_EXP, e))


def prefix_for(exp10: int, ascii: bool = False) -> str:
    """The prefix symbol of ``10**exp10`` (a multiple of 3 in [-15, 9])."""
    p = _PREFIXES[exp10]
    return "u" if ascii and p == "µ" else p


def eng(value: float | None, unit: str = "", digits: int = 3, ascii: bool = False) -> str:
    """``value`` with an engineering prefix and ``digits`` significant digits.

    ``eng(1.2e-8, "s")`` -> ``"12 ns"``; ``eng(0.0, "A")`` -> ``"0 A"``; ``eng(nan)`` -> ``"–"``.
    Trailing zeros are dropped; a rounded mantissa that reaches 1000 moves up one prefix.
    Without a unit (counts, ratios) the number is written plainly: ``eng(0.707)`` -> ``"0.707"``.
    """
    if value is None:
        return "–"
    try:
        x = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(x):
        return "–"
    if math.isinf(x):
        return f"{'-' if x < 0 else ''}∞ {unit}".strip()
    if x == 0.0:
        return f"0 {unit}".strip()
    if not unit:  # counts and ratios: a prefix alone ("707 m") would read as a unit
        return f"{x:.{digits}g}"
    e = _exp3(x)
    mant = float(f"{x / 10.0**e:.{digits}g}")
    if abs(mant) >= 1000.0 and e < _MAX_EXP:
        e += 3
        mant = float(f"{x / 10.0**e:.{digits}g}")
    text = f"{mant:.{digits}g}"
    if "e" in text:  # beyond the prefix table: fall back to plain scientific notation
        return f"{x:.{digits}g} {unit}".strip()
    return f"{text} {prefix_for(e, ascii)}{unit}".strip()


def eng_scale(max_abs: float, ascii: bool = False) -> tuple[float, str]:
    """(factor, prefix) to display data whose largest magnitude is ``max_abs``.

    Multiply the data by ``factor`` and put ``prefix + unit`` on the axis: for
    ``max_abs = 0.012`` this is ``(1000.0, "m")``. Zero or non-finite input gives ``(1.0, "")``.
    """
    if not max_abs or not math.isfinite(max_abs):
        return 1.0, ""
    e = _exp3(max_abs)
    return 10.0 ** (-e), prefix_for(e, ascii)


def axis_label(quantity: str, unit: str, prefix: str = "") -> str:
    """Axis label with its unit, e.g. ``axis_label("Current", "A", "m")`` -> ``"Current (mA)"``."""
    return f"{quantity} ({prefix}{unit})" if unit else quantity


# Metric columns of metrics.parquet / groups.csv: readable name and SI unit (DEVELOPERS.md,
# "Analysis outputs"). Unknown metrics fall back to the unit suffix of the column name.
_METRICS: dict[str, tuple[str, str]] = {
    "peak_a": ("peak current", "A"),
    "abs_peak_a": ("|peak current|", "A"),
    "t_peak_s": ("time of peak", "s"),
    "rise_s": ("rise time 10-90 %", "s"),
    "decay_s": ("decay time (peak to 36.8 %)", "s"),
    "tau_s": ("tail time constant", "s"),
    "fwhm_s": ("pulse width (FWHM)", "s"),
    "charge_c": ("charge", "C"),
    "energy_j": ("energy into load", "J"),
    "pulses": ("pulses (bounce)", ""),
    "c_equiv_f": ("equivalent capacitance", "F"),
    "r_equiv_ohm": ("equivalent resistance", "Ω"),
    "baseline_a": ("baseline", "A"),
    "noise_a": ("noise (rms)", "A"),
    "ind_hbm_volts": ("HBM-equivalent voltage", "V"),
    "ind_hbm_charge_c": ("HBM-equivalent charge", "C"),
    "ind_hbm_energy_j": ("HBM-equivalent energy", "J"),
    "ind_iec61010_charge_ratio": ("charge / 45 µC (IEC 61010-1)", ""),
}
_SUFFIX_UNITS = {"_a": "A", "_s": "s", "_c": "C", "_j": "J", "_f": "F", "_ohm": "Ω", "_volts": "V"}


def metric_unit(metric: str) -> str:
    """SI unit of a metric column name (``""`` for counts and ratios)."""
    if metric in _METRICS:
        return _METRICS[metric][1]
    for suffix, unit in _SUFFIX_UNITS.items():
        if metric.endswith(suffix):
            return unit
    return ""


def metric_label(metric: str) -> str:
    """Readable name of a metric column (the column name itself when unknown)."""
    return _METRICS.get(metric, (metric, ""))[0]
