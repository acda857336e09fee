"""Numbers written with an SI prefix and a unit, as input files may give them: ``"100k"``,
``"200n"``, ``"2.2 uH"``. The unit a value may carry follows the suffix of its key's name
(``_ohms``: ohm, ``_volts``: V, ...). Prefixes and symbols as in the SI Brochure (BIPM, 9th
edition, 2019, section 3, table 7).
"""

from __future__ import annotations

import decimal
import re

__all__ = ["parse_si", "unit_suffix", "unit_word"]


_PREFIXES = {
    "f": 1e-15,
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "\u00b5": 1e-6,  # micro sign
    "\u03bc": 1e-6,  # Greek mu
    "m": 1e-3,
    "k": 1e3,
    "M": 1e6,
    "G": 1e9,
    "T": 1e12,
}
# Unit symbols a value may carry, by the suffix of its key name.
_UNITS = {
    "_s": ("s",),
    "_ohms": ("ohm", "ohms", "\u03a9", "\u2126"),
    "_volts": ("V",),
    "_amps": ("A",),
    "_hz": ("Hz",),
    "_henry": ("H",),
    "_c": ("C",),
    "_f": ("F",),
}
_UNIT_WORD = {
    "_s": "s",
    "_ohms": "ohm",
    "_volts": "V",
    "_amps": "A",
    "_hz": "Hz",
    "_henry": "H",
    "_c": "C",
    "_f": "F",
}
_NUMBER_RE = re.compile(r"^\s*([+-]?(?:\d[\d_]*(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*(.*?)\s*$")


def unit_suffix(name: str) -> str | None:
    for suffix in _UNITS:
        if name.endswith(suffix) or name == suffix[1:]:  # "volts", "ohms", "henry" too
            return suffix
    return None


def parse_si(text: str, key: str = "") -> float:
    """Parse a number written with an optional SI prefix and unit: ``"100k"`` -> 100000.0.

    Accepted: ``"1.5e3"``, ``"200n"``, ``"2.2 uH"`` (prefix f p n u m k M G T; ``u``, ``µ`` or
    ``μ`` for micro), and the unit symbol that fits ``key``'s suffix (``_ohms``: ohm or Ω,
    ``_volts``: V, ``_amps``: A, ``_s``: s, ``_hz``: Hz, ``_henry``: H). ``m`` is milli and
    ``M`` mega. Raises ValueError with a one-line reason for anything else.
    """
    match = _NUMBER_RE.match(text)
    if not match:
        raise ValueError(
            f"{text!r} is not a number: write a plain number or one with an SI prefix, "
            "e.g. 100k, 200n, 1.5e3"
        )
    mantissa = match.group(1).replace("_", "")
    number = float(mantissa)
    rest = match.group(2)
    suffix = unit_suffix(key)
    units = _UNITS.get(suffix, ()) if suffix else ()
    if rest == "" or rest in units:
        return number
    if rest[0] in _PREFIXES and (rest[1:] == "" or rest[1:].strip() in units):
        # decimal arithmetic so that "200n" is exactly the float 200e-9, as if typed so
        return float(decimal.Decimal(mantissa) * decimal.Decimal(str(_PREFIXES[rest[0]])))
    unit_hint = f" and the unit {units[0]}" if units else ""
    raise ValueError(
        f"{text!r}: unknown prefix or unit {rest!r}; use f p n u m k M G T{unit_hint}, "
        "e.g. 100k or 200n"
    )


def unit_word(name: str) -> str:
    """The unit a key called ``name`` is written in (``"charge_ohms"`` -> ``"ohm"``), or ""."""
    suffix = unit_suffix(name)
    return _UNIT_WORD.get(suffix, "") if suffix else ""
