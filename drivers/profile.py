"""Command-dialect profiles: which SCPI command performs each operation of each role.

A profile is a TOML file (``drivers/profiles/<name>.toml``, layout version 1). Each role
table (``[supply]``, ``[switch]``, ``[scope]``, ``[meter]``) maps an operation to a command
template, a Python format string whose named fields are the values the driver supplies for
that operation (:data:`OPERATIONS`). Role tables are optional, but a role that is present
must define every one of its operations and ranges. ``[profile]`` and ``[common]`` are always
required. Everything is checked when the file is loaded, so a typo surfaces as one
:class:`~rigbase.errors.ProfileError` naming the file and the key, not as a strange
instrument error halfway through a run.
"""

from __future__ import annotations

import math
import re
import string
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

from drivers.dialect import Dialect, read_dialect
from drivers.operations import (  # the vocabulary, re-exported
    _ROLE_TABLES,
    _ROLE_TABLES_1,
    _SAMPLES,
    _SUBTABLES,
    LAYOUT2_ONLY,
    OPERATIONS,
    OPTIONAL,
    OPTIONAL_ALWAYS,
    RANGES,
    SCALING_FIELDS,
)
from rigbase.errors import ProfileError
from rigbase.tomlcheck import BOM_TEXT

__all__ = [
    "FORMATS",
    "FORMAT_VERSION",
    "LAYOUT2_ONLY",
    "OPERATIONS",
    "OPTIONAL",
    "OPTIONAL_ALWAYS",
    "PROFILE_DIR",
    "RANGES",
    "SCALING_FIELDS",
    "Profile",
    "scpi_header_matches",
]

FORMAT_VERSION = 2
#: layouts this reader understands: 1 (templates only) and 2 (adds the tables of
#: :mod:`drivers.dialect` and optional operations)
FORMATS = (1, 2)
PROFILE_DIR = Path(__file__).resolve().parent / "profiles"


_NAME_RE = re.compile(r"^[A-Za-z0-9_.-]+$")


def _resolve(name_or_path: str | Path) -> Path:
    """A bare name (no separator, no suffix) is a shipped profile; anything else is a path."""
    if isinstance(name_or_path, str) and _NAME_RE.match(name_or_path) and "." not in name_or_path:
        return PROFILE_DIR / f"{name_or_path}.toml"
    return Path(name_or_path)


def _is_number(value: object) -> bool:
    # bool is an int in Python, but `volts = true` is a typo, not a number
    return isinstance(value, int | float) and not isinstance(value, bool)


