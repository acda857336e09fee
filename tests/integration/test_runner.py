"""End-to-end runs through pyvisa-py against the simulated bench.

Interlocks are checked from the simulated world's ground truth (``world.history()`` and the
circuit state), never from what the runner believes.
"""

from __future__ import annotations

import json
import signal
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from drivers.sim.interfaces import Faults
from rig.planning.plan import build_plan
from rig.planning.sequence import load_sequence
from rig.runner.cycle import ExitPath, Observer, Phase, Runner
from rig.runner.opener import load_bench, open_bench
from rig.store.runfolder import RunWriter, read_journal, verify_run
from rig.store.waveform import load_waveform

ROOT = Path(__file__).resolve().parents[2]
BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"

SEQUENCE = """
[sequence]
name = "e2e"
operator_note = "integration test"
repetitions = {reps}
order = "grouped"

[[meters]]
model = "Test meter A"
serial = "T-0001"
rating = "CAT III 1000 V"
modes = {modes}
sim_model = "demo-a"

[charge]
volts = {volts}
dwell_s = 1.0

[discharge]
loads = ["short"]
delays_s = [0.0]

[bleed]
hold_s = 0.05

[scope]
sample_interval_s = 1e-9
points = {points}
trigger_offset_s = -1e-6
current_range_amps = 50.0
current_offset_amps = 20.0
trigger_level_amps = 0.2
trigger_slope = "POSitive"
bits = 8
bandwidth_hz = 500e6
"""


def write_sequence(
    tmp_path: Path, modes=("AC V", "AC mV", "DC V"), volts=(500, 1000), reps=20, points=5000
) -> Path:
    text = SEQUENCE.format(
        modes=json.dumps(list(modes)), volts=json.dumps(list(volts)), reps=reps, points=points
    )
    p = tmp_path / "seq.toml"
    p.write_text(text)
    return p


class Recorder(Observer):
    """Keeps ground truth before the bench closes; can inject an action at event k."""

    def __init__(self, at: int | None = None, phase: Phase = Phase.CHARGE, action=None):
        self.at, self.when, self.action = at, phase, action
        self.committed_rows: list[dict] = []
        self.bench = None

    def phase(self, event, phase):
        if self.at is not None and event.index == self.at and phase is self.when:
            self.at = None
            self.action(self.bench)

    def committed(self, row, waveform):
        self.committed_rows.append(row)


def run_once(tmp_path: Path, seq_path: Path, bench_cfg=None, observer: Recorder | None = None):
    bench_cfg = bench_cfg or load_bench(BENCH)
    seq = load_sequence(seq_path, bench_cfg)
    plan = build_plan(seq, bench_cfg)
    writer = RunWriter.create(
        tmp_path / "results",
        "run",
        {"status": "created"},
        [{**e.to_dict(), "event": e.index} for e in plan.events],
    )
    obs = observer or Recorder()
    first = seq.meters[plan.events[0].meter_index].sim_model
    with writer, open_bench(bench_cfg, first_sim_model=first) as ob:
        obs.bench = ob
        outcome = Runner(ob, bench_cfg, seq, plan, writer, observer=obs).run()
        world = ob.sim.world
        truth = {
            "history": world.history(),
            "input_volts": world.meter_input_volts(),
            "supply": world.supply_measure(),
        }
    return outcome, writer.path, plan, truth, bench_cfg


def assert_never_both(history, charge: int, discharge: int) -> None:
    """At no instant do charge and discharge contacts conduct together (ground truth)."""
    assert history, "the world recorded no history"
    for t, state in history:
        relays = state["relays"]
        both = relays.get(charge, False) and relays.get(discharge, False)
        assert not both, f"charge and discharge conducting together at t = {t}"


def assert_safe(truth, bench_cfg) -> None:
    """After any exit path: supply off at 0 V, charge and discharge open, residual safe."""
    last = truth["history"][-1][1]
    ch = bench_cfg.channels
    assert last["supply_on"] is False
    assert last["supply_volts"] == 0.0
    assert not last["relays"].get(ch.charge, False)
    assert not last["relays"].get(ch.discharge, False)
    assert abs(truth["input_volts"]) < bench_cfg.limits.safe_residual_volts


