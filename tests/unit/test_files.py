"""Bench and sequence files: the shipped files load; malformed files give one clear error.

Each malformed case checks that the one FileFormatError names the file, the dotted key, the
problem and the line where that key stands (the line is found here independently, by
searching the written text for the edited line).
"""

from __future__ import annotations

import decimal
import json
import re
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.sim.interfaces import BenchWiring, LoadSpec, SenseSpec, WorldConfig
from rig.planning.benchfile import (
    PROFILES_DIR,
    SIM_METERS_DIR,
    Limits,
    Load,
    netlist_modes,
    parse_si,
    read_bench_file,
    resolve_meter_model,
)
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rigbase.errors import FileFormatError

ROOT = Path(__file__).resolve().parents[2]
SEQUENCES = ROOT / "sequences"
SIM_BENCH = SEQUENCES / "benches" / "sim-demo.toml"
LAB_BENCH = SEQUENCES / "benches" / "lab-template.toml"

NETLIST = """
[meter]
format = 1
model = "Unit-test meter"
modes = ["AC V", "AC mV", "DC V"]
input = "VIN"
common = "COM"

[[element]]
name = "C_in"
kind = "C"
nodes = ["VIN", "COM"]
farads = 1e-6
"""

SEQUENCE = """\
[sequence]
name = "unit test"
repetitions = 3
order = "grouped"

[[meters]]
model = "Meter X"
serial = "X-1"
modes = ["AC V", "DC V"]
sim_model = "net.toml"

[[meters]]
model = "Meter Y"
serial = "Y-1"
modes = ["AC V"]
sim_model = "net.toml"

[charge]
volts = [500, 1000]
dwell_s = 0.5

[discharge]
loads = ["short", "500R"]
delays_s = [0, 0.1]

[bleed]
hold_s = 0.2

[scope]
sample_interval_s = "1n"
points = 20000
trigger_offset_s = "-2u"

[[limits]]
metric = "abs_peak_a"
max = 15
"""


def edit(text: str, old: str, new: str) -> str:
    """Replace ``old`` (which must occur exactly once) by ``new``."""
    assert text.count(old) == 1, f"{old!r} occurs {text.count(old)} times"
    return text.replace(old, new)


def line_of(text: str, needle: str) -> int:
    """1-based line of the only non-comment line containing ``needle``."""
    hits = [
        i
        for i, line in enumerate(text.splitlines(), 1)
        if needle in line and not line.lstrip().startswith("#")
    ]
    assert len(hits) == 1, f"{needle!r} on lines {hits}"
    return hits[0]


@pytest.fixture
def sim_bench_text() -> str:
    return SIM_BENCH.read_text(encoding="utf-8")


@pytest.fixture
def sim_bench(tmp_path):
    return load_bench(SIM_BENCH)


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def bench_error(tmp_path: Path, text: str) -> FileFormatError:
    path = write(tmp_path, "bench.toml", text)
    with pytest.raises(FileFormatError) as info:
        load_bench(path)
    err = info.value
    assert err.path == str(path)
    assert str(path) in str(err) and err.problem in str(err)
    return err


def seq_error(tmp_path: Path, text: str, bench) -> FileFormatError:
    write(tmp_path, "net.toml", NETLIST)
    path = write(tmp_path, "seq.toml", text)
    with pytest.raises(FileFormatError) as info:
        load_sequence(path, bench)
    err = info.value
    assert err.path == str(path)
    assert str(path) in str(err) and err.problem in str(err)
    if err.key:
        assert f"[{err.key}]" in str(err)
    return err


# --------------------------------------------------------------------------------------------
# shipped files


@pytest.mark.parametrize("name", ["qualification", "self-discharge", "repair-check"])
@pytest.mark.parametrize("bench_path", [SIM_BENCH, LAB_BENCH])
def test_shipped_files_load(name, bench_path):
    bench = load_bench(bench_path)
    seq = load_sequence(SEQUENCES / f"{name}.toml", bench)
    assert seq.meters and seq.volts and seq.repetitions >= 1
    assert max(seq.volts) <= bench.limits.max_volts
    json.dumps(bench.raw)
    json.dumps(seq.raw)


