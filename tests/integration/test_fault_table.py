"""The fault table: one row per fault kind, each judged from the simulated world's ground truth.

For every row the run must: end in the safe state per the world's own record, or say "not
confirmed" in its safe-state report (never claim a safe state the world does not show); mark
the run with the reason (manifest ``status`` and ``exit_path``/``error``); keep every completed
event intact by checksum (``verify_run``); end with a non-zero exit (a status other than
"complete", or a group without a capture); and name the instrument and the fault in its message.

Faults come from the simulator's own fault injection (``drivers/sim``: ``[simulation.faults]``
of a bench file and the per-server ``faults`` a test may change while the run goes on). The
moment a server fault starts is chosen from the run's progress (event 2, a given phase), never
from elapsed time.
"""

from __future__ import annotations

import json
from dataclasses import replace

import pytest

from drivers.sim.interfaces import Faults
from rig.runner.cycle import ExitPath, Phase
from rig.runner.opener import load_bench
from rig.store.runfolder import read_journal, verify_run

from .test_runner import BENCH, Recorder, run_once, write_sequence

CFG = load_bench(BENCH)
CH = CFG.channels
SHORT, R500 = (ld.channel for ld in CFG.loads)


def _server(role: str, **fault):
    def act(bench):
        bench.sim.servers[role].faults = Faults(**fault)

    return act


def _timeouts(cfg, seconds: float):
    inst = {r: replace(s, timeout_s=seconds) for r, s in cfg.instruments.items()}
    return replace(cfg, instruments=inst)


# A bleed relay that does not close matters (and shows) only when there is charge to bleed:
# its row stops the run with Ctrl-C while the input is charged (ISOLATE of event 2).
# id: (world faults, server action at event 2 and phase, variant, expected exit paths,
#      words the error must contain)
ROWS = {
    "drop-supply": (None, ("supply", Phase.CHARGE, _server("supply", drop_connection_after=1, drop_unanswered=True)),
                    None, {ExitPath.CONNECTION, ExitPath.TIMEOUT}, ["supply"]),
    "drop-switch": (None, ("switch", Phase.CHARGE, _server("switch", drop_connection_after=1, drop_unanswered=True)),
                    None, {ExitPath.CONNECTION, ExitPath.TIMEOUT}, ["switch"]),
    "drop-scope": (None, ("scope", Phase.ARM, _server("scope", drop_connection_after=1, drop_unanswered=True)),
                   None, {ExitPath.CONNECTION, ExitPath.TIMEOUT}, ["scope"]),
    "drop-meter": (None, ("meter", Phase.SETUP, _server("meter", drop_connection_after=1, drop_unanswered=True)),
                   "modes", {ExitPath.CONNECTION, ExitPath.TIMEOUT}, ["meter"]),
    "slow-scope": (None, ("scope", Phase.ARM, _server("scope", slow_answer_s=0.6)),
                   None, {ExitPath.TIMEOUT}, ["scope"]),
    "scpi-error-supply": (None, ("supply", Phase.SETUP, _server("supply", scpi_error_every=1)),
                          None, {ExitPath.INSTRUMENT}, ["supply", "SCPI error -200"]),
    "corrupt-block": (None, ("scope", Phase.ARM, _server("scope", corrupt_block_every=1)),
                      None, {ExitPath.INSTRUMENT, ExitPath.TIMEOUT}, ["scope"]),
    "welded-charge": (Faults(relay_stuck_closed=(CH.charge,)), None, None,
                      {ExitPath.INTERLOCK}, [f"charge relay channel {CH.charge}", "welded"]),
    "welded-discharge": (Faults(relay_stuck_closed=(CH.discharge,)), None, None,
                         {ExitPath.INTERLOCK}, ["welded discharge relay"]),
    "welded-bleed": (Faults(relay_stuck_closed=(CH.bleed,)), None, None,
                     {ExitPath.INTERLOCK}, ["meter input reached only"]),
    "welded-selector": (Faults(relay_stuck_closed=(SHORT,)), None, "loads",
                        {ExitPath.INTERLOCK}, ["welded load selector", str(SHORT)]),
    "open-charge": (Faults(relay_stuck_open=(CH.charge,)), None, None,
                    {ExitPath.INTERLOCK}, [f"charge relay (channel {CH.charge}) that does not"]),
    "open-discharge": (Faults(relay_stuck_open=(CH.discharge,)), None, None,
                       {ExitPath.INTERLOCK}, [f"discharge relay channel {CH.discharge}", "not close"]),
    "open-bleed": (Faults(relay_stuck_open=(CH.bleed,)),
                   ("switch", Phase.ISOLATE, lambda b: (_ for _ in ()).throw(KeyboardInterrupt())),
                   None, {ExitPath.CTRL_C}, []),
    "open-selector": (Faults(relay_stuck_open=(SHORT,)), None, None,
                      {ExitPath.INTERLOCK}, [f"load selector channel {SHORT}", "not close"]),
    "supply-stays-on": (Faults(supply_stuck_on=True), None, None,
                        {ExitPath.INTERLOCK}, ["supply", "does not turn off"]),
    "supply-trip": (Faults(supply_trip_amps=1e-3), None, None,
                    {ExitPath.INTERLOCK}, ["supply", "tripped"]),
    "scope-never-triggers": (Faults(scope_never_triggers=True), None, None,
                             {ExitPath.NORMAL}, []),
}  # fmt: skip


