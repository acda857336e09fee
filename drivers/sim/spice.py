"""Export a network to an ngspice deck and run it: the reference for the circuit engine.

The deck is the *effective* network of :meth:`drivers.sim.circuit.Circuit.effective_elements`
(closed switches as resistors, open ones removed, the same stray capacitances and GMIN
resistors), so both engines solve the same circuit. Initial conditions go on the capacitors
(``IC=`` branch voltages) and inductors (``IC=`` currents) and the transient runs with
``uic``; results come back through ``wrdata``.
"""

from __future__ import annotations

import logging
import re
import shutil
import subprocess
import tempfile
import time
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from drivers.sim.circuit import Circuit, Probe

__all__ = ["SpiceResult", "ngspice_available", "run_deck", "run_ngspice", "to_deck"]

log = logging.getLogger(__name__)


@dataclass
class SpiceResult:
    """ngspice's own time points ``t`` (s) and ``y[k]`` for each requested output;
    ``seconds`` is the wall time of the ``ngspice -b`` process."""

    t: np.ndarray
    y: np.ndarray
    names: tuple[str, ...]
    deck: str
    seconds: float


def ngspice_available() -> bool:
    """True when an ``ngspice`` executable is on PATH."""
    return shutil.which("ngspice") is not None


def _sanitize(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]", "_", name).lower()


def to_deck(
    circuit: Circuit,
    closed: Iterable[str],
    inputs: Mapping[str, float],
    x0: np.ndarray,
    t_stop: float,
    t_step: float,
    outputs: Sequence[str | Probe],
    data_file: str = "out.txt",
    max_step: float | None = None,
    reltol: float = 1e-5,
) -> str:
    """ngspice deck text for configuration ``closed`` with constant source currents
    ``inputs`` (A), network state ``x0`` at t = 0, run to ``t_stop`` (s).

    ``outputs`` are probes as in :class:`drivers.sim.circuit.Probe` without filter poles.
    """
    eff = circuit.effective_elements(closed)
    nodemap = {circuit.ground: "0"}
    for k, n in enumerate(circuit.nodes):
        nodemap[n] = f"n{k + 1}_{_sanitize(n)}"
    vx = dict(zip(circuit.states, np.asarray(x0, dtype=float)[: circuit.n_net], strict=True))

    def vnode(n: str) -> float:
        return 0.0 if n == circuit.ground else vx.get(f"v({n})", 0.0)

    names: dict[str, str] = {}
    lines = [f"* discharge-rig export: {len(eff)} elements, switches closed: {sorted(closed)}"]
    for k, e in enumerate(eff):
        sname = f"{e.kind.lower()}{k + 1}_{_sanitize(e.name)}"
        names[e.name] = sname
        a, b = nodemap[e.a], nodemap[e.b]
        if e.kind == "R":
            lines.append(f"{sname} {a} {b} {e.value:.12g}")
        elif e.kind == "C":
            lines.append(f"{sname} {a} {b} {e.value:.12g} ic={vnode(e.a) - vnode(e.b):.12g}")
        elif e.kind == "L":
            i0 = vx.get(f"i({e.name})", 0.0)
            lines.append(f"{sname} {a} {b} {e.value:.12g} ic={i0:.12g}")
        elif e.kind == "I":
            lines.append(f"{sname} {a} {b} dc {float(inputs.get(e.name, 0.0)):.12g}")
    vecs, saves = [], []
    eff_names = {e.name: e for e in eff}
    for p in (Probe.parse(o) for o in outputs):
        if p.poles_hz:
            raise ValueError("filtered outputs cannot be exported")
        if p.kind == "v":
            ref = "" if p.b is None or p.b == circuit.ground else f",{nodemap[p.b]}"
            vecs.append(f"v({nodemap[p.a]}{ref})")
        else:
            e = eff_names.get(p.a)
            if e is None:
                raise ValueError(f"i({p.a}): element not in the exported configuration")
            if e.kind == "L":
                vecs.append(f"i({names[p.a]})")
            else:
                vecs.append(f"@{names[p.a]}[i]")
                saves.append(f"@{names[p.a]}[i]")
    tmax = max_step if max_step is not None else t_step
    lines += [
        f".options reltol={reltol:g} abstol=1e-12 vntol=1e-9 method=gear maxord=2",
        f".tran {t_step:.6g} {t_stop:.6g} 0 {tmax:.6g} uic",
        ".control",
        "set wr_singlescale",
        "set wr_vecnames",
        "option numdgt=12",
    ]
    if saves:
        lines.append("save all " + " ".join(saves))
    lines += ["run", f"wrdata {data_file} " + " ".join(vecs), "quit", ".endc", ".end", ""]
    return "\n".join(lines)


def run_ngspice(
    circuit: Circuit,
    closed: Iterable[str],
    inputs: Mapping[str, float],
    x0: np.ndarray,
    t_stop: float,
    t_step: float,
    outputs: Sequence[str | Probe],
    max_step: float | None = None,
    reltol: float = 1e-5,
    timeout_s: float = 600.0,
) -> SpiceResult:
    """Run ``ngspice -b`` on the exported deck in a temporary folder and parse the results."""
    closed = list(closed)
    deck = to_deck(
        circuit, closed, inputs, x0, t_stop, t_step, outputs, "out.txt", max_step, reltol
    )
    return run_deck(deck, t_stop, outputs, timeout_s)


def run_deck(
    deck: str, t_stop: float, outputs: Sequence[str | Probe], timeout_s: float = 600.0
) -> SpiceResult:
    """Run ``ngspice -b`` on ``deck`` (which writes ``out.txt`` with ``wrdata``) in a
    temporary folder; RuntimeError naming ngspice's last lines when it fails or stops short
    of ``t_stop``."""
    exe = shutil.which("ngspice")
    if exe is None:
        raise FileNotFoundError("ngspice is not on PATH")
    with tempfile.TemporaryDirectory(prefix="rig-spice-") as tmp:
        path = Path(tmp) / "deck.cir"
        path.write_text(deck, encoding="ascii")
        t0 = time.perf_counter()
        proc = subprocess.run(
            [exe, "-b", str(path)], cwd=tmp, capture_output=True, text=True, timeout=timeout_s
        )
        seconds = time.perf_counter() - t0
        out = Path(tmp) / "out.txt"
        failed = proc.returncode != 0 or not out.exists() or "aborted" in proc.stderr
        data = np.loadtxt(out, skiprows=1, ndmin=2) if not failed else np.zeros((0, 1))
        if failed or data.shape[0] < 2 or data[-1, 0] < t_stop * (1 - 1e-6):
            tail = " | ".join((proc.stderr or proc.stdout).strip().splitlines()[-3:])
            raise RuntimeError(f"ngspice failed (exit {proc.returncode}): {tail}")
    names = tuple(_name(o) for o in outputs)
    log.debug("ngspice: %s points in %.3f s", data.shape[0], seconds)
    return SpiceResult(data[:, 0], data[:, 1:].T, names, deck, seconds)


def _name(o: str | Probe) -> str:
    p = Probe.parse(o)
    if p.kind == "i":
        return f"i({p.a})"
    return f"v({p.a})" if p.b is None else f"v({p.a},{p.b})"
