"""Benchmark: the simulated scope's record and block path (run by hand, prints figures).

    python tests/perf/bench_sim_scope.py

Target from the simulated-instrument contract: a 1,000,000-point record produced "well
under a second". Figures, on the closed-form RC test double (so the World's own cost is
small) and on the circuit-engine bench world when it is importable:

- trigger search + record generation (first TRACe:SCALing? after the acquisition completed),
- INT,8 and INT,16 fetches of the cached record: quantise, encode, send, and receive through
  pyvisa-py (header, then one counted read).
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import pyvisa

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from drivers.clock import VirtualClock  # noqa: E402
from drivers.sim.bench import start_sim_bench  # noqa: E402
from drivers.sim.interfaces import BenchWiring, LoadSpec, SenseSpec, WorldConfig  # noqa: E402
from tests.sim_support import SimpleRcWorld, open_instrument, query_raw_block  # noqa: E402

POINTS = 1_000_000
REPEATS = 5


def _one(rm: pyvisa.ResourceManager, config: WorldConfig, use_double: bool) -> dict[str, float]:
    clock = VirtualClock()
    world = SimpleRcWorld(config, clock) if use_double else None
    out: dict[str, list[float]] = {"record": [], "int8": [], "int16": []}
    with start_sim_bench(config, clock, world=world) as sim:
        sup, sw, sc = (open_instrument(rm, sim.resources[r]) for r in ("supply", "switch", "scope"))
        try:
            for _ in range(REPEATS):
                sw.query("ROUT:OPEN:ALL;:ROUT:CLOS (@1);*OPC?")
                sup.query("VOLT 100;:OUTP ON;*OPC?")
                clock.sleep(1.0)
                sup.query("OUTP OFF;:VOLT 0;*OPC?")
                sw.query("ROUT:OPEN (@1);*OPC?")
                sc.query(
                    f"SENS1:VOLT:RANG 2;:SENS:SWE:TINT 1e-9;POIN {POINTS};OFFS:TIME -1e-4;"
                    ":TRIG:SOUR INT1;LEV 0.05;SLOP EITH;:INIT;*OPC?"
                )
                sw.query("ROUT:CLOS (@2);*OPC?")
                clock.sleep(2e-3)
                t = time.perf_counter()
                sc.query("TRAC:SCAL? INT1")
                out["record"].append(time.perf_counter() - t)
                for fmt, key in (("INT,8", "int8"), ("INT,16", "int16")):
                    sc.query(f"FORM {fmt};*OPC?")
                    t = time.perf_counter()
                    query_raw_block(sc, "TRAC:DATA? INT1")
                    out[key].append(time.perf_counter() - t)
        finally:
            for i in (sup, sw, sc):
                i.close()
    return {k: statistics.median(v) for k, v in out.items()}


def main() -> None:
    rm = pyvisa.ResourceManager("@py")
    wiring = BenchWiring(loads=(LoadSpec("r1k", 1000.0),), sense=SenseSpec(ohms=10.0))
    double = WorldConfig(meter_model="test-double", wiring=wiring)
    print(f"{POINTS:,}-point record, medians of {REPEATS} runs (seconds)")
    rows = [("RC test double", _one(rm, double, True))]
    meters = sorted((Path(__file__).resolve().parents[2] / "drivers/sim/meters").glob("*.toml"))
    if meters:
        try:
            real = WorldConfig(meter_model=str(meters[0]), wiring=wiring)
            rows.append((f"bench world ({meters[0].name})", _one(rm, real, False)))
        except ImportError as exc:  # the physics module is not there yet
            print(f"bench world skipped: {exc}")
    print(f"{'world':32s} {'record':>8s} {'INT,8':>8s} {'INT,16':>8s}")
    for name, r in rows:
        print(f"{name:32s} {r['record']:8.3f} {r['int8']:8.3f} {r['int16']:8.3f}")
    print("(record = trigger search + samples + noise, first query after the acquisition;")
    print(" INT,8 / INT,16 = quantise, encode, send and receive through pyvisa-py)")
    rm.close()


if __name__ == "__main__":
    main()
