"""Sequence files and their scope captures: a good file resolves; a malformed one gives one
clear error naming the file, the dotted key, the problem and its line (helpers in
tests/file_fixtures.py)."""

from __future__ import annotations

import json
from dataclasses import replace

import pytest

from rig.planning.benchfile import (
    SIM_METERS_DIR,
    netlist_modes,
    resolve_meter_model,
)
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench
from rigbase.errors import FileFormatError
from tests.file_fixtures import (
    LAB_BENCH,
    NETLIST,
    SEQUENCE,
    edit,
    line_of,
    seq_error,
    write,
)

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