def test_full_run_three_modes_two_voltages_twenty_reps(tmp_path):
    outcome, run, plan, truth, cfg = run_once(tmp_path, write_sequence(tmp_path))
    assert outcome.status == "complete", outcome.error
    assert outcome.exit_path is ExitPath.NORMAL
    assert outcome.safe.reached
    rows = read_journal(run)
    assert len(rows) == len(plan.events) == 3 * 2 * 20
    assert sorted(r["event"] for r in rows) == list(range(120))
    for r in rows:
        assert r["status"] == "captured", r
        wf = load_waveform(run / r["file"])
        assert wf.channels[0] == "current" and wf.codes.shape[1] == 5000
    v = verify_run(run)
    assert v.ok and v.status == "complete", v.problems
    assert (run / "events.parquet").exists()
    assert_never_both(truth["history"], cfg.channels.charge, cfg.channels.discharge)
    assert_safe(truth, cfg)


def _exit_case(tmp_path, action, phase=Phase.CHARGE, faults: Faults | None = None):
    cfg = load_bench(BENCH)
    if faults is not None:
        sim = replace(cfg.simulation, world=replace(cfg.simulation.world, faults=faults))
        cfg = replace(cfg, simulation=sim)
    obs = Recorder(at=3, phase=phase, action=action) if action else Recorder()
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=6, points=2000)
    return run_once(tmp_path, seq, cfg, obs)


def _raise(exc):
    def act(bench):
        raise exc

    return act


@pytest.mark.parametrize(
    ("action", "phase", "expected"),
    [
        (_raise(KeyboardInterrupt()), Phase.CHARGE, ExitPath.CTRL_C),
        (lambda b: signal.raise_signal(signal.SIGTERM), Phase.DISCHARGE, ExitPath.SIGTERM),
        (_raise(RuntimeError("boom")), Phase.ISOLATE, ExitPath.EXCEPTION),
    ],
    ids=["ctrl-c-while-charged", "sigterm-at-discharge", "exception-while-isolating"],
)
def test_every_exit_path_ends_safe(tmp_path, action, phase, expected):
    outcome, run, plan, truth, cfg = _exit_case(tmp_path, action, phase)
    assert outcome.exit_path is expected
    assert outcome.status in ("interrupted", "failed")
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["exit_path"] == expected.value
    assert manifest["safe_state"]["reached"] is True
    assert_never_both(truth["history"], cfg.channels.charge, cfg.channels.discharge)
    assert_safe(truth, cfg)
    assert len(read_journal(run)) == 3  # events 0..2 committed, the one in flight is not


def test_lost_connection_ends_safe(tmp_path):
    def kill_scope(bench):
        # the scope's server goes away mid-event: the fetch fails, the rest must still go safe
        bench.sim.servers["scope"].close()

    outcome, run, plan, truth, cfg = _exit_case(tmp_path, kill_scope, Phase.ARM)
    assert outcome.exit_path in (ExitPath.CONNECTION, ExitPath.TIMEOUT)
    assert_safe(truth, cfg)
    # the residual could not be measured without the scope: the report must say so
    assert not outcome.safe.reached


def test_instrument_error_ends_safe(tmp_path):
    outcome, run, plan, truth, cfg = _exit_case(tmp_path, None, faults=Faults(scpi_error_every=40))
    assert outcome.exit_path is ExitPath.INSTRUMENT
    assert "SCPI error -200" in outcome.error
    assert_safe(truth, cfg)


def test_timeout_ends_safe(tmp_path):
    cfg = load_bench(BENCH)
    scope = replace(cfg.instruments["scope"], timeout_s=0.3)
    cfg = replace(cfg, instruments={**cfg.instruments, "scope": scope})

    def slow_scope(bench):
        bench.sim.servers["scope"].faults = Faults(slow_answer_s=0.6)

    obs = Recorder(at=2, phase=Phase.ARM, action=slow_scope)
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=4, points=2000)
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq, cfg, obs)
    assert outcome.exit_path is ExitPath.TIMEOUT
    assert_safe(truth, cfg)


def test_welded_discharge_relay_stops_the_run_before_a_discharge(tmp_path):
    """A contact that welds while its coil reads back open is caught by the charge check:
    the meter input does not reach the setpoint, and the run stops before discharging."""
    cfg = load_bench(BENCH)
    welded = Faults(relay_stuck_closed=(cfg.channels.discharge,))
    outcome, run, plan, truth, cfg = _exit_case(tmp_path, None, faults=welded)
    assert outcome.exit_path is ExitPath.INTERLOCK
    assert "welded" in outcome.error
    assert len(read_journal(run)) == 1  # it welds on the first discharge; the next charge fails
    # ground truth: the overlap lasted at most one charge dwell, through R_charge
    ch = cfg.channels
    hist = truth["history"]
    both = [
        (t, hist[i + 1][0] if i + 1 < len(hist) else t)
        for i, (t, s) in enumerate(hist)
        if s["relays"].get(ch.charge) and s["relays"].get(ch.discharge)
    ]
    assert both, "the fault was not exercised"
    assert sum(b - a for a, b in both) <= 1.0 + 1e-9  # dwell_s of write_sequence
    assert truth["supply"][1] == 0.0 or not hist[-1][1]["supply_on"]


