"""The plan: event order and counts, seeded shuffling, duration estimate, safety review."""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import replace
from itertools import groupby
from pathlib import Path

import pytest

from rig.planning.benchfile import Bench
from rig.planning.plan import (
    EVENT_OVERHEAD_S,
    METER_CHANGE_S,
    MODE_CHANGE_SCPI_S,
    Event,
    build_plan,
    event_key,
    meter_capacitance_f,
)
from rig.planning.review import describe, safety_review
from rig.planning.sequence import load_sequence
from rig.runner.opener import load_bench

ROOT = Path(__file__).resolve().parents[2]
SIM_BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"
LAB_BENCH = ROOT / "sequences" / "benches" / "lab-template.toml"

C_IN = 1e-6  # farads in the test netlist

NETLIST = f"""
[meter]
format = 1
model = "Unit-test meter"
modes = ["AC V", "AC mV", "DC V"]
input = "VIN"
common = "COM"

[[element]]
name = "C_a"
kind = "C"
nodes = ["VIN", "COM"]
farads = {C_IN * 0.25}

[[element]]
name = "C_b"
kind = "C"
nodes = ["VIN", "x"]
farads = {C_IN * 0.75}

[[element]]
name = "R_x"
kind = "R"
nodes = ["x", "COM"]
ohms = 1e6
"""

SEQUENCE = """\
[sequence]
name = "unit test"
repetitions = {reps}
order = "{order}"
{seed}

[[meters]]
model = "Meter X"
serial = "X-1"
modes = ["AC V", "DC V", "AC mV"]
sim_model = "net.toml"

[[meters]]
model = "Meter Y"
serial = "Y-1"
modes = ["DC V", "AC V"]
sim_model = "net.toml"

[charge]
volts = [1000, 500]
dwell_s = {dwell}

[discharge]
loads = ["short", "500R"]
delays_s = [0, 0.1]

[bleed]
hold_s = {hold}

[scope]
sample_interval_s = "1n"
points = 20000
"""


def make(
    tmp_path: Path,
    bench: Bench | None = None,
    *,
    reps: int = 3,
    order: str = "grouped",
    seed: int | None = None,
    dwell: float = 1.0,
    hold: float = 0.5,
    text: str | None = None,
):
    bench = bench or load_bench(SIM_BENCH)
    (tmp_path / "net.toml").write_text(NETLIST, encoding="utf-8")
    text = text or SEQUENCE.format(
        reps=reps,
        order=order,
        seed="" if seed is None else f"shuffle_seed = {seed}",
        dwell=dwell,
        hold=hold,
    )
    path = tmp_path / "seq.toml"
    path.write_text(text, encoding="utf-8")
    seq = load_sequence(path, bench)
    return bench, seq, build_plan(seq, bench)


def blocks(plan):
    """(meter_index, mode) of each contiguous block of events, in order."""
    return [k for k, _ in groupby(plan.events, key=lambda e: (e.meter_index, e.mode))]


def test_grouped_order_and_counts(tmp_path):
    bench, seq, plan = make(tmp_path)
    # 5 (meter, mode) blocks x 2 volts x 2 loads x 2 delays x 3 reps
    assert len(plan.events) == 5 * 2 * 2 * 2 * 3 == 120
    assert [e.index for e in plan.events] == list(range(120))
    assert blocks(plan) == [(0, "AC V"), (0, "DC V"), (0, "AC mV"), (1, "DC V"), (1, "AC V")]
    assert plan.mode_changes == 4 and plan.meter_changes == 1
    assert plan.max_volts == 1000.0
    first = plan.events[:24]  # the first block: file order of volts, loads, delays, reps
    expected = [
        (v, ld, d, r)
        for v in (1000, 500)
        for ld in ("short", "500R")
        for d in (0, 0.1)
        for r in range(3)
    ]
    assert [(e.volts, e.load, e.delay_s, e.rep) for e in first] == expected
    assert {e.load: e.load_ohms for e in plan.events} == {"short": 0.05, "500R": 500.0}
    assert len({e.key for e in plan.events}) == 120
    assert plan.events[10].key == "m0|AC V|main|1000|500R|0.1|r001"
    assert {e.capture for e in plan.events} == {"main"}  # no capture tables: one capture
    assert (plan.events[0].meter, plan.events[0].serial) == ("Meter X", "X-1")