def test_sim_demo_bench_values():
    bench = load_bench(SIM_BENCH)
    assert bench.uses_simulation and bench.simulation is not None
    assert bench.simulation.clock == "virtual"
    assert set(bench.instruments) == {"supply", "switch", "scope", "meter"}
    assert bench.instruments["supply"].profile == PROFILES_DIR / "scpi1999.toml"
    assert bench.charge_ohms == 100e3 and bench.bleed_ohms == 10e3
    assert bench.load("short") == Load("short", 0.05, 200e-9, 4)
    assert bench.load("500R") == Load("500R", 500.0, 300e-9, 5)
    assert bench.divider_ratio == 1000 and bench.divider_ohms == 100e6
    assert bench.limits.max_volts == 1100 and bench.limits.safe_residual_volts == 1
    world = bench.simulation.world
    assert isinstance(world, WorldConfig)
    assert world.wiring == BenchWiring(
        charge_channel=1,
        discharge_channel=2,
        bleed_channel=3,
        supply_output_ohms=1e3,
        charge_ohms=100e3,
        bleed_ohms=10e3,
        loads=tuple(LoadSpec(ld.name, ld.ohms, ld.henry, ld.channel) for ld in bench.loads),
        sense=SenseSpec(**vars(bench.sense)),
        divider_ratio=1000.0,
        divider_ohms=100e6,
    )
    assert Path(world.meter_model) == SIM_METERS_DIR / "demo-a.toml"
    assert bench.raw["charge_ohms"] == 100e3  # the SI string resolved to a number


def test_simulation_table_is_read_by_the_simulator_for_check_and_run_alike(tmp_path):
    """The controller's reader leaves [simulation] unread; the opener's load_bench (which
    check, run, resume and sim serve all call) has the simulator read it, typos included."""
    unread = read_bench_file(SIM_BENCH)
    assert unread.simulation is not None and unread.simulation.world is None
    text = SIM_BENCH.read_text().replace("[simulation]", "[simulation]\nnoise_volt = 1e-3", 1)
    bad = tmp_path / "bench.toml"
    bad.write_text(text)
    read_bench_file(bad)  # the controller does not know the simulator's keys
    with pytest.raises(
        FileFormatError, match=r"simulation\.noise_volt.*did you mean 'noise_volts'"
    ):
        load_bench(bad)


def test_lab_template_is_real_hardware_with_manual_meter():
    bench = load_bench(LAB_BENCH)
    assert not bench.uses_simulation and bench.simulation is None
    meter = bench.instruments["meter"]
    assert meter.control == "manual" and meter.resource is None
    assert bench.instruments["supply"].resource.startswith("TCPIP0::")


def test_qualification_matches_the_demo_brief():
    bench = load_bench(SIM_BENCH)
    seq = load_sequence(SEQUENCES / "qualification.toml", bench)
    assert [m.sim_model for m in seq.meters] == [
        SIM_METERS_DIR / "demo-a.toml",
        SIM_METERS_DIR / "demo-b.toml",
    ]
    assert all(m.modes == ("AC V", "AC mV", "DC V") for m in seq.meters)
    assert seq.volts == (500.0, 1000.0) and seq.loads == ("short",) and seq.repetitions == 25
    assert seq.captures == ("peak", "charge")
    s = seq.scope_for("AC V")  # the first capture: the fast one
    assert s == seq.scope_for("AC V", "peak")
    assert (s.sample_interval_s, s.points, s.trigger_offset_s) == (1e-9, 20000, -2e-6)
    assert (s.trigger_level_amps, s.bits, s.trigger_slope) == (0.2, 16, "POSitive")
    assert s.bandwidth_hz == 500e6
    assert s.voltage_range_volts == pytest.approx(2.2 * 1000)
    q = seq.scope_for("AC V", "charge")  # the long one: 120 ms of tail after 10 ms of baseline
    assert (q.sample_interval_s, q.points, q.trigger_offset_s) == (5e-6, 26_000, -10e-3)
    assert q.record_s + q.trigger_offset_s == pytest.approx(120e-3)  # 120 ms after the trigger
    assert q.bandwidth_hz == 2e6 and q.bits == 16 and q.sampling == "mean"
    for mode in seq.modes:
        for capture in seq.captures:
            c = seq.scope_for(mode, capture)
            # the demo meters peak near 27 A (demo-a) and 37 A (demo-b) at 1000 V, positive:
            # the window must hold them with margin and reach a little below zero
            low = c.current_offset_amps - c.current_range_amps / 2
            high = c.current_offset_amps + c.current_range_amps / 2
            if c.sampling == "mean":
                # each sample the mean over its interval: at worst the whole fast charge of
                # demo-b at 1000 V (its 1.72 nF on DC paths) falls into one sample
                assert low < 0 and high >= 1.4 * 1000 * 1.72e-9 / c.sample_interval_s
            else:
                assert low < 0 and high >= 1.4 * 37.0
    assert seq.limits[0].metric == "abs_peak_a" and seq.limits[0].statistic == "utl"
    assert seq.limits[0].captures == ("peak",)


