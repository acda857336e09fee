"""Checked reading of TOML input files: SI numbers, key paths with line numbers, typed tables.

The generic half of the bench and sequence loaders (``rig/planning/benchfile.py``): it knows nothing of
benches or sequences, only how to read a table so that every problem becomes one
:class:`rigbase.errors.FileFormatError` naming the file, the dotted key, its line and the
problem, with the nearest valid name for an unknown key.
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from collections.abc import Iterable
from dataclasses import fields, is_dataclass
from pathlib import Path
from typing import Any

from rigbase.errors import FileFormatError
from rigbase.si import parse_si, unit_word

__all__ = [
    "BOM_TEXT",
    "REQUIRED",
    "Context",
    "Table",
    "jsonable",
    "parse_si",
    "read_toml",
    "resolve_file",
]

# --------------------------------------------------------------------------------------------
# Where a key stands in the file
# --------------------------------------------------------------------------------------------

_KEY_PART_RE = re.compile(r'\s*(?:"((?:[^"\\]|\\.)*)"|\'([^\']*)\'|([A-Za-z0-9_-]+))\s*')
_HEADER_RE = re.compile(r"^\s*(\[\[?)\s*(.+?)\s*\]\]?\s*(?:#.*)?$")
_ASSIGN_RE = re.compile(
    r'^\s*((?:"(?:[^"\\]|\\.)*"|\'[^\']*\'|[A-Za-z0-9_-]+)(?:\s*\.\s*(?:"(?:[^"\\]|\\.)*"|\'[^\']*\'|[A-Za-z0-9_-]+))*)\s*='
)  # noqa: E501


def _split_key(text: str) -> tuple[str, ...] | None:
    """Split a TOML dotted key into its parts; None if it is not a key."""
    parts: list[str] = []
    pos = 0
    while True:
        m = _KEY_PART_RE.match(text, pos)
        if not m:
            return None
        parts.append(next(g for g in m.groups() if g is not None))
        pos = m.end()
        if pos == len(text):
            return tuple(parts)
        if text[pos] != ".":
            return None
        pos += 1


def _index_lines(text: str) -> dict[tuple[str | int, ...], int]:
    """Map each table and key path in the text to the line it stands on (1-based).

    Arrays of tables get their index: the second ``[[meters]]`` is ``("meters", 1)``. The
    scan is line-based and skips the inside of multi-line strings; that is enough to point a
    user at a line, which is all it is for.
    """
    found: dict[tuple[str | int, ...], int] = {}
    table: tuple[str | int, ...] = ()
    aot_count: dict[tuple[str | int, ...], int] = {}
    in_string = False
    for lineno, line in enumerate(text.splitlines(), 1):
        quotes = line.count('"""') + line.count("'''")
        if in_string:
            in_string = quotes % 2 == 0
            continue
        header = _HEADER_RE.match(line)
        assign = _ASSIGN_RE.match(line)
        if header and not assign:
            raw = _split_key(header.group(2))
            if raw is not None:
                is_aot = header.group(1) == "[["
                resolved: list[str | int] = []
                for i, part in enumerate(raw):
                    resolved.append(part)
                    last = i == len(raw) - 1
                    # an array of tables higher up this path: its latest element is meant
                    if not (last and is_aot) and tuple(resolved) in aot_count:
                        resolved.append(aot_count[tuple(resolved)])
                if is_aot:
                    base = tuple(resolved)
                    aot_count[base] = aot_count.get(base, -1) + 1
                    resolved.append(aot_count[base])
                table = tuple(resolved)
                found.setdefault(table, lineno)
            continue
        if assign:
            parts = _split_key(assign.group(1))
            if parts is not None:
                for i in range(1, len(parts) + 1):
                    found.setdefault(table + parts[:i], lineno)
            if quotes % 2 == 1:
                in_string = True
    return found


def _format_key(key: tuple[str | int, ...]) -> str:
    out = ""
    for part in key:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            text = part if re.fullmatch(r"[A-Za-z0-9_-]+", part) else f'"{part}"'
            out += ("." if out else "") + text
    return out


class Context:
    """One file being read: its path and the line index used for error messages."""

    def __init__(self, path: Path, text: str) -> None:
        self.path = path
        self.lines = _index_lines(text)

    def line_of(self, key: tuple[str | int, ...]) -> int | None:
        """Line of ``key``, or of the nearest enclosing table or array that is in the file."""
        for n in range(len(key), 0, -1):
            line = self.lines.get(key[:n])
            if line is not None:
                return line
        return None

    def error(self, key: tuple[str | int, ...], problem: str) -> FileFormatError:
        return FileFormatError(self.path, _format_key(key), problem, self.line_of(key))


BOM_TEXT = "starts with a UTF-8 byte-order mark (BOM): save it as UTF-8 without one"


def read_toml(path: str | Path, what: str) -> tuple[Context, dict[str, Any]]:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FileFormatError(path, "", f"{what} file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise FileFormatError(path, "", f"cannot read {what} file: {exc}") from None
    if text.startswith("\ufeff"):
        raise FileFormatError(path, "", f"{what} file {BOM_TEXT}", line=1)
    ctx = Context(path, text)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column \d+\)", msg)
        line = int(m.group(1)) if m else None
        if m is None and "end of document" in msg:
            line = text.count("\n") + 1
        msg = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg)
        raise FileFormatError(path, "", f"TOML syntax error: {msg}", line) from None
    return ctx, data