def test_event_dict_has_the_journal_columns(tmp_path):
    _, _, plan = make(tmp_path)
    row = plan.events[0].to_dict()
    # journal.jsonl contract in DEVELOPERS.md ("Run folder")
    for column in (
        "key",
        "meter",
        "serial",
        "mode",
        "capture",
        "volts",
        "load",
        "load_ohms",
        "delay_s",
        "rep",
    ):
        assert column in row
    assert Event(**row) == plan.events[0]


def test_event_key_format():
    assert event_key(0, "AC V", "peak", 1000.0, "short", 0.0, 7) == "m0|AC V|peak|1000|short|0|r007"
    assert (
        event_key(2, "AC mV", "main", 512.5, "500R", 0.05, 12)
        == "m2|AC mV|main|512.5|500R|0.05|r012"
    )


CAPTURES = """
[scope.captures.peak]
points = 20000

[scope.captures.charge]
sample_interval_s = "200n"
points = 250000
trigger_offset_s = "-20u"
"""


def with_captures(**kw) -> str:
    args = dict(reps=3, order="grouped", seed="", dwell=1.0, hold=0.5) | kw
    return SEQUENCE.format(**args) + CAPTURES


def test_captures_order_meter_mode_capture_then_the_rest(tmp_path):
    bench, seq, plan = make(tmp_path, text=with_captures())
    assert seq.captures == ("peak", "charge")
    assert len(plan.events) == 2 * 120  # every event once per capture
    runs = [k for k, _ in groupby(plan.events, key=lambda e: (e.meter_index, e.mode, e.capture))]
    assert runs == [
        (0, "AC V", "peak"),
        (0, "AC V", "charge"),
        (0, "DC V", "peak"),
        (0, "DC V", "charge"),
        (0, "AC mV", "peak"),
        (0, "AC mV", "charge"),
        (1, "DC V", "peak"),
        (1, "DC V", "charge"),
        (1, "AC V", "peak"),
        (1, "AC V", "charge"),
    ]  # the scope is set up once per (mode, capture): 10 set-ups, not one per event
    assert plan.mode_changes == 4 and plan.meter_changes == 1  # captures are no mode change
    inner = [(e.volts, e.load, e.delay_s, e.rep) for e in plan.events[24:48]]
    assert inner == [
        (v, ld, d, r)
        for v in (1000, 500)
        for ld in ("short", "500R")
        for d in (0, 0.1)
        for r in range(3)
    ]
    assert plan.events[24 + 10].key == "m0|AC V|charge|1000|500R|0.1|r001"
    assert plan.events[10].key == "m0|AC V|peak|1000|500R|0.1|r001"
    assert len({e.key for e in plan.events}) == 240
    assert plan.events[30].to_dict()["capture"] == "charge"


def test_captures_estimate_uses_each_record(tmp_path):
    _, _, single = make(tmp_path, reps=2)
    _, _, both = make(tmp_path, text=with_captures(reps=2))
    n = len(single.events)
    # the peak capture equals the single one; the charge capture repeats its n events with a
    # 50 ms record instead of 20 us; scope set-ups cost nothing extra (no mode change)
    charge_events = [e for e in both.events if e.capture == "charge"]
    assert len(charge_events) == n
    extra = both.estimated_s - single.estimated_s
    per_event_single = (
        single.estimated_s - 4 * MODE_CHANGE_SCPI_S - MODE_CHANGE_SCPI_S - METER_CHANGE_S
    ) / n
    record_peak, record_charge = 20000 * 1e-9, 250000 * 200e-9
    assert extra == pytest.approx(n * (per_event_single - record_peak + record_charge), rel=1e-9)