def test_safety_defaults_are_the_iec_61010_values():
    lim = Limits(max_volts=1000.0, current_limit_amps=0.01)
    # IEC 61010-1 (earlier editions): hazardous live 60 V d.c. (edition 3, 2010: 70 V d.c.)
    assert lim.hazardous_live_volts == 60.0
    # IEC 61010-1: stored-charge limit 45 uC for voltages up to 15 kV
    assert lim.stored_charge_limit_c == 45e-6
    assert lim.safe_residual_volts == 1.0  # project default (common practice, no source)


# --------------------------------------------------------------------------------------------
# SI numbers


@pytest.mark.parametrize(
    ("text", "key", "expected"),
    [
        ("100k", "charge_ohms", 100e3),
        ("200n", "henry", 200e-9),
        ("1.5e3", "max_volts", 1500.0),
        ("2.2 uH", "x_henry", 2.2e-6),
        ("2.2\u00b5", "x_henry", 2.2e-6),
        ("-2u", "trigger_offset_s", -2e-6),
        ("5 ms", "dwell_s", 5e-3),
        ("100M", "divider_ohms", 100e6),
        ("1 Mohm", "divider_ohms", 1e6),
        ("45u", "stored_charge_limit_c", 45e-6),
        ("12", "", 12.0),
    ],
)
def test_parse_si_accepts(text, key, expected):
    assert parse_si(text, key) == expected


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("abc", "ohms"),
        ("1..2", "ohms"),
        ("100q", "ohms"),
        ("10 kV", "charge_ohms"),
        ("", "x"),
        ("1 k k", "ohms"),
        ("nan", "ohms"),
    ],
)
def test_parse_si_refuses_nonsense(text, key):
    with pytest.raises(ValueError, match="number|prefix"):
        parse_si(text, key)


PREFIX_EXP = {"f": -15, "p": -12, "n": -9, "u": -6, "m": -3, "k": 3, "M": 6, "G": 9, "T": 12}


@settings(max_examples=80, deadline=None)
@given(
    mantissa=st.decimals(min_value=-1e6, max_value=1e6, places=4, allow_nan=False),
    prefix=st.sampled_from(sorted(PREFIX_EXP)),
)
def test_parse_si_equals_python_float_of_the_exponent_form(mantissa, prefix):
    # Reference: Python's correctly rounded float() of the same value in e-notation.
    text = f"{mantissa}{prefix}"
    exact = decimal.Decimal(str(mantissa)).scaleb(PREFIX_EXP[prefix])
    assert parse_si(text) == float(exact)


# --------------------------------------------------------------------------------------------
# malformed bench files


def test_bench_negative_resistance(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, 'charge_ohms = "100k"', "charge_ohms = -100e3")
    err = bench_error(tmp_path, text)
    assert err.key == "parts.charge_ohms"
    assert "must be positive" in err.problem
    assert err.line == line_of(text, "charge_ohms = -100e3")