@dataclass(frozen=True)
class Profile:
    """A validated command dialect. Build with :meth:`Profile.load`."""

    path: Path
    name: str
    templates: Mapping[str, Mapping[str, str]]
    range_table: Mapping[str, Mapping[str, tuple[float, float]]]
    scaling_fields: Mapping[str, int] = field(default_factory=dict)
    meter_functions: Mapping[str, str] = field(default_factory=dict)
    dialect: Dialect = field(default_factory=Dialect)
    format: int = 1

    # -- loading ------------------------------------------------------------------------------
    @classmethod
    def load(cls, name_or_path: str | Path) -> Profile:
        """Load and validate a profile: a shipped name (``"scpi1999"``) or a file path.

        Raises :class:`ProfileError` naming the file, the key and the problem.
        """
        path = _resolve(name_or_path)
        try:
            raw = path.read_bytes()
        except FileNotFoundError:
            shipped = ", ".join(sorted(p.stem for p in PROFILE_DIR.glob("*.toml")))
            raise ProfileError(path, "", f"no such profile file (shipped: {shipped})") from None
        except OSError as exc:
            raise ProfileError(path, "", f"cannot read: {exc.strerror or exc}") from exc
        if raw.startswith(b"\xef\xbb\xbf"):
            raise ProfileError(path, "", "profile " + BOM_TEXT, line=1)
        try:
            data = tomllib.loads(raw.decode("utf-8"))
        except UnicodeDecodeError as exc:
            raise ProfileError(path, "", f"not UTF-8 text: {exc.reason}") from exc
        except tomllib.TOMLDecodeError as exc:
            m = re.search(r"line (\d+)", str(exc))
            line = int(m.group(1)) if m else None
            raise ProfileError(path, "", f"not valid TOML: {exc}", line=line) from exc
        return cls.from_mapping(data, path)

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any], path: str | Path) -> Profile:
        """Validate already-parsed TOML ``data``; ``path`` is only used in error messages."""
        return _Validator(Path(path)).build(data)

    # -- use ----------------------------------------------------------------------------------
    @property
    def roles(self) -> frozenset[str]:
        """Roles this profile defines (always includes ``"common"``)."""
        return frozenset(self.templates)

    def has_role(self, role: str) -> bool:
        """True if the profile defines ``role``."""
        return role in self.templates

    def has_operation(self, role: str, operation: str) -> bool:
        """True if the profile gives a command for ``operation`` of ``role``."""
        return operation in self.templates.get(role, {})

    def require_role(self, role: str) -> None:
        """Raise :class:`ProfileError` unless the profile defines ``role``."""
        if role not in self.templates:
            raise ProfileError(self.path, role, f"the profile has no [{role}] table")

    def command(self, role: str, operation: str, **fields: object) -> str:
        """The command text for ``operation`` of ``role`` with ``fields`` filled in."""
        self.require_role(role)
        try:
            template = self.templates[role][operation]
        except KeyError:
            raise ProfileError(
                self.path, f"{role}.{operation}", "no such operation in this profile"
            ) from None
        expected = OPERATIONS[role][operation]
        if set(fields) != expected:
            # a caller bug, but name it like a profile problem so the pair is obvious
            raise ProfileError(
                self.path,
                f"{role}.{operation}",
                f"called with fields {sorted(fields)}, template needs {sorted(expected)}",
            )
        words = {k: self.dialect.word(role, k, v) for k, v in fields.items()}
        return template.format(**words)

    def ranges(self, role: str) -> dict[str, tuple[float, float]]:
        """The ``[role.ranges]`` table as ``{name: (low, high)}`` (units as named in the file)."""
        self.require_role(role)
        return dict(self.range_table.get(role, {}))

    def meter_function(self, mode: str) -> str:
        """The instrument function that implements sequence-file mode ``mode``."""
        self.require_role("meter")
        try:
            return self.meter_functions[mode]
        except KeyError:
            known = ", ".join(repr(k) for k in self.meter_functions)
            raise ProfileError(
                self.path, "meter.functions", f"no function for mode {mode!r} (known: {known})"
            ) from None

    def meter_mode(self, function: str) -> str | None:
        """The mode name whose function is ``function``, or None.

        ``function`` is an instrument's answer: quotes are dropped, and each node may be in
        short or long form, in any case (SCPI-1999 Vol. 1, 6.2.1 mnemonics).
        """
        reply = function.strip().strip('"').strip()
        for mode, func in self.meter_functions.items():
            if scpi_header_matches(reply, func):
                return mode
        return None


def scpi_header_matches(text: str, header: str) -> bool:
    """True if ``text`` names the same header as ``header`` (written with its short form in
    upper case, e.g. ``VOLTage:AC``): every node in short or long form, any case."""
    got = text.strip().lstrip(":").split(":")
    want = header.strip().lstrip(":").split(":")
    if len(got) != len(want):
        return False
    for node, mnemonic in zip(got, want, strict=True):
        m = re.match(r"^([A-Za-z]+?)(\d*)$", mnemonic)
        base, suffix = (m.group(1), m.group(2)) if m else (mnemonic, "")
        short = "".join(c for c in base if c.isupper()) or base
        forms = {(base + suffix).upper(), (short + suffix).upper()}
        if node.upper() not in forms:
            return False
    return True


