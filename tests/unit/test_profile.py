"""Profile loading: the shipped dialect loads; every kind of malformed file is refused with
one ProfileError that names the file and the key."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from drivers.profile import LAYOUT2_ONLY, OPERATIONS, PROFILE_DIR, SCALING_FIELDS, Profile
from rigbase.errors import FileFormatError, ProfileError

SHIPPED = PROFILE_DIR / "scpi1999.toml"


def edit(text: str, table: str, key: str, value: str | None) -> str:
    """Replace (or with ``value=None`` drop) ``key = ...`` inside ``[table]`` of TOML text.

    Line-based on purpose: it keeps the shipped file's comments and layout, so each case
    differs from the shipped profile in exactly one place. A key that is not there is
    appended to the table.
    """
    out: list[str] = []
    current = None
    done = False
    pattern = re.compile(rf'^\s*("{re.escape(key)}"|{re.escape(key)})\s*=')
    lines = text.splitlines()
    for i, line in enumerate(lines):
        head = re.match(r"^\s*\[([^\]]+)\]\s*(#.*)?$", line)
        if head:
            if current == table and not done and value is not None:
                out.append(f"{key} = {value}")
                done = True
            current = head.group(1).strip()
        elif current == table and pattern.match(line):
            done = True
            if value is not None:
                out.append(f"{key} = {value}")
            continue
        out.append(line)
        if i == len(lines) - 1 and current == table and not done and value is not None:
            out.append(f"{key} = {value}")
            done = True
    assert done or value is None, f"[{table}] not found"
    return "\n".join(out) + "\n"


def drop_table(text: str, table: str) -> str:
    """Remove ``[table]`` with its keys (not its sub-tables)."""
    out: list[str] = []
    skipping = False
    for line in text.splitlines():
        head = re.match(r"^\s*\[([^\]]+)\]", line)
        if head:
            skipping = head.group(1).strip() == table
        if not skipping:
            out.append(line)
    return "\n".join(out) + "\n"


def write(tmp_path: Path, text: str, name: str = "dialect.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def shipped_text() -> str:
    return SHIPPED.read_text(encoding="utf-8")


# (case id, edit to apply to the shipped text, key the error must name, words in the problem)
CASES = [
    ("no-profile-table", lambda t: drop_table(t, "profile"), "profile", "missing"),
    ("format-3", lambda t: edit(t, "profile", "format", "3"), "profile.format", "unsupported"),
    ("format-string", lambda t: edit(t, "profile", "format", '"1"'), "profile.format", "unsupported"),
    ("format-missing", lambda t: edit(t, "profile", "format", None), "profile.format", "missing"),
    ("name-empty", lambda t: edit(t, "profile", "name", '""'), "profile.name", "non-empty"),
    ("no-common", lambda t: drop_table(t, "common"), "common", "missing table"),
    ("common-op-missing", lambda t: edit(t, "common", "next_error", None), "common.next_error", "missing"),
    ("supply-op-missing", lambda t: edit(t, "supply", "measure_current", None), "supply.measure_current", "missing"),
    ("unknown-op", lambda t: edit(t, "supply", "set_voltag", '"X"'), "supply.set_voltag", "unknown"),
    ("unknown-table", lambda t: t + '\n[scop]\nabort = "ABOR"\n', "scop", "unknown table"),
    ("not-a-string", lambda t: edit(t, "supply", "set_voltage", "5"), "supply.set_voltage", "string"),
    ("empty-template", lambda t: edit(t, "switch", "open_all", '""'), "switch.open_all", "non-empty"),
    ("unknown-field", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volt}"'), "supply.set_voltage", "unknown field"),
    ("field-from-other-op", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volts} {amps}"'), "supply.set_voltage", "unknown field"),
    ("missing-field", lambda t: edit(t, "supply", "set_voltage", '"VOLT 5"'), "supply.set_voltage", "does not use"),
    ("positional-field", lambda t: edit(t, "switch", "close", '"ROUT:CLOS {}"'), "switch.close", "positional"),
    ("numbered-field", lambda t: edit(t, "switch", "close", '"ROUT:CLOS {0}"'), "switch.close", "positional"),
    ("attribute-field", lambda t: edit(t, "scope", "fetch", '"TRAC? INT{ch.real}"'), "scope.fetch", "attribute"),
    ("index-field", lambda t: edit(t, "scope", "fetch", '"TRAC? INT{ch[0]}"'), "scope.fetch", "attribute"),
    ("bad-format-spec", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volts:.9q}"'), "supply.set_voltage", "format spec"),
    ("int-spec-on-float", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volts:d}"'), "supply.set_voltage", "format spec"),
    ("nested-spec", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volts:{amps}}"'), "supply.set_voltage", "nested"),
    ("unbalanced-brace", lambda t: edit(t, "supply", "set_voltage", '"VOLT {volts"'), "supply.set_voltage", "format string"),
    ("lone-close-brace", lambda t: edit(t, "supply", "output_on", '"OUTP ON}"'), "supply.output_on", "format string"),
    ("range-one-value", lambda t: edit(t, "supply.ranges", "volts", "[0.0]"), "supply.ranges.volts", "pair"),
    ("range-three-values", lambda t: edit(t, "supply.ranges", "volts", "[0.0, 1.0, 2.0]"), "supply.ranges.volts", "pair"),
    ("range-string", lambda t: edit(t, "supply.ranges", "amps", '["0", "0.1"]'), "supply.ranges.amps", "pair"),
    ("range-bool", lambda t: edit(t, "supply.ranges", "amps", "[false, 0.1]"), "supply.ranges.amps", "pair"),
    ("range-scalar", lambda t: edit(t, "switch.ranges", "channel", "16"), "switch.ranges.channel", "pair"),
    ("range-reversed", lambda t: edit(t, "scope.ranges", "points", "[5000, 1000]"), "scope.ranges.points", "above"),
    ("range-infinite", lambda t: edit(t, "supply.ranges", "volts", "[0.0, inf]"), "supply.ranges.volts", "finite"),
    ("range-missing", lambda t: edit(t, "supply.ranges", "amps", None), "supply.ranges.amps", "missing"),
    ("range-unknown", lambda t: edit(t, "scope.ranges", "volts", "[0, 1]"), "scope.ranges.volts", "unknown"),
    ("ranges-table-missing", lambda t: drop_table(t, "switch.ranges"), "switch.ranges", "missing"),
    ("scaling-missing-field", lambda t: edit(t, "scope.scaling_fields", "reference_code", None), "scope.scaling_fields.reference_code", "missing"),
    ("scaling-duplicate", lambda t: edit(t, "scope.scaling_fields", "reference_code", "4"), "scope.scaling_fields.reference_code", "already used"),
    ("scaling-negative", lambda t: edit(t, "scope.scaling_fields", "points", "-1"), "scope.scaling_fields.points", "integer"),
    ("scaling-float", lambda t: edit(t, "scope.scaling_fields", "points", "0.0"), "scope.scaling_fields.points", "integer"),
    ("scaling-unknown", lambda t: edit(t, "scope.scaling_fields", "x_scale", "9"), "scope.scaling_fields.x_scale", "unknown"),
    ("scaling-table-missing", lambda t: drop_table(t, "scope.scaling_fields"), "scope.scaling_fields", "missing"),
    ("functions-missing", lambda t: drop_table(t, "meter.functions"), "meter.functions", "missing"),
    ("function-empty", lambda t: edit(t, "meter.functions", '"AC V"', '""'), "meter.functions", "non-empty"),
    ("table-is-value", lambda t: drop_table(t, "common") + 'common = "x"\n', "common", "table"),
    ("ranges-is-value", lambda t: edit(drop_table(t, "supply.ranges"), "supply", "ranges", "5"), "supply.ranges", "must be a table"),
    ("functions-is-value", lambda t: edit(drop_table(t, "meter.functions"), "meter", "functions", '"x"'), "meter.functions", "must be a table"),
]  # fmt: skip


@pytest.mark.parametrize(("case", "mutate", "key", "words"), CASES, ids=[c[0] for c in CASES])
def test_malformed_profile_names_file_and_key(
    tmp_path: Path, shipped_text: str, case: str, mutate, key: str, words: str
) -> None:
    text = mutate(shipped_text)
    assert text != shipped_text, f"{case}: the edit did not change the file"
    path = write(tmp_path, text)
    with pytest.raises(ProfileError) as info:
        Profile.load(path)
    err = info.value
    assert err.path == str(path)
    assert err.key.startswith(key), f"{case}: key {err.key!r}, expected {key!r}"
    assert words in err.problem, f"{case}: problem {err.problem!r}"
    # one line naming the file and the key, as every bad-input message in the project
    message = str(err)
    assert "\n" not in message
    assert str(path) in message and f"[{err.key}]" in message


def test_toml_syntax_error_names_file_and_line(tmp_path: Path, shipped_text: str) -> None:
    lines = shipped_text.splitlines()
    lines.insert(3, "this is = = not toml")
    path = write(tmp_path, "\n".join(lines))
    with pytest.raises(ProfileError) as info:
        Profile.load(path)
    assert info.value.line == 4
    assert f"{path}:4" in str(info.value)
    assert "not valid TOML" in info.value.problem


def test_missing_file_and_unknown_name(tmp_path: Path) -> None:
    with pytest.raises(ProfileError) as info:
        Profile.load(tmp_path / "nope.toml")
    assert "no such profile file" in str(info.value)
    with pytest.raises(ProfileError) as info:
        Profile.load("no_such_dialect")
    assert str(PROFILE_DIR / "no_such_dialect.toml") in str(info.value)
    assert "scpi1999" in str(info.value)  # lists what is shipped


def test_profile_error_is_a_file_format_error_and_value_error() -> None:
    assert issubclass(ProfileError, FileFormatError)
    assert issubclass(ProfileError, ValueError)


def test_shipped_profile_loads_by_name_and_by_path() -> None:
    by_name = Profile.load("scpi1999")
    by_path = Profile.load(SHIPPED)
    assert by_name.path == by_path.path == SHIPPED
    assert by_name.roles == {"common", "supply", "switch", "scope", "meter"}
    assert by_name.name == "generic SCPI-1999"
    for role, ops in OPERATIONS.items():
        # layout 1 has every operation but those that came with layout 2
        assert set(by_name.templates[role]) == set(ops) - LAYOUT2_ONLY
    assert set(by_name.scaling_fields) == set(SCALING_FIELDS)


def test_shipped_profile_commands_and_ranges() -> None:
    p = Profile.load("scpi1999")
    assert p.command("common", "identify") == "*IDN?"
    assert p.command("supply", "set_voltage", volts=1234.5) == (
        "SOURce:VOLTage:LEVel:IMMediate:AMPLitude 1234.5"
    )
    assert p.command("switch", "close", channels="(@1,3)") == "ROUTe:CLOSe (@1,3)"
    assert p.command("scope", "set_points", points=2000) == "SENSe:SWEep:POINts 2000"
    assert p.command("scope", "fetch", ch=2) == "TRACe:DATA? INTernal2"
    assert p.ranges("supply") == {"volts": (0.0, 1500.0), "amps": (0.0, 0.1)}
    assert p.ranges("switch") == {"channel": (1.0, 16.0)}
    assert p.ranges("scope")["points"] == (1000.0, 10_000_000.0)


def test_command_refuses_wrong_fields_and_unknown_operation() -> None:
    p = Profile.load("scpi1999")
    with pytest.raises(ProfileError, match=r"supply\.set_voltage"):
        p.command("supply", "set_voltage")
    with pytest.raises(ProfileError, match=r"supply\.set_voltage"):
        p.command("supply", "set_voltage", volts=1.0, amps=2.0)
    with pytest.raises(ProfileError, match=r"supply\.explode"):
        p.command("supply", "explode")


def test_meter_function_map_and_readback_forms() -> None:
    p = Profile.load("scpi1999")
    assert p.meter_function("AC V") == "VOLTage:AC"
    with pytest.raises(ProfileError, match="meter.functions"):
        p.meter_function("Capacitance")
    # an instrument may answer in short or long form, any case, quoted (SCPI-1999 Vol. 1,
    # 6.2.1 mnemonics)
    assert p.meter_mode('"VOLT:AC"') == "AC V"
    assert p.meter_mode("voltage:ac:mill") == "AC mV"
    assert p.meter_mode("RES") == "Ohm"
    assert p.meter_mode("VOLTA:AC") is None  # neither short nor long form
    assert p.meter_mode("VOLT") is None


def test_role_tables_are_optional_but_checked_when_used(tmp_path: Path, shipped_text: str) -> None:
    text = drop_table(drop_table(shipped_text, "meter"), "meter.functions")
    p = Profile.load(write(tmp_path, text))
    assert not p.has_role("meter")
    with pytest.raises(ProfileError) as info:
        p.require_role("meter")
    assert info.value.key == "meter"
    with pytest.raises(ProfileError):
        p.command("meter", "get_function")


def test_extra_literal_braces_and_conversions_are_fine(tmp_path: Path, shipped_text: str) -> None:
    text = edit(shipped_text, "supply", "set_voltage", '"VOLT {volts!r} {{raw}}"')
    p = Profile.load(write(tmp_path, text))
    assert p.command("supply", "set_voltage", volts=2.5) == "VOLT 2.5 {raw}"