def test_bench_duplicate_channels(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, "bleed = 3 ", "bleed = 2 ")
    err = bench_error(tmp_path, text)
    assert err.key == "channels.bleed"
    assert "already used by channels.discharge" in err.problem
    assert err.line == line_of(text, "bleed = 2 ")


def test_bench_load_on_a_path_channel(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, "channel = 5\n", "channel = 1\n")
    err = bench_error(tmp_path, text)
    assert err.key == "loads[1].channel"
    assert "already used by channels.charge" in err.problem
    assert err.line == line_of(text, "channel = 1")


def test_bench_unknown_key_with_suggestion(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, "max_volts = 1100", "max_volt = 1100")
    err = bench_error(tmp_path, text)
    assert err.key == "limits.max_volt"
    assert "did you mean 'max_volts'?" in err.problem
    assert err.line == line_of(text, "max_volt = 1100")


def test_bench_bad_si_string(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, 'bleed_ohms = "10k"', 'bleed_ohms = "10 kV"')
    err = bench_error(tmp_path, text)
    assert err.key == "parts.bleed_ohms"
    assert "unknown prefix or unit" in err.problem
    assert err.line == line_of(text, 'bleed_ohms = "10 kV"')


def test_bench_mixing_sim_and_real(tmp_path, sim_bench_text):
    text = sim_bench_text.replace(
        '[instruments.scope]                  # digitising oscilloscope: input 1 current, input 2 voltage\nresource = "sim"',
        '[instruments.scope]\nresource = "TCPIP0::scope.example.invalid::inst0::INSTR"',
    )
    assert text != sim_bench_text
    err = bench_error(tmp_path, text)
    assert err.key == "instruments.scope.resource"
    assert "mixes simulated" in err.problem
    assert err.line == line_of(text, "scope.example.invalid")


def test_bench_toml_syntax_error_has_its_line(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, "discharge = 2 ", "discharge = = 2 ")
    err = bench_error(tmp_path, text)
    assert err.key == ""
    assert err.problem.startswith("TOML syntax error")
    assert err.line == line_of(text, "discharge = = 2")


def test_bench_missing_required_key(tmp_path, sim_bench_text):
    text = re.sub(r"(?m)^current_limit_amps = .*\n", "", sim_bench_text)
    err = bench_error(tmp_path, text)
    assert err.key == "limits.current_limit_amps"
    assert "missing required key" in err.problem
    assert err.line == line_of(text, "[limits]")  # the table where it belongs


def test_bench_wrong_type(tmp_path, sim_bench_text):
    text = edit(sim_bench_text, "charge = 1 ", 'charge = "one" ')
    err = bench_error(tmp_path, text)
    assert err.key == "channels.charge"
    assert "is not a number" in err.problem


def test_bench_bad_visa_resource(tmp_path):
    text = edit(LAB_BENCH.read_text(encoding="utf-8"), "TCPIP0::hv-supply", "TCPIQ0::hv-supply")
    err = bench_error(tmp_path, text)
    assert err.key == "instruments.supply.resource"
    assert "VISA resource string" in err.problem


def test_bench_unknown_profile_suggests(tmp_path, sim_bench_text):
    text = sim_bench_text.replace('profile = "scpi1999"', 'profile = "scpi199"', 1)
    err = bench_error(tmp_path, text)
    assert err.key == "instruments.supply.profile"
    assert "did you mean 'scpi1999'?" in err.problem


def test_simulation_table_refused_on_real_bench(tmp_path):
    text = LAB_BENCH.read_text(encoding="utf-8") + '\n[simulation]\nclock = "virtual"\n'
    err = bench_error(tmp_path, text)
    assert err.key == "simulation"
    assert err.line == line_of(text, "[simulation]")


# --------------------------------------------------------------------------------------------
# sequences


def test_sequence_resolves(tmp_path, sim_bench):
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", SEQUENCE), sim_bench)
    assert seq.meters[0].sim_model == (tmp_path / "net.toml").resolve()
    assert seq.modes == ("AC V", "DC V")
    assert seq.delays_s == (0.0, 0.1) and seq.hold_s == 0.2 and seq.charge_done_amps is None
    assert seq.scope.trigger_offset_s == -2e-6
    assert seq.scope_for("DC V") is seq.scope
    assert seq.captures == ("main",)  # no [scope.captures]: one capture
    assert seq.scope_for("DC V", "main") is seq.scope
    with pytest.raises(KeyError):
        seq.scope_for("DC V", "peak")


