"""Bench and sequence files: the shipped files load; malformed files give one clear error.

Each malformed case checks that the one FileFormatError names the file, the dotted key, the
problem and the line where that key stands (the line is found here independently, by
searching the written text for the edited line).
"""

from __future__ import annotations

import decimal
import json
import re
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
    parse_si,
    read_bench_file,
)
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rigbase.errors import FileFormatError
from tests.file_fixtures import (
    LAB_BENCH,
    SEQUENCES,
    SIM_BENCH,
    bench_error,
    edit,
    line_of,
)

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