def test_shuffled_captures_stay_in_their_blocks(tmp_path):
    _, _, grouped = make(tmp_path, text=with_captures())
    _, _, a = make(tmp_path, text=with_captures(order="shuffled", seed="shuffle_seed = 3"))
    key = lambda e: (e.meter_index, e.mode, e.capture)  # noqa: E731
    assert [k for k, _ in groupby(a.events, key=key)] == [
        k for k, _ in groupby(grouped.events, key=key)
    ]
    assert [e.key for e in a.events] != [e.key for e in grouped.events]
    # the first capture keeps the order a file without captures gets from the same seed
    _, _, plain = make(tmp_path, order="shuffled", seed=3)
    first = [e.key.replace("|peak|", "|main|") for e in a.events if e.capture == "peak"]
    assert first == [e.key for e in plain.events]


def test_describe_lists_the_captures(tmp_path):
    bench, seq, plan = make(tmp_path, text=with_captures())
    text = describe(plan, bench, seq)
    assert "captures  2 per event" in text
    assert "peak       1 ns, 20000 points = 20 us" in text
    assert "charge     200 ns, 250000 points = 50 ms" in text


def test_shuffle_is_reproducible_and_confined_to_blocks(tmp_path):
    _, _, grouped = make(tmp_path)
    _, _, a = make(tmp_path, order="shuffled", seed=11)
    _, _, b = make(tmp_path, order="shuffled", seed=11)
    _, _, c = make(tmp_path, order="shuffled", seed=12)
    keys = [[e.key for e in p.events] for p in (grouped, a, b, c)]
    assert keys[1] == keys[2]  # same seed, same order
    assert keys[1] != keys[3]  # another seed, another order
    assert keys[1] != keys[0]  # it did shuffle
    assert Counter(keys[1]) == Counter(keys[0])  # the same events
    # confined: the (meter, mode) blocks and mode changes are those of the grouped plan
    assert blocks(a) == blocks(grouped)
    assert a.mode_changes == grouped.mode_changes
    for block in blocks(grouped):
        in_a = {e.key for e in a.events if (e.meter_index, e.mode) == block}
        in_g = {e.key for e in grouped.events if (e.meter_index, e.mode) == block}
        assert in_a == in_g
    assert [e.index for e in a.events] == list(range(len(a.events)))


def test_shuffle_of_a_block_does_not_depend_on_other_meters(tmp_path):
    _, _, two = make(tmp_path, order="shuffled", seed=5)
    text = SEQUENCE.format(reps=3, order="shuffled", seed="shuffle_seed = 5", dwell=1, hold=0.5)
    start = text.index('[[meters]]\nmodel = "Meter Y"')
    one_text = text[:start] + text[text.index("[charge]") :]
    _, _, one = make(tmp_path, text=one_text)
    first_block = [e.key for e in two.events if e.meter_index == 0]
    assert [e.key for e in one.events] == first_block


def test_estimate_by_hand(tmp_path):
    bench, seq, plan = make(tmp_path, reps=2, dwell=1.0, hold=0.5)
    n = len(plan.events)
    record = 20000 * 1e-9
    # bleed to the safe residual: R_bleed C ln(V / V_safe), from the RC decay V exp(-t/RC)
    # (any circuits textbook)
    bleed = {v: 10e3 * C_IN * math.log(v / 1.0) for v in (1000.0, 500.0)}
    per_event = sum(
        1.0 + e.delay_s + record + bleed[e.volts] + 0.5 + EVENT_OVERHEAD_S for e in plan.events
    )
    blocks_n = len(blocks(plan))
    expected = per_event + blocks_n * MODE_CHANGE_SCPI_S + 1 * METER_CHANGE_S
    assert n == 5 * 2 * 2 * 2 * 2
    assert plan.estimated_s == pytest.approx(expected, rel=1e-12)


def test_meter_capacitance_sums_the_netlist(tmp_path):
    _, seq, _ = make(tmp_path)
    assert meter_capacitance_f(seq.meters[0]) == pytest.approx(C_IN)


def levels(findings, text):
    return [f.level for f in findings if text in f.message]


