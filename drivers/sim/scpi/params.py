"""Program data of an SCPI program message: splitting into units, parsing parameters.

:func:`split_units` cuts a program message at ``;`` outside strings and channel lists, and
:func:`parse_params` turns the data after a header into :class:`Param` objects: decimal
numbers with suffixes and multipliers (``1.5K``, ``200MHZ``; ``M`` is milli, ``MA`` mega,
except ``MHZ`` megahertz and ``MOHM`` megohm), ``#H``/``#Q``/``#B`` non-decimal numbers,
``MIN``/``MAX``/``DEF``, booleans, character data, quoted strings and channel lists
``(@1,3)``, ``(@1:4)``, ``(@101:105,110)``. Each conversion a handler asks of a
:class:`Param` raises :class:`~drivers.sim.scpi.codes.CommandRejected` with the standard
error number when the data does not fit (IEEE 488.2-1992, 7.7 program data, clause number
from memory; SCPI-1999 Vol. 1 channel lists).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from drivers.sim.scpi.codes import CommandRejected
from drivers.sim.scpi.headers import parse_header_pattern, split_mnemonic
from drivers.sim.scpi.responses import format_number

__all__ = ["WHITESPACE", "Param", "parse_params", "split_units"]

# IEEE 488.2-1992, 7.4.1.2 (from memory): white space is any byte 0x00-0x09 or 0x0B-0x20
# (LF terminates the message)
WHITESPACE = "".join(chr(c) for c in [*range(0x00, 0x0A), *range(0x0B, 0x21)])

# IEEE 488.2-1992, 7.7.3 table 7-2 suffix multipliers (from memory); "M" is milli, "MA" mega.
_MULTIPLIERS = {
    "EX": 1e18,
    "PE": 1e15,
    "T": 1e12,
    "G": 1e9,
    "MA": 1e6,
    "K": 1e3,
    "": 1.0,
    "M": 1e-3,
    "U": 1e-6,
    "N": 1e-9,
    "P": 1e-12,
    "F": 1e-15,
    "A": 1e-18,
}
_NUMBER = re.compile(r"^([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE]\s*[+-]?\d+)?)\s*([A-Za-z%/]*)$")
_NONDECIMAL = re.compile(r"^#([HhQqBb])([0-9A-Fa-f]+)$")
_CHAR = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class Param:
    """One program data element. ``kind``: number, char, string or channels."""

    kind: str
    text: str
    value: float | str | tuple[int, ...] = ""
    suffix: str = ""

    # -- conversions used by handlers; each raises CommandRejected with the standard code ----

    def number(
        self,
        unit: str | None = None,
        *,
        low: float = float("-inf"),
        high: float = float("inf"),
        default: float | None = None,
        special: bool = True,
    ) -> float:
        """The value in base units; MIN/MAX/DEF give ``low``/``high``/``default``.

        Out of [low, high] -> -222; text that is not a number -> -104; bad suffix -> -131.
        """
        if self.kind == "char" and special:
            word = self.text.upper()
            if word in ("MIN", "MINIMUM") and low != float("-inf"):
                return low
            if word in ("MAX", "MAXIMUM") and high != float("inf"):
                return high
            if word in ("DEF", "DEFAULT") and default is not None:
                return default
        if self.kind != "number":
            raise CommandRejected(-104, f"number expected, got {self.text[:20]}")
        value = float(self.value) * _suffix_factor(self.suffix, unit)
        if not low <= value <= high:
            raise CommandRejected(-222, f"{format_number(value)} outside [{low:g}, {high:g}]")
        return value

    def integer(self, *, low: int, high: int, default: int | None = None) -> int:
        """An integer (488.2 rounds decimal data for integer settings)."""
        value = self.number(None, low=low, high=high, default=default)
        return int(round(value))

    def boolean(self) -> bool:
        """ON/OFF or a number (0 false, other true, after rounding per 488.2)."""
        if self.kind == "char":
            word = self.text.upper()
            if word == "ON":
                return True
            if word == "OFF":
                return False
            raise CommandRejected(-224, f"ON or OFF expected, got {self.text[:20]}")
        if self.kind == "number" and not self.suffix:
            return round(float(self.value)) != 0
        raise CommandRejected(-104, "boolean expected")

    def choice(self, *patterns: str) -> str:
        """Character data matched against mnemonic patterns, e.g. ``"POSitive"``.

        Returns the matching pattern as given; numbered patterns (``"INTernal#"``) return
        ``"INTernal<n>"``.
        """
        if self.kind != "char":
            raise CommandRejected(-104, "character data expected")
        word = self.text.upper()
        for pat in patterns:
            node = parse_header_pattern(pat)[0]
            if node.accepts(word):
                return pat.replace("#", "1")
            if node.numbered:
                alpha, number = split_mnemonic(word)
                if number is not None and node.accepts(alpha):
                    return pat.replace("#", str(number))
        raise CommandRejected(-224, f"{self.text[:20]} not one of {'|'.join(patterns)}")

    def string(self) -> str:
        """Quoted string data (character data is accepted too)."""
        if self.kind in ("string", "char"):
            return str(self.value)
        raise CommandRejected(-104, "string expected")

    def channels(self) -> tuple[int, ...]:
        """A channel list ``(@...)`` in the order given."""
        if self.kind != "channels":
            raise CommandRejected(-104, "channel list expected")
        assert isinstance(self.value, tuple)
        return self.value


def _suffix_factor(suffix: str, unit: str | None) -> float:
    """Multiplier of a suffix such as ``"MV"``, ``"MHZ"``, ``"K"`` for a setting in ``unit``."""
    s = suffix.upper()
    if not s:
        return 1.0
    if unit is not None:
        u = unit.upper()
        # IEEE 488.2-1992, 7.7.3.5 (from memory): MHZ and MOHM are mega, the only exceptions
        # to M = milli.
        if s == "M" + u and u in ("HZ", "OHM"):
            return 1e6
        if s.endswith(u) and s[: -len(u)] in _MULTIPLIERS:
            return _MULTIPLIERS[s[: -len(u)]]
    if s in _MULTIPLIERS:
        return _MULTIPLIERS[s]
    raise CommandRejected(-131, f"suffix {suffix[:12]}")


def _parse_channel_list(text: str) -> tuple[int, ...]:
    body = text[2:-1].strip()
    if not body:
        return ()
    out: list[int] = []
    for item in body.split(","):
        item = item.strip()
        m = re.match(r"^(\d+)\s*(?::\s*(\d+))?$", item)
        if m is None:
            raise CommandRejected(-102, f"channel list item {item[:12]}")
        a = int(m.group(1))
        b = int(m.group(2)) if m.group(2) else a
        step = 1 if b >= a else -1
        if abs(b - a) > 100_000:
            raise CommandRejected(-222, "channel range too long")
        out.extend(range(a, b + step, step))
    return tuple(out)


def _parse_one(text: str) -> Param:
    t = text.strip(WHITESPACE)
    if not t:
        raise CommandRejected(-102, "empty parameter")
    if t[0] in "'\"":
        q = t[0]
        if len(t) < 2 or t[-1] != q:
            raise CommandRejected(-102, "unterminated string")
        inner = t[1:-1]
        if re.search(f"(?<!{q}){q}(?!{q})", inner.replace(q * 2, "")):
            raise CommandRejected(-102, "stray quote")
        return Param("string", t, inner.replace(q * 2, q))
    if t.startswith("(@") and t.endswith(")"):
        return Param("channels", t, _parse_channel_list(t))
    m = _NUMBER.match(t)
    if m:
        return Param("number", t, float(m.group(1).replace(" ", "")), m.group(2))
    m = _NONDECIMAL.match(t)
    if m:
        base = {"H": 16, "Q": 8, "B": 2}[m.group(1).upper()]
        try:
            return Param("number", t, float(int(m.group(2), base)))
        except ValueError as exc:
            raise CommandRejected(-102, "bad non-decimal number") from exc
    if _CHAR.match(t):
        return Param("char", t, t)
    raise CommandRejected(-102, f"bad parameter {t[:20]}")


def _split_outside(text: str, sep: str) -> list[str]:
    """Split on ``sep`` outside quotes and parentheses; raises -102 on unbalanced text."""
    parts: list[str] = []
    depth = 0
    quote = ""
    start = 0
    i = 0
    while i < len(text):
        c = text[i]
        if quote:
            if c == quote:
                if i + 1 < len(text) and text[i + 1] == quote:
                    i += 1  # doubled quote inside a string
                else:
                    quote = ""
        elif c in "'\"":
            quote = c
        elif c == "(":
            depth += 1
        elif c == ")":
            depth -= 1
            if depth < 0:
                raise CommandRejected(-102, "unbalanced parenthesis")
        elif c == sep and depth == 0:
            parts.append(text[start:i])
            start = i + 1
        i += 1
    if quote:
        raise CommandRejected(-102, "unterminated string")
    if depth:
        raise CommandRejected(-102, "unbalanced parenthesis")
    parts.append(text[start:])
    return parts


def split_units(message: str) -> list[str]:
    """Split a program message into message units at ``;`` outside strings and lists."""
    return _split_outside(message, ";")


def parse_params(text: str) -> list[Param]:
    """Parse the comma-separated program data of one message unit."""
    if not text.strip(WHITESPACE):
        return []
    return [_parse_one(p) for p in _split_outside(text, ",")]
