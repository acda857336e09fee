"""Wall time per event of a 1,000-event run on the simulated bench in virtual time.

Prints the split: instrument I/O (SCPI exchanges, including the simulated instruments'
own work, which runs in this process), waveform transfer, storage (waveform file, journal,
fsync), and everything else (the controller itself), and the SCPI messages sent per event,
per instrument (a checked command joined to its error query by ``[common] compound`` is one
message). Target: controller overhead - everything but I/O and transfer - below 5 ms per
event.

    python tests/perf/bench_runner.py [EVENTS] [POINTS]
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from rig.planning.plan import build_plan  # noqa: E402
from rig.planning.sequence import load_sequence  # noqa: E402
from rig.runner.cycle import Runner  # noqa: E402
from rig.runner.opener import load_bench, open_bench  # noqa: E402
from rig.store.runfolder import RunWriter  # noqa: E402
from tests.integration.test_runner import write_sequence  # noqa: E402


def main() -> None:
    events = int(sys.argv[1]) if len(sys.argv) > 1 else 1000
    points = int(sys.argv[2]) if len(sys.argv) > 2 else 20000
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        seq_path = write_sequence(
            tmp, modes=("AC V", "DC V"), volts=(1000,), reps=events // 2, points=points
        )
        bench = load_bench(ROOT / "sequences" / "benches" / "sim-demo.toml")
        seq = load_sequence(seq_path, bench)
        plan = build_plan(seq, bench)
        plan_rows = [{**e.to_dict(), "event": e.index} for e in plan.events]
        writer = RunWriter.create(tmp, "bench", {"status": "created"}, plan_rows)
        t0 = time.perf_counter()
        with writer, open_bench(bench, first_sim_model=seq.meters[0].sim_model) as ob:
            sessions = ob._sessions
            before = {s.name: s.messages_sent for s in sessions}
            outcome = Runner(ob, bench, seq, plan, writer).run()
            sent = {s.name: s.messages_sent - before[s.name] for s in sessions}
        wall = time.perf_counter() - t0
    tm = outcome.timing
    n = max(int(tm["events"]), 1)
    other = tm["total"] - tm["io"] - tm["transfer"] - tm["storage"]
    ms = 1e3 / n
    print(
        f"events: {n} ({outcome.status}), {points} points per record, wall {wall:.1f} s "
        f"({wall / n * 1e3:.1f} ms per event incl. set-up and safe state)"
    )
    print(f"  instrument I/O     {tm['io'] * ms:8.2f} ms/event")
    print(f"  waveform transfer  {tm['transfer'] * ms:8.2f} ms/event")
    print(f"  storage            {tm['storage'] * ms:8.2f} ms/event")
    print(f"  everything else    {other * ms:8.2f} ms/event")
    per = ", ".join(f"{name} {count / n:.2f}" for name, count in sent.items())
    print(f"SCPI messages: {sum(sent.values()) / n:.2f} per event ({per}; incl. safe state)")
    overhead = (tm["storage"] + other) * ms
    verdict = "met" if overhead < 5.0 else "NOT met"
    print(
        f"controller overhead (storage + everything else): {overhead:.2f} ms/event; "
        f"target < 5 ms: {verdict}"
    )


if __name__ == "__main__":
    main()