def test_scope_that_never_triggers_records_not_captured(tmp_path):
    outcome, run, plan, truth, cfg = _exit_case(
        tmp_path, None, faults=Faults(scope_never_triggers=True)
    )
    assert outcome.status == "complete"
    rows = read_journal(run)
    assert rows and all(r["status"] == "not_captured" and r["file"] is None for r in rows)
    assert_safe(truth, cfg)


def test_resume_after_interrupt_completes_without_duplicates(tmp_path):
    outcome, run, plan, truth, cfg = _exit_case(tmp_path, _raise(KeyboardInterrupt()))
    assert outcome.status == "interrupted"
    seq = load_sequence(
        write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=6, points=2000), cfg
    )
    plan = build_plan(seq, cfg)
    writer = RunWriter.reopen(run)
    with writer, open_bench(cfg, first_sim_model=seq.meters[0].sim_model) as ob:
        outcome2 = Runner(ob, cfg, seq, plan, writer).run()
    assert outcome2.status == "complete"
    events = sorted(r["event"] for r in read_journal(run))
    assert events == list(range(len(plan.events)))
    assert verify_run(run).ok


def test_peak_current_matches_circuit_engine(tmp_path):
    """Stored peaks agree with the engine's own answer for the same charge state."""
    from rig.analysis.metrics import quick_metrics

    seq_path = write_sequence(tmp_path, modes=("AC V", "DC V"), volts=(1000,), reps=3, points=5000)
    cfg = load_bench(BENCH)
    world = replace(
        cfg.simulation.world, bounce=replace(cfg.simulation.world.bounce, max_bounces=0)
    )
    cfg = replace(cfg, simulation=replace(cfg.simulation, world=world))
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq_path, cfg)
    assert outcome.status == "complete"
    rows = read_journal(run)
    from tests.engine_reference import reference_peak

    for r in rows:
        wf = load_waveform(run / r["file"])
        measured = quick_metrics(wf)["abs_peak_a"]
        expected = reference_peak(
            cfg, "demo-a", r["mode"], r["supply_volts"], r["load"], wf.dt, bandwidth_hz=500e6
        )
        lsb = float(wf.gain[0])
        assert measured == pytest.approx(expected, rel=0.03, abs=2 * lsb), r
    assert np.isfinite(measured)


def test_manual_meter_dial_is_turned_by_the_simulation(tmp_path):
    """A handheld meter (control = "manual"): on the simulated bench the simulation turns
    the dial at each mode change; the world's ground truth shows the modes in plan order."""
    cfg = load_bench(BENCH)
    meter = replace(cfg.instruments["meter"], control="manual")
    cfg = replace(cfg, instruments={**cfg.instruments, "meter": meter})
    seq = write_sequence(tmp_path, modes=("DC V", "AC V"), volts=(500,), reps=2, points=2000)
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq, cfg)
    assert outcome.status == "complete", outcome.error
    modes = [s["mode"] for _, s in truth["history"]]
    changes = [m for i, m in enumerate(modes) if i == 0 or m != modes[i - 1]]
    assert changes[-2:] == ["DC V", "AC V"]
    assert [r["mode"] for r in read_journal(run)] == ["DC V", "DC V", "AC V", "AC V"]


def test_supply_that_does_not_turn_off_is_caught_and_reported(tmp_path):
    """OUTP OFF is ignored (fault): the commanded state reads back off, but the measured
    output voltage does not fall. The next pre-check stops the run; the safe-state report
    says the supply is still live; the meter itself is isolated by the open charge relay."""
    outcome, run, plan, truth, cfg = _exit_case(tmp_path, None, faults=Faults(supply_stuck_on=True))
    assert outcome.exit_path is ExitPath.INTERLOCK
    assert "does not turn off" in outcome.error
    assert len(read_journal(run)) == 1
    assert not outcome.safe.reached
    assert any("still measures" in p for p in outcome.safe.problems)
    last = truth["history"][-1][1]
    assert last["supply_on"] is True  # ground truth: the fault is real
    assert not last["relays"].get(cfg.channels.charge, False)
    assert abs(truth["input_volts"]) < cfg.limits.safe_residual_volts