# --------------------------------------------------------------------------------------------
# Reading one table with checks
# --------------------------------------------------------------------------------------------

REQUIRED: Any = object()


def _nearest(name: str, valid: Iterable[str]) -> str | None:
    """The valid name closest to ``name`` (case-insensitive), or None if none is close."""
    by_lower = {v.lower(): v for v in valid}
    hits = difflib.get_close_matches(name.lower(), list(by_lower), n=1, cutoff=0.6)
    return by_lower[hits[0]] if hits else None


def _fmt(value: float, name: str) -> str:
    unit = unit_word(name)
    return f"{value:g} {unit}".rstrip()


def _type_name(value: object) -> str:
    names = {bool: "true/false", int: "an integer", float: "a number", str: "a string"}
    names.update({list: "a list", dict: "a table"})
    return names.get(type(value), type(value).__name__)


class Table:
    """A TOML table under a key, read with type, unit and range checks.

    Unknown keys are refused when the table is opened, before anything else, so that a typo
    is reported as a typo and not as a missing key.
    """

    def __init__(
        self,
        ctx: Context,
        data: object,
        key: tuple[str | int, ...],
        allowed: Iterable[str] | None,
    ) -> None:
        """``allowed`` None admits any key: a table handed on, unread, to the one module that
        knows its keys (which opens it again with them)."""
        self.ctx = ctx
        self.key = key
        self.allowed = tuple(allowed) if allowed is not None else None
        if not isinstance(data, dict):
            raise ctx.error(key, f"must be a table, not {_type_name(data)}")
        self.data: dict[str, Any] = data
        for name in data if self.allowed is not None else ():
            if name not in self.allowed:
                hint = _nearest(name, self.allowed)
                tip = (
                    f"did you mean {hint!r}?" if hint else "valid keys: " + ", ".join(self.allowed)
                )
                raise ctx.error(key + (name,), f"unknown key {name!r}; {tip}")

    def has(self, name: str) -> bool:
        return name in self.data

    def error(self, name: str | tuple[str | int, ...], problem: str) -> FileFormatError:
        sub = (name,) if isinstance(name, str) else name
        return self.ctx.error(self.key + sub, problem)

    def _get(self, name: str, default: Any) -> Any:
        if name in self.data:
            return self.data[name]
        if default is REQUIRED:
            raise self.error(name, f"missing required key {name!r}")
        return default

    def _to_number(self, value: object, key: tuple[str | int, ...], name: str) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float | str):
            raise self.error(key, f"must be a number, not {_type_name(value)}")
        if isinstance(value, str):
            try:
                value = parse_si(value, name)
            except ValueError as exc:
                raise self.error(key, str(exc)) from None
        number = float(value)
        if not math.isfinite(number):
            raise self.error(key, f"must be a finite number, not {value}")
        return number

    def _check_range(
        self,
        number: float,
        key: tuple[str | int, ...],
        name: str,
        positive: bool,
        minimum: float | None,
        maximum: float | None,
        maximum_why: str,
    ) -> None:
        if positive and number <= 0:
            raise self.error(key, f"must be positive, got {_fmt(number, name)}")
        if minimum is not None and number < minimum:
            raise self.error(
                key, f"must be at least {_fmt(minimum, name)}, got {_fmt(number, name)}"
            )
        if maximum is not None and number > maximum:
            why = f" ({maximum_why})" if maximum_why else ""
            raise self.error(
                key, f"{_fmt(number, name)} is above the maximum {_fmt(maximum, name)}{why}"
            )

    def number(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        positive: bool = False,
        minimum: float | None = None,
        maximum: float | None = None,
        maximum_why: str = "",
    ) -> Any:
        """A float (SI strings accepted); ``default`` is returned as is when the key is absent."""
        if name not in self.data:
            return self._get(name, default)
        number = self._to_number(self.data[name], (name,), name)
        self._check_range(number, (name,), name, positive, minimum, maximum, maximum_why)
        return number

    def integer(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        minimum: int | None = None,
        maximum: int | None = None,
    ) -> Any:
        """A whole number (``20000``, ``20_000`` or ``"20k"``)."""
        if name not in self.data:
            return self._get(name, default)
        return self._integer_value(self.data[name], (name,), name, minimum, maximum)

    def _integer_value(
        self,
        value: object,
        key: tuple[str | int, ...],
        name: str,
        minimum: int | None,
        maximum: int | None,
    ) -> int:
        number = self._to_number(value, key, name)
        if number != int(number):
            raise self.error(key, f"must be a whole number, got {number:g}")
        self._check_range(number, key, name, False, minimum, maximum, "")
        return int(number)

    def numbers(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        positive: bool = False,
        minimum: float | None = None,
        maximum: float | None = None,
        maximum_why: str = "",
        distinct: bool = True,
    ) -> Any:
        """A non-empty list of floats (a single number is a list of one)."""
        if name not in self.data:
            return self._get(name, default)
        value = self.data[name]
        items = value if isinstance(value, list) else [value]
        if not items:
            raise self.error(name, "must list at least one value")
        out: list[float] = []
        for i, item in enumerate(items):
            key = (name, i) if isinstance(value, list) else (name,)
            number = self._to_number(item, key, name)
            self._check_range(number, key, name, positive, minimum, maximum, maximum_why)
            if distinct and number in out:
                raise self.error(key, f"{_fmt(number, name)} is listed twice")
            out.append(number)
        return tuple(out)

    def integers(self, name: str, default: Any = REQUIRED, *, minimum: int | None = None) -> Any:
        if name not in self.data:
            return self._get(name, default)
        value = self.data[name]
        items = value if isinstance(value, list) else [value]
        return tuple(
            self._integer_value(item, (name, i), name, minimum, None)
            for i, item in enumerate(items)
        )

    def string(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        choices: Iterable[str] | None = None,
        what: str = "value",
    ) -> Any:
        if name not in self.data:
            return self._get(name, default)
        value = self.data[name]
        if not isinstance(value, str):
            raise self.error(name, f"must be a string, not {_type_name(value)}")
        self._check_choice(value, (name,), choices, what)
        return value

    def _check_choice(
        self,
        value: str,
        key: tuple[str | int, ...],
        choices: Iterable[str] | None,
        what: str = "value",
    ) -> None:
        if choices is None:
            return
        choices = tuple(choices)
        if value not in choices:
            hint = _nearest(value, choices)
            tip = f"did you mean {hint!r}?" if hint else "choose one of " + ", ".join(choices)
            raise self.error(key, f"unknown {what} {value!r}; {tip}")

    def strings(
        self,
        name: str,
        default: Any = REQUIRED,
        *,
        choices: Iterable[str] | None = None,
        what: str = "value",
    ) -> Any:
        """A non-empty list of distinct strings (a single string is a list of one)."""
        if name not in self.data:
            return self._get(name, default)
        value = self.data[name]
        items = value if isinstance(value, list) else [value]
        if not items:
            raise self.error(name, "must list at least one name")
        out: list[str] = []
        for i, item in enumerate(items):
            key = (name, i) if isinstance(value, list) else (name,)
            if not isinstance(item, str):
                raise self.error(key, f"must be a string, not {_type_name(item)}")
            self._check_choice(item, key, choices, what)
            if item in out:
                raise self.error(key, f"{item!r} is listed twice")
            out.append(item)
        return tuple(out)

    def boolean(self, name: str, default: Any = REQUIRED) -> Any:
        if name not in self.data:
            return self._get(name, default)
        value = self.data[name]
        if not isinstance(value, bool):
            raise self.error(name, f"must be true or false, not {_type_name(value)}")
        return value

    def table(self, name: str, allowed: Iterable[str] | None, *, required: bool = False) -> Table:
        """The sub-table ``name`` (empty when absent and not required)."""
        if name not in self.data and required:
            raise self.error(name, f"missing required table [{_format_key(self.key + (name,))}]")
        return Table(self.ctx, self.data.get(name, {}), self.key + (name,), allowed)

    def tables(self, name: str, allowed: Iterable[str], *, required: bool = False) -> list[Table]:
        """The array of tables ``[[name]]`` (empty list when absent and not required)."""
        if name not in self.data:
            if required:
                raise self.error(name, f"missing required [[{_format_key(self.key + (name,))}]]")
            return []
        value = self.data[name]
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            raise self.error(name, f"must be an array of tables [[{name}]]")
        if required and not value:
            raise self.error(name, f"needs at least one [[{name}]] table")
        allowed = tuple(allowed) if allowed is not None else None
        return [Table(self.ctx, v, self.key + (name, i), allowed) for i, v in enumerate(value)]


def resolve_file(
    table: Table, name: str, value: str, base_dir: Path, default_dir: Path, what: str
) -> Path:
    """A bare name (``scpi1999``) is a file in ``default_dir``; else a path from ``base_dir``."""
    if not value.strip():
        raise table.error(name, f"empty {what} name")
    bare = "/" not in value and "\\" not in value and not value.endswith(".toml")
    path = default_dir / f"{value}.toml" if bare else (base_dir / value).expanduser()
    path = path.resolve()
    if not path.is_file():
        known = sorted(p.stem for p in default_dir.glob("*.toml")) if default_dir.is_dir() else []
        hint = _nearest(value, known) if bare else None
        tip = (
            f"; did you mean {hint!r}?"
            if hint
            else (f"; known: {', '.join(known)}" if bare and known else "")
        )
        raise table.error(name, f"{what} file not found: {path}{tip}")
    return path


def jsonable(value: Any) -> Any:
    """Dataclasses, paths and tuples turned into plain JSON values (for the run manifest)."""
    if is_dataclass(value) and not isinstance(value, type):
        return {f.name: jsonable(getattr(value, f.name)) for f in fields(value) if f.name != "raw"}
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [jsonable(v) for v in value]
    if isinstance(value, Path):
        return str(value)
    return value