def _disk_full(bench):
    raise OSError(28, "No space left on device", "waveforms/e000002.npz")


@pytest.mark.parametrize("row", sorted(ROWS))
def test_fault_row(tmp_path, row):
    faults, server, variant, paths, words = ROWS[row]
    cfg = CFG
    if faults is not None:
        world = replace(cfg.simulation.world, faults=faults)
        cfg = replace(cfg, simulation=replace(cfg.simulation, world=world))
    if row == "slow-scope":
        cfg = _timeouts(cfg, 0.3)
    obs = Recorder()
    if server is not None:
        _, phase, act = server
        obs = Recorder(at=2, phase=phase, action=act)
    if variant == "loads":  # the short closes (and welds) first, then the 500 ohm load runs
        seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=3, points=2000)
        text = seq.read_text().replace('loads = ["short"]', 'loads = ["short", "500R"]')
        seq.write_text(text)
    elif variant == "500R":  # a slow load leaves charge for the bleed (the short takes it all)
        seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=3, points=2000)
        seq.write_text(seq.read_text().replace('loads = ["short"]', 'loads = ["500R"]'))
    elif variant == "modes":
        seq = write_sequence(tmp_path, modes=("AC V", "DC V"), volts=(1000,), reps=2, points=2000)
    else:
        seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=5, points=2000)
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq, cfg, obs)
    _judge(row, outcome, run, truth, cfg, paths, words)


def test_disk_full_row(tmp_path):
    """Disk full while committing event 2: the run stops, safe, with the reason recorded."""
    obs = Recorder(at=2, phase=Phase.COMMIT, action=_disk_full)
    seq = write_sequence(tmp_path, modes=("AC V",), volts=(1000,), reps=5, points=2000)
    outcome, run, plan, truth, cfg = run_once(tmp_path, seq, CFG, obs)
    _judge("disk-full", outcome, run, truth, cfg, {ExitPath.EXCEPTION}, ["No space left"])


def _judge(row, outcome, run, truth, cfg, paths, words):
    assert outcome.exit_path in paths, (row, outcome.exit_path, outcome.error)
    manifest = json.loads((run / "manifest.json").read_text())
    # marked with the reason; a non-zero exit follows from either
    if outcome.exit_path is ExitPath.NORMAL:
        assert outcome.empty_groups and not outcome.ok, row
        assert manifest["groups_without_capture"] == outcome.empty_groups
    else:
        assert manifest["status"] in ("failed", "interrupted")
        assert manifest["exit_path"] == outcome.exit_path.value
        assert not outcome.ok
        for w in words:  # names the instrument (or relay) and the fault
            assert w in outcome.error, (row, outcome.error)
    # completed events intact by checksum, none lost, the one in flight not journalled
    v = verify_run(run)
    assert v.ok, (row, v.problems)
    assert v.journalled == outcome.done == len(read_journal(run))
    # safe state from the world's own record, or honestly "not confirmed"
    last = truth["history"][-1][1]
    ch = cfg.channels
    world_safe = (
        not last["supply_on"]
        and not any(last["relays"].get(c) for c in (ch.charge, ch.discharge))
        and abs(truth["input_volts"]) < cfg.limits.safe_residual_volts
    )
    if outcome.safe.reached:
        assert world_safe, (row, last, truth["input_volts"])
    else:
        assert "NOT CONFIRMED" in outcome.safe.summary()
    if not world_safe:
        assert not outcome.safe.reached, row