def test_scope_override_per_mode(tmp_path, sim_bench):
    text = edit(
        SEQUENCE,
        'trigger_offset_s = "-2u"\n',
        'trigger_offset_s = "-2u"\n\n[scope.modes."DC V"]\ncurrent_range_amps = 10\n',
    )
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    assert seq.scope_for("DC V") == replace(seq.scope, current_range_amps=10.0)
    assert seq.scope_for("AC V") == seq.scope


def test_sequence_unknown_key_with_suggestion(tmp_path, sim_bench):
    text = edit(SEQUENCE, "repetitions = 3", "repetitons = 3")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "sequence.repetitons"
    assert "did you mean 'repetitions'?" in err.problem
    assert err.line == line_of(text, "repetitons")


def test_sequence_volts_above_max_volts(tmp_path, sim_bench):
    text = edit(SEQUENCE, "volts = [500, 1000]", "volts = [500, 1000, 1500]")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "charge.volts[2]"
    assert "1500 V is above the maximum 1100 V" in err.problem
    assert "max_volts" in err.problem
    assert err.line == line_of(text, "volts = [500, 1000, 1500]")


def test_sequence_out_of_range_voltage(tmp_path, sim_bench):
    text = edit(SEQUENCE, "volts = [500, 1000]", "volts = [500, -10]")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "charge.volts[1]" and "must be positive" in err.problem


def test_sequence_wrong_type(tmp_path, sim_bench):
    text = edit(SEQUENCE, "dwell_s = 0.5", "dwell_s = true")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "charge.dwell_s"
    assert "must be a number, not true/false" in err.problem
    assert err.line == line_of(text, "dwell_s = true")


def test_sequence_points_must_be_whole(tmp_path, sim_bench):
    text = edit(SEQUENCE, "points = 20000", "points = 2.5e4")
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    assert seq.scope.points == 25000 and isinstance(seq.scope.points, int)
    text = edit(SEQUENCE, "points = 20000", "points = 20000.5")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.points" and "whole number" in err.problem


def test_sequence_unknown_load(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'loads = ["short", "500R"]', 'loads = ["shrot"]')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "discharge.loads[0]"
    assert "did you mean 'short'?" in err.problem
    assert err.line == line_of(text, 'loads = ["shrot"]')


def test_sequence_unknown_mode_for_sim_meter(tmp_path, sim_bench):
    # "Ohm" is a function the SCPI profile knows, but not a mode of this meter's netlist.
    text = edit(SEQUENCE, 'modes = ["AC V"]', 'modes = ["AC V", "Ohm"]')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "meters[1].modes[1]"  # the second [[meters]] table
    assert "not in netlist net.toml" in err.problem
    assert err.line == line_of(text, 'modes = ["AC V", "Ohm"]')


def test_sequence_missing_required_key(tmp_path, sim_bench):
    text = edit(SEQUENCE, "dwell_s = 0.5\n", "")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "charge.dwell_s" and "missing required key 'dwell_s'" in err.problem
    assert err.line == line_of(text, "[charge]")


def test_sequence_sim_model_required_on_sim_bench(tmp_path, sim_bench):
    text = edit(
        SEQUENCE,
        'serial = "Y-1"\nmodes = ["AC V"]\nsim_model = "net.toml"',
        'serial = "Y-1"\nmodes = ["AC V"]',
    )
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "meters[1].sim_model" and "simulated" in err.problem
    assert err.line == line_of(text, 'serial = "Y-1"') - 2  # the second [[meters]] header


def test_sequence_toml_syntax_error(tmp_path, sim_bench):
    text = edit(SEQUENCE, "hold_s = 0.2", "hold_s = [0.2")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.problem.startswith("TOML syntax error") and err.line is not None
    assert err.line >= line_of(text, "hold_s = [0.2")


