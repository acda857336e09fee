"""Profile layout 2 (drivers/dialect.py), the offline profile check and the generated pages."""

from __future__ import annotations

from pathlib import Path

import pytest

from drivers.dialect import DRIVER_WORDS
from drivers.profile import OPERATIONS, OPTIONAL, OPTIONAL_ALWAYS, PROFILE_DIR, Profile
from drivers.profiledoc import check_profile, page
from rigbase.errors import ProfileError

ROOT = Path(__file__).resolve().parents[2]
SHIPPED = sorted(p.stem for p in PROFILE_DIR.glob("*.toml"))
ROLE_DIALECTS = {
    "supply": ("scpi1999", "supply-b", "supply-c"),
    "switch": ("scpi1999", "switch-b", "relay-line"),
    "scope": ("scpi1999", "scope-b", "scope-c"),
}


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_profiles_load_and_pass_the_check(name: str) -> None:
    Profile.load(name)
    assert check_profile(name) == []


def test_three_dialects_per_role_cover_the_variation() -> None:
    for role, names in ROLE_DIALECTS.items():
        assert all(Profile.load(n).has_role(role) for n in names), role
    scopes = [Profile.load(n) for n in ROLE_DIALECTS["scope"]]
    assert {p.dialect.completion.method for p in scopes} == {"status", "opc", "wait"}
    assert {p.dialect.transfer.encoding for p in scopes} == {"block", "ascii"}
    assert {p.dialect.transfer.byte_order for p in scopes} == {"big", "little"}
    assert [bool(p.dialect.scaling_queries) for p in scopes].count(True) == 1
    relay = Profile.load("relay-line")
    assert relay.dialect.link.interface == "serial" and relay.dialect.link.acknowledge
    assert not relay.templates["common"]  # no SCPI common commands, no *IDN?
    sb = Profile.load("supply-b")
    assert sb.has_operation("supply", "enable_output") and sb.has_operation(
        "supply", "get_interlock"
    )


def test_values_map_driver_words_to_the_instruments(tmp_path: Path) -> None:
    p = Profile.load("scope-b")
    assert p.command("scope", "set_trigger_slope", slope="NEGative") == "EDGE:DIRection DOWN"
    assert p.command("scope", "set_format", fmt="INT,16") == "RECord:WIDTh 16"
    assert p.command("scope", "set_channel_state", ch=2, state="OFF") == "CHANnel2:DISPlay 0"
    assert set(DRIVER_WORDS["slope"]) == set(p.dialect.values["scope"]["slope"])


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _edit(name: str, old: str, new: str) -> str:
    text = (PROFILE_DIR / f"{name}.toml").read_text(encoding="utf-8")
    assert old in text, old
    return text.replace(old, new, 1)


@pytest.mark.parametrize(
    "name, old, new, key, words",
    [
        ("scope-b", "format = 2", "format = 3", "profile.format", "understands 1 and 2"),
        ("scpi1999", "[common]", '[link]\nacknowledge = "OK"\n\n[common]', "link", "format = 2"),
        (
            "scpi1999",
            'output_on = "OUTPut:STATe ON"',
            'output_on = "OUTPut:STATe ON"\nenable_output = "X"',
            "supply.enable_output",
            "format = 2",
        ),
        (
            "scope-b",
            'slope = { POSitive = "UP"',
            'slope = { RISE = "UP"',
            "scope.values.slope.RISE",
            "not a driver word",
        ),
        (
            "scope-b",
            "[scope.scaling_queries]",
            "[scope.scaling_queries]\nbits = 1",
            "scope.scaling_queries.bits",
            "unknown key",
        ),
        ("scope-c", 'scaling = "DATA:SCALE? {ch}"', "", "scope.scaling", "either"),
        ("relay-line", "baud_rate = 19200", "baud_rate = 0", "link.baud_rate", "> 0"),
        ("scpi1999", "compound = true", 'compound = "yes"', "common.compound", "true or false"),
        (
            "relay-line",
            "error_reply = 'ERR (?P<code>",
            "error_reply = 'ERR (?P<num>",
            "link.error_reply",
            "(?P<code>",
        ),
        ("switch-b", 'open = "OPEN"', 'open = "MADE"', "switch.readback.closed", "the same"),
        (
            "supply-c",
            'write_termination = "\\r\\n"',
            'write_termination = "\\t"',
            "link.write_termination",
            "must be",
        ),
    ],
)
def test_layout_2_mistakes_name_file_and_key(tmp_path, name, old, new, key, words) -> None:
    path = _write(tmp_path, "p", _edit(name, old, new))
    with pytest.raises(ProfileError) as info:
        Profile.load(path)
    assert info.value.key == key and words in str(info.value), str(info.value)
    assert str(path) in str(info.value)


@pytest.mark.parametrize(
    "name, old, new, words",
    [
        ("scope-b", 'operation_complete = "*OPC?"', "", "operation_complete: missing"),
        ("scpi1999", 'get_condition = "STATus:OPERation:CONDition?"', "", None),
        ("scope-c", 'next_error = "SYSTem:ERRor?"', "", "nothing reports the instrument's errors"),
        (
            "relay-line",
            "error_reply = 'ERR (?P<code>\\d+) (?P<message>.*)'",
            "",
            "error_reply: acknowledged commands need",
        ),
        ("supply-b", 'interlock_closed = "CLOSED"', "", "interlock_closed: give it together"),
        ("scope-c", 'next_error = "SYSTem:ERRor?"', "compound = true", "compound: it joins"),
        ("supply-b", 'disable_output = "HV:ARM 0"', "", "enable_output: give it together"),
        (
            "switch-b",
            'open = "CONTact:BREAk {channels}"',
            'open = "CONTact:MAKE {channels}"',
            "open: same command as close",
        ),
        (
            "scope-c",
            "[scope.completion]",
            "[scope.completion]\nacquiring_bit = 5\nwaiting_bit = 5",
            "acquiring_bit: same bit as waiting_bit",
        ),
        ("scope-b", 'set_format = "RECord:WIDTh {fmt}"', 'set_format = "RECord:WIDTh 8"', None),
    ],
)
def test_offline_check_finds_missing_or_contradictory_entries(tmp_path, name, old, new, words):
    problems = check_profile(_write(tmp_path, "p", _edit(name, old, new)))
    assert len(problems) >= 1, problems
    if words is not None:
        assert any(words in p for p in problems), problems
    assert all(str(tmp_path / "p.toml") in p for p in problems)


@pytest.mark.parametrize("name", SHIPPED)
def test_generated_pages_are_up_to_date(name: str) -> None:
    page_path = ROOT / "docs" / "dialects" / f"{name}.md"
    assert page_path.read_text(encoding="utf-8") == page(Profile.load(name)), (
        f"{page_path} is stale: run rig profile-doc {name}"
    )


def test_page_lists_every_operation_with_its_text() -> None:
    p = Profile.load("scope-b")
    text = page(p)
    for op in p.templates["scope"]:
        assert f"| {op} |" in text
    assert "`RECord:LENGth? CHANnel{ch}`" in text and "Not available: " in text
    missing = set(OPERATIONS["scope"]) - set(p.templates["scope"])
    assert missing <= set(OPTIONAL["scope"]) | OPTIONAL_ALWAYS