def test_review_of_the_demo_is_not_stopped():
    bench = load_bench(SIM_BENCH)
    seq = load_sequence(ROOT / "sequences" / "qualification.toml", bench)
    plan = build_plan(seq, bench)
    findings = safety_review(plan, bench, seq)
    assert not [f for f in findings if f.level == "stop"]
    assert levels(findings, "hazardous-live") == ["info"]  # simulated: information only
    assert levels(findings, "divider") == ["info"]


def test_review_stops_above_max_volts(tmp_path):
    bench, seq, plan = make(tmp_path)
    lower = replace(bench, limits=replace(bench.limits, max_volts=800.0))
    assert "stop" in levels(safety_review(plan, lower, seq), "max_volts 800 V")


def test_review_real_hardware_above_hazardous_live_warns(tmp_path):
    lab = load_bench(LAB_BENCH)
    _, seq, plan = make(tmp_path, lab)
    assert levels(safety_review(plan, lab, seq), "HIGH VOLTAGE") == ["warn"]
    below = replace(lab, limits=replace(lab.limits, hazardous_live_volts=2000.0))
    assert levels(safety_review(plan, below, seq), "HIGH VOLTAGE") == []


def test_review_short_dwell_gives_the_rc_charge_fraction(tmp_path):
    bench, seq, plan = make(tmp_path, dwell=0.2)
    tau = (100e3 + 1e3) * C_IN  # R_charge + supply output resistance (sim-demo bench)
    msgs = [
        f for f in safety_review(plan, bench, seq) if "shorter than 5 time constants" in f.message
    ]
    assert {f.level for f in msgs} == {"warn"} and len(msgs) == 2  # one per meter
    # charged fraction 1 - exp(-t/RC) (first-order RC charge, any circuits textbook)
    assert f"{100 * (1 - math.exp(-0.2 / tau)):.0f} %" in msgs[0].message
    _, seq_ok, plan_ok = make(tmp_path, dwell=5 * tau * 1.01)
    assert not [
        f
        for f in safety_review(plan_ok, bench, seq_ok)
        if f.level == "warn" and "time constants" in f.message
    ]


def test_review_bleed_slower_than_hold(tmp_path):
    bench, seq, plan = make(tmp_path, hold=0.01)
    # 10 kohm x 1 uF x ln(1000 V / 1 V) = 69 ms > 10 ms
    assert "warn" in levels(safety_review(plan, bench, seq), "the bleed needs about 0.0691 s")
    _, seq2, plan2 = make(tmp_path, hold=0.1)
    assert levels(safety_review(plan2, bench, seq2), "the bleed needs") == []


def test_review_stored_charge_against_45_uC(tmp_path):
    bench, seq, plan = make(tmp_path)  # 1 uF at 1000 V = 1 mC (Q = CV)
    assert "warn" in levels(safety_review(plan, bench, seq), "above the stored-charge limit")
    small = replace(bench, limits=replace(bench.limits, stored_charge_limit_c=2e-3))
    assert levels(safety_review(plan, small, seq), "stored-charge") == []


def test_review_without_divider_warns_residual_inferred(tmp_path):
    bench, seq, plan = make(tmp_path)
    assert levels(safety_review(plan, bench, seq), "only inferred") == []
    no_div = replace(bench, divider_ratio=None)
    assert levels(safety_review(plan, no_div, seq), "only inferred") == ["warn"]


def test_review_current_limit_below_charge_current(tmp_path):
    bench, seq, plan = make(tmp_path)
    low = replace(bench, limits=replace(bench.limits, current_limit_amps=1e-3))
    # 1000 V / 101 kohm = 9.9 mA > 1 mA
    assert levels(safety_review(plan, low, seq), "below the charge path") == ["warn"]
    assert levels(safety_review(plan, bench, seq), "below the charge path") == []


def test_describe_text(tmp_path):
    bench, seq, plan = make(tmp_path)
    text = describe(plan, bench, seq)
    assert "events    120" in text
    assert "4 mode changes, 1 meter changes" in text
    assert "highest   1000 V" in text
    assert "AC mV" in text and "24 events" in text
    assert "safety review:" in text and "WARN" in text