def test_sequence_bad_si_string(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'sample_interval_s = "1n"', 'sample_interval_s = "1 nano"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.sample_interval_s" and "unknown prefix or unit" in err.problem


def test_sequence_shuffled_needs_seed(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'order = "grouped"', 'order = "shuffled"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "sequence.shuffle_seed"


def test_sequence_bad_choice_suggests(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'order = "grouped"', 'order = "grouped-ish"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "sequence.order" and "did you mean 'grouped'?" in err.problem


def test_sequence_pretrigger_longer_than_record(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'trigger_offset_s = "-2u"', 'trigger_offset_s = "-30u"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.trigger_offset_s" and "longer than the record" in err.problem


def test_sequence_override_for_unknown_mode(tmp_path, sim_bench):
    text = SEQUENCE + '\n[scope.modes."AC mv"]\npoints = 1000\n'
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == 'scope.modes."AC mv"' and "did you mean 'AC V'?" in err.problem
    assert err.line == line_of(text, '[scope.modes."AC mv"]')


def test_limit_metric_and_scope(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'metric = "abs_peak_a"', 'metric = "abs_peak"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "limits[0].metric" and "did you mean 'abs_peak_a'?" in err.problem
    text = edit(SEQUENCE, "max = 15", "max = 15\nvolts = [750]")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "limits[0].volts[0]" and "not one of the sequence's" in err.problem


def test_real_bench_skips_netlist_mode_check_but_checks_profile_functions(tmp_path):
    lab = load_bench(LAB_BENCH)  # manual meter: any mode name is fine
    write(tmp_path, "net.toml", NETLIST)
    text = edit(SEQUENCE, 'modes = ["AC V"]', 'modes = ["AC V", "Ohm"]')
    seq = load_sequence(write(tmp_path, "seq.toml", text), lab)
    assert seq.meters[1].modes == ("AC V", "Ohm")


def test_netlist_modes_and_meter_model_resolution(tmp_path):
    assert resolve_meter_model("demo-a") == SIM_METERS_DIR / "demo-a.toml"
    path = write(tmp_path, "net.toml", NETLIST)
    assert resolve_meter_model("net.toml", tmp_path) == path.resolve()
    assert netlist_modes(path) == ("AC V", "AC mV", "DC V")
    with pytest.raises(FileFormatError, match="not found"):
        resolve_meter_model("demo-zz")


def test_line_index_handles_arrays_of_tables_dotted_and_quoted_keys():
    from rigbase.tomlcheck import _index_lines

    text = "\n".join(
        [
            'title = "x"',  # 1
            "[[meters]]",  # 2
            'model = "A"',  # 3
            "[[meters]]",  # 4
            'note = """',  # 5
            "model = not a key inside a string",  # 6
            '"""',  # 7
            'model = "B"',  # 8
            "[meters.extra]",  # 9  belongs to the second [[meters]]
            "depth.inner = 1",  # 10
            '[scope.modes."AC mV"]',  # 11
            "points = 1000  # comment",  # 12
        ]
    )
    lines = _index_lines(text)
    assert lines[("title",)] == 1
    assert lines[("meters", 0, "model")] == 3
    assert lines[("meters", 1)] == 4
    assert lines[("meters", 1, "model")] == 8
    assert lines[("meters", 1, "extra", "depth", "inner")] == 10
    assert lines[("scope", "modes", "AC mV", "points")] == 12


def test_scpi_meter_modes_must_be_in_its_profile(tmp_path, sim_bench):
    # the sim-demo meter is set over SCPI: a mode needs a function in the profile
    text = edit(SEQUENCE, 'modes = ["AC V"]', 'modes = ["AC A"]')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "meters[1].modes[0]"
    assert "unknown meter-profile mode 'AC A'" in err.problem


# --------------------------------------------------------------------------------------------
# scope captures

CAPTURES = """
[scope.captures.fast]
points = 5000

[scope.captures.slow]
sample_interval_s = "200n"
points = 250000
trigger_offset_s = "-20u"
current_range_amps = 20
"""


def test_capture_tables_in_file_order(tmp_path, sim_bench):
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    assert seq.captures == ("fast", "slow")
    assert seq.scope_for("AC V") == seq.scope_for("AC V", "fast")
    assert seq.scope_for("AC V", "fast") == replace(seq.scope, points=5000)
    slow = seq.scope_for("DC V", "slow")
    assert slow == replace(
        seq.scope,
        sample_interval_s=200e-9,
        points=250_000,
        trigger_offset_s=-20e-6,
        current_range_amps=20.0,
    )
    assert slow.record_s == pytest.approx(0.05)
    json.dumps(seq.raw)  # the manifest keeps the captures


def test_override_order_base_then_capture_then_mode(tmp_path, sim_bench):
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text += '\n[scope.modes."DC V"]\ncurrent_range_amps = 10\nbits = 16\n'
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    # the mode override wins over the capture's (20 A) and the base (40 A default)
    assert seq.scope_for("DC V", "slow").current_range_amps == 10.0
    assert seq.scope_for("DC V", "slow").points == 250_000  # the capture's, not the base's
    assert seq.scope_for("DC V", "fast").points == 5000
    assert seq.scope_for("DC V", "fast").bits == 16
    # a mode without overrides keeps the capture's values over the base's
    assert seq.scope_for("AC V", "slow").current_range_amps == 20.0
    assert seq.scope_for("AC V", "fast").current_range_amps == seq.scope.current_range_amps
    assert seq.scope_for("AC V", "fast").bits == 8


def test_capture_unknown_key_with_suggestion(tmp_path, sim_bench):
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text = edit(text, "points = 5000", "point = 5000")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.captures.fast.point"
    assert "did you mean 'points'?" in err.problem
    assert err.line == line_of(text, "point = 5000")


def test_capture_values_are_checked_like_the_base(tmp_path, sim_bench):
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text = edit(text, 'trigger_offset_s = "-20u"', 'trigger_offset_s = "-60m"')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.captures.slow.trigger_offset_s"
    assert "longer than the record" in err.problem
    assert err.line == line_of(text, 'trigger_offset_s = "-60m"')
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text = edit(text, "current_range_amps = 20", "current_range_amps = -20")
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.captures.slow.current_range_amps"


def test_mode_override_checked_against_every_capture(tmp_path, sim_bench):
    # 30 us of pre-trigger fits the slow capture's 50 ms record, not the fast one's 5 us
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text += '\n[scope.modes."DC V"]\ntrigger_offset_s = "-30u"\n'
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == 'scope.modes."DC V".trigger_offset_s'
    assert "longer than the record" in err.problem and "'fast'" in err.problem


def test_capture_table_must_be_a_table(tmp_path, sim_bench):
    text = edit(SEQUENCE, 'trigger_offset_s = "-2u"', 'trigger_offset_s = "-2u"\ncaptures = 3')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "scope.captures" and "must be a table" in err.problem


def test_limit_restricted_to_one_capture(tmp_path, sim_bench):
    text = edit(SEQUENCE, "\n[[limits]]", CAPTURES + "\n[[limits]]")
    text = edit(text, "max = 15", 'max = 15\ncaptures = ["fast"]')
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", text), sim_bench)
    lim = seq.limits[0]
    assert lim.captures == ("fast",)
    assert lim.applies("AC V", 500.0, "short", "fast")
    assert not lim.applies("AC V", 500.0, "short", "slow")
    assert not lim.applies("AC V", 500.0, "short")
    text = edit(text, 'captures = ["fast"]', 'captures = ["fats"]')
    err = seq_error(tmp_path, text, sim_bench)
    assert err.key == "limits[0].captures[0]" and "did you mean 'fast'?" in err.problem


def test_limit_without_captures_applies_to_all(tmp_path, sim_bench):
    write(tmp_path, "net.toml", NETLIST)
    seq = load_sequence(write(tmp_path, "seq.toml", SEQUENCE), sim_bench)
    lim = seq.limits[0]
    assert lim.captures is None
    assert lim.applies("AC V", 500.0, "short", "main") and lim.applies("AC V", 500.0, "short")
