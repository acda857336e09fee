"""Seeded soak: 10,000 simulated events with faults injected at random, resumed after each.

Marked ``soak`` and left out of the default run (``addopts`` in pyproject.toml); run it with
``pytest -m soak tests/integration/test_soak.py``. A fault (a refused SCPI command, a dropped
link, a corrupt block, a Ctrl-C) is injected at a random event and phase drawn from a seeded
numpy Generator; the run stops in the safe state, is reopened and continued on a fresh bench,
until every planned event is journalled. At the end: every event exactly once, every journalled
waveform intact by checksum, the safe state in the world's own record.
"""

from __future__ import annotations

import numpy as np
import pytest

from drivers.sim.interfaces import Faults
from rig.planning.limits import checked_plan
from rig.planning.sequence import load_sequence
from rig.runner.cycle import Observer, Phase, Runner
from rig.runner.opener import load_bench, open_bench
from rig.store.runfolder import RunWriter, read_journal, verify_run

from .test_runner import BENCH, assert_safe, write_sequence

EVENTS = 10_000
PHASES = [Phase.SETUP, Phase.CHARGE, Phase.ISOLATE, Phase.ARM, Phase.DISCHARGE, Phase.BLEED]
FAULTS = [
    ("supply", {"scpi_error_every": 1}),
    ("switch", {"scpi_error_every": 1}),
    ("scope", {"scpi_error_every": 1}),
    ("supply", {"drop_connection_after": 1}),
    ("switch", {"drop_connection_after": 1}),
    ("scope", {"drop_connection_after": 1}),
    ("meter", {"drop_connection_after": 1}),
    ("scope", {"corrupt_block_every": 1}),
    (None, "ctrl-c"),
]


class Injector(Observer):
    """Injects a random fault at a random later event and phase, again and again (a fault on
    an instrument the plan no longer uses does not stop the run); logs what it injected."""

    def __init__(self, bench, rng: np.random.Generator, first: int, log: list) -> None:
        self.bench, self.rng, self.log = bench, rng, log
        self._arm(first)

    def _arm(self, after: int) -> None:
        self.at = after + int(self.rng.integers(1, 400))
        self.when = PHASES[int(self.rng.integers(0, len(PHASES)))]
        self.fault = FAULTS[int(self.rng.integers(0, len(FAULTS)))]

    def phase(self, event, phase) -> None:
        if event.index < self.at or phase is not self.when:
            return
        role, what = self.fault
        self.log.append([role, str(what), phase.value, event.index, "?"])
        self._arm(event.index)
        if what == "ctrl-c":
            raise KeyboardInterrupt
        self.bench.sim.servers[role].faults = Faults(**what)


@pytest.mark.soak
def test_soak_ten_thousand_events_with_random_faults(tmp_path):
    rng = np.random.default_rng(20261202)
    cfg = load_bench(BENCH)
    seq_path = write_sequence(tmp_path, modes=("AC V",), volts=(500,), reps=EVENTS, points=1000)
    seq_path.write_text(seq_path.read_text().replace("dwell_s = 1.0", "dwell_s = 0.02"))
    seq = load_sequence(seq_path, cfg)
    plan = checked_plan(seq, cfg)
    assert len(plan.events) == EVENTS
    rows = [{**e.to_dict(), "event": e.index} for e in plan.events]
    writer = RunWriter.create(tmp_path / "results", "soak", {"status": "created"}, rows)
    injected: list[list] = []
    segments = 0
    while True:
        segments += 1
        done = len(writer.done)
        with writer, open_bench(cfg, first_sim_model=seq.meters[0].sim_model) as ob:
            obs = Injector(ob, rng, done, injected) if EVENTS - done > 50 else Observer()
            outcome = Runner(ob, cfg, seq, plan, writer, observer=obs).run()
            world = ob.sim.world
            truth = {"history": world.history(), "input_volts": world.meter_input_volts()}
        if injected and injected[-1][4] == "?":
            injected[-1][4] = outcome.exit_path.value
        # every stop ends safe in the world's own record, or the report says "not confirmed"
        if outcome.safe.reached:
            assert_safe(truth, cfg)
        else:
            assert "NOT CONFIRMED" in outcome.safe.summary()
        journal = read_journal(writer.path)
        assert outcome.done == len(journal) == len({r["event"] for r in journal})
        if outcome.status == "complete":
            break
        writer = RunWriter.reopen(writer.path)
    events = sorted(r["event"] for r in read_journal(writer.path))
    assert events == list(range(EVENTS))  # none lost, none duplicated
    v = verify_run(writer.path)
    assert v.ok and v.status == "complete", v.problems
    assert len(injected) >= 20
    assert_safe(truth, cfg)  # the last stop: the run's end
    print(f"soak: {EVENTS} events, {len(injected)} faults injected, {segments} segments, 0 lost")
    for row in injected:
        print("  fault:", *row)