class _Validator:
    """Checks one parsed profile; every complaint names ``path`` and a dotted key."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.format = 1

    def fail(self, key: str, problem: str) -> ProfileError:
        return ProfileError(self.path, key, problem)

    def table(
        self, data: Mapping[str, Any], name: str, *, required: bool, where: str = ""
    ) -> dict[str, Any] | None:
        """The table ``name`` inside ``data`` (itself at dotted path ``where``), or None."""
        key = f"{where}.{name}" if where else name
        if name not in data:
            if required:
                raise self.fail(key, "missing table")
            return None
        node = data[name]
        if not isinstance(node, Mapping):
            raise self.fail(key, f"must be a table, found {type(node).__name__}")
        return dict(node)

    def build(self, data: Mapping[str, Any]) -> Profile:
        head = self.table(data, "profile", required=True)
        assert head is not None
        fmt = head.get("format")
        if fmt is None:
            raise self.fail("profile.format", "missing (this reader understands format = 1)")
        if not isinstance(fmt, int) or isinstance(fmt, bool) or fmt not in FORMATS:
            raise self.fail(
                "profile.format", f"unsupported layout {fmt!r}; this reader understands 1 and 2"
            )
        self.format = fmt
        name = head.get("name", self.path.stem)
        if not isinstance(name, str) or not name.strip():
            raise self.fail("profile.name", "must be a non-empty string")
        unknown = set(data) - {"profile", "link", *OPERATIONS}
        if unknown:
            known = ", ".join(["link", *OPERATIONS])
            raise self.fail(sorted(unknown)[0], f"unknown table; known: {known}")
        dialect = read_dialect(data, self.path, fmt)

        templates: dict[str, dict[str, str]] = {}
        ranges: dict[str, dict[str, tuple[float, float]]] = {}
        scaling: dict[str, int] = {}
        functions: dict[str, str] = {}
        for role in OPERATIONS:
            body = self.table(data, role, required=role == "common")
            if body is None:
                continue
            templates[role] = self.operations(role, body)
            if role in RANGES:
                ranges[role] = self.ranges(role, body)
            if role == "scope" and (fmt == 1 or "scaling" in templates[role]):
                scaling = self.scaling_fields(body)
            if role == "scope" and fmt == 2:
                has_combined = "scaling" in templates[role]
                if has_combined == bool(dialect.scaling_queries):
                    raise self.fail(
                        "scope.scaling",
                        "give either `scaling` with [scope.scaling_fields] or "
                        "[scope.scaling_queries], not both and not neither",
                    )
            if role == "meter":
                functions = self.functions(body)
        return Profile(
            path=self.path,
            name=name,
            templates=MappingProxyType(templates),
            range_table=MappingProxyType(ranges),
            scaling_fields=MappingProxyType(scaling),
            meter_functions=MappingProxyType(functions),
            dialect=dialect,
            format=fmt,
        )

    def operations(self, role: str, body: Mapping[str, Any]) -> dict[str, str]:
        ops = OPERATIONS[role]
        tables = _ROLE_TABLES[role] if self.format == 2 else _ROLE_TABLES_1.get(role, {"ranges"})
        for key in body:
            if key in ops:
                continue
            if key in tables:
                continue
            hint = "table" if key in _SUBTABLES else "operation"
            raise self.fail(f"{role}.{key}", f"unknown {hint} for role {role!r}")
        out: dict[str, str] = {}
        for op, needed in ops.items():
            key = f"{role}.{op}"
            if op in LAYOUT2_ONLY and self.format == 1:
                if op in body:
                    raise self.fail(key, "needs [profile] format = 2")
                continue
            if op not in body:
                if op in OPTIONAL_ALWAYS:
                    continue
                if self.format == 2 and op in OPTIONAL.get(role, ()):
                    continue
                raise self.fail(key, "missing operation")
            template = body[op]
            if not isinstance(template, str) or not template.strip():
                raise self.fail(key, "must be a non-empty string (a command template)")
            self.template(key, template, needed)
            out[op] = template
        return out

    def template(self, key: str, template: str, needed: frozenset[str]) -> None:
        try:
            parts = list(string.Formatter().parse(template))
        except ValueError as exc:
            raise self.fail(key, f"not a valid format string: {exc}") from None
        used: set[str] = set()
        for _literal, fname, spec, _conv in parts:
            if fname is None:
                continue
            if fname == "" or fname.isdigit():
                raise self.fail(key, "positional field {} not allowed; use a named field")
            if not fname.isidentifier():
                raise self.fail(key, f"field {{{fname}}}: attribute or index access not allowed")
            if fname not in needed:
                allowed = ", ".join(sorted(needed)) or "none"
                raise self.fail(
                    key, f"unknown field {{{fname}}} (this operation supplies: {allowed})"
                )
            if spec and "{" in spec:
                raise self.fail(key, f"field {{{fname}}}: nested fields in a format spec")
            used.add(fname)
        missing = needed - used
        if missing:
            raise self.fail(
                key, f"template does not use field(s) {{{'}, {'.join(sorted(missing))}}}"
            )
        try:
            template.format(**{f: _SAMPLES[f] for f in needed})
        except (ValueError, TypeError) as exc:
            raise self.fail(key, f"format spec does not fit the value: {exc}") from None

    def ranges(self, role: str, body: Mapping[str, Any]) -> dict[str, tuple[float, float]]:
        table = self.table(body, "ranges", required=False, where=role)
        if table is None:
            raise self.fail(f"{role}.ranges", "missing table")
        out: dict[str, tuple[float, float]] = {}
        for name in table:
            if name not in RANGES[role]:
                raise self.fail(f"{role}.ranges.{name}", "unknown range")
        for name in RANGES[role]:
            key = f"{role}.ranges.{name}"
            if name not in table:
                raise self.fail(key, "missing range")
            pair = table[name]
            if not isinstance(pair, list) or len(pair) != 2 or not all(map(_is_number, pair)):
                raise self.fail(key, "must be a [low, high] pair of numbers")
            low, high = float(pair[0]), float(pair[1])
            if not (math.isfinite(low) and math.isfinite(high)):
                raise self.fail(key, "bounds must be finite")
            if low > high:
                raise self.fail(key, f"low {pair[0]} is above high {pair[1]}")
            out[name] = (low, high)
        return out

    def scaling_fields(self, body: Mapping[str, Any]) -> dict[str, int]:
        table = self.table(body, "scaling_fields", required=False, where="scope")
        if table is None:
            raise self.fail("scope.scaling_fields", "missing table")
        out: dict[str, int] = {}
        for name in table:
            if name not in SCALING_FIELDS:
                known = ", ".join(SCALING_FIELDS)
                raise self.fail(
                    f"scope.scaling_fields.{name}", f"unknown scaling field (known: {known})"
                )
        for name in SCALING_FIELDS:
            key = f"scope.scaling_fields.{name}"
            if name not in table:
                raise self.fail(key, "missing: position of this field in the scaling answer")
            pos = table[name]
            if not isinstance(pos, int) or isinstance(pos, bool) or pos < 0:
                raise self.fail(key, "must be a position, an integer >= 0")
            out[name] = pos
        seen: dict[int, str] = {}
        for name, pos in out.items():
            if pos in seen:
                raise self.fail(
                    f"scope.scaling_fields.{name}", f"position {pos} already used by {seen[pos]}"
                )
            seen[pos] = name
        return out

    def functions(self, body: Mapping[str, Any]) -> dict[str, str]:
        table = self.table(body, "functions", required=False, where="meter")
        if not table:
            raise self.fail("meter.functions", "missing or empty table (mode name -> function)")
        out: dict[str, str] = {}
        for mode, func in table.items():
            if not isinstance(func, str) or not func.strip():
                raise self.fail(f"meter.functions.{mode}", "must be a non-empty string")
            out[mode] = func
        return out
