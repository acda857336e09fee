"""Benchmark: a 1,000,000-sample discharge of the larger demo meter, engine vs ngspice.

Run by hand: ``python tests/perf/bench_circuit.py``. Prints the engine's time for the
1,000,000 samples (cold: model built and decomposed; warm: cached), ngspice's time for the
same netlist and span at the same 1 ns resolution (process wall time and ngspice's own
transient time), their ratio, and the largest deviation between the two in % of peak.
Target: the engine at least 10x faster than ngspice, agreeing within 0.5 %.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from drivers.sim.circuit import Circuit, Step  # noqa: E402
from drivers.sim.netlist import Element, load_netlist, meter_models_dir  # noqa: E402
from drivers.sim.spice import to_deck  # noqa: E402

N = 1_000_000
DT = 1e-9
MODE = "AC mV"


def build() -> tuple[Circuit, frozenset[str], np.ndarray]:
    net = load_netlist(meter_models_dir() / "demo-b.toml")
    extra = [
        Element("Isup", "I", net.common, "sup"),
        Element("Rout", "R", "sup", net.common, 1e3),
        Element("Rchg", "R", "sup", "chg", 100e3),
        Element("Kc", "S", "chg", net.input, 0.05),
        Element("Kd", "S", net.input, "dis", 0.05),
        Element("Rload", "R", "dis", "m", 0.05),
        Element("Lload", "L", "m", "s", 200e-9),
        Element("Rshunt", "R", "s", net.common, 0.1),
    ]
    circ = Circuit.from_netlist(net, extra)
    ms = net.closed_switches(MODE)
    x0 = circ.simulate([Step(0.0, ms | {"Kc"}, {"Isup": 1.0})], [], t_end=1.0).x_end
    return circ, ms | {"Kd"}, x0


def run_ngspice_timed(deck: str) -> tuple[float, float | None, np.ndarray]:
    exe = shutil.which("ngspice")
    if exe is None:
        raise SystemExit("ngspice not on PATH")
    deck = deck.replace("quit\n", "rusage trantime\nquit\n")
    with tempfile.TemporaryDirectory() as tmp:
        (Path(tmp) / "d.cir").write_text(deck)
        t0 = time.perf_counter()
        p = subprocess.run([exe, "-b", "d.cir"], cwd=tmp, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        m = re.search(r"[Tt]ransient (?:analysis )?time\s*=\s*([0-9.eE+-]+)", p.stdout + p.stderr)
        data = np.loadtxt(Path(tmp) / "out.txt", skiprows=1)
    return wall, (float(m.group(1)) if m else None), data


def main() -> None:
    circ, closed, x0 = build()
    t = np.arange(N) * DT
    c0 = time.perf_counter()
    cold = circ.simulate([Step(0.0, closed)], t, x0, ["i(Rload)"])
    t_cold = time.perf_counter() - c0
    reps = []
    for _ in range(3):
        c0 = time.perf_counter()
        circ.simulate([Step(0.0, closed)], t, x0, ["i(Rload)"])
        reps.append(time.perf_counter() - c0)
    t_warm = min(reps)
    span = N * DT
    deck = to_deck(
        circ, closed, {}, x0, span, DT, ["i(Rload)"], "out.txt", max_step=DT, reltol=1e-6
    )
    wall, tran, data = run_ngspice_timed(deck)
    got = circ.simulate([Step(0.0, closed)], data[:, 0], x0, ["i(Rload)"]).y[0]
    peak = np.abs(data[:, 1]).max()
    dev = 100 * np.abs(got - data[:, 1]).max() / peak
    print(f"network: demo-b ({MODE}) into 0.05 ohm + 200 nH, {circ.n_net} states")
    print(
        f"engine, {N:,} samples over {span * 1e3:.3g} ms: cold {t_cold:.3f} s, warm {t_warm:.3f} s"
    )
    print(
        f"ngspice, {data.shape[0]:,} time points, same span and 1 ns steps: wall {wall:.3f} s",
        end="",
    )
    print(f", its own transient time {tran:.3f} s" if tran is not None else "")
    print(f"ratio ngspice wall / engine warm: {wall / t_warm:.1f}x (cold: {wall / t_cold:.1f}x)")
    if tran is not None:
        print(f"ratio ngspice transient time / engine warm: {tran / t_warm:.1f}x")
    print(f"max deviation engine vs ngspice: {dev:.4f} % of peak ({peak:.3g} A)")
    print(f"peak current {np.abs(cold.y[0]).max():.4g} A")


if __name__ == "__main__":
    main()
