"""Circuit engine against scipy.linalg.expm and scipy.signal.lsim on random small RC networks.

The reference builds its own nodal matrices (``Cn v' = -G v + b``) straight from the drawn
elements, then uses ``scipy.linalg.expm`` and ``scipy.signal.lsim``: nothing of the engine's
Schur reduction or eigen-decomposition is shared. Element values span 10 ohm..1 Mohm and
100 pF..1 uF (time constants 1 ns..1 s): much stiffer draws (1e-13 against seconds) make
``scipy.linalg.expm`` itself lose accuracy in the slow modes (about 1e-6, measured), while the
closed-form and ngspice checks cover the engine's stiffer cases.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.signal
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import drivers.sim.circuit as circuit_mod
from drivers.sim.circuit import Circuit, Step
from drivers.sim.netlist import Element


def _log(lo: float, hi: float):
    return st.floats(min_value=np.log10(lo), max_value=np.log10(hi)).map(lambda e: 10.0**e)


@st.composite
def rc_networks(draw):
    n = draw(st.integers(min_value=1, max_value=4))
    nodes = [f"n{k}" for k in range(n)]
    els = [Element(f"Cg{k}", "C", nodes[k], "0", draw(_log(1e-10, 1e-6))) for k in range(n)]
    # a resistor from every node to an earlier node or ground keeps every node on a DC path
    for k in range(n):
        other = "0" if k == 0 else draw(st.sampled_from(["0"] + nodes[:k]))
        els.append(Element(f"Rt{k}", "R", nodes[k], other, draw(_log(10.0, 1e6))))
    for j in range(draw(st.integers(min_value=0, max_value=3))):
        a, b = draw(st.sampled_from(nodes)), draw(st.sampled_from(nodes + ["0"]))
        if a != b:
            kind = draw(st.sampled_from("RC"))
            val = draw(_log(10.0, 1e6)) if kind == "R" else draw(_log(1e-10, 1e-6))
            els.append(Element(f"X{j}", kind, a, b, val))
    els.append(Element("I1", "I", "0", nodes[-1]))
    v0 = draw(st.lists(st.floats(-1e3, 1e3), min_size=n, max_size=n))
    amps = draw(st.floats(-1e-2, 1e-2))
    return nodes, els, np.array(v0), amps


def _reference_matrices(nodes, els):
    ix = {n: k for k, n in enumerate(nodes)}
    n = len(nodes)
    Cn, G, b = np.zeros((n, n)), np.zeros((n, n)), np.zeros(n)
    for e in els:
        if e.kind == "I":
            b[ix[e.b]] += 1.0
            continue
        M, val = (G, 1.0 / e.value) if e.kind == "R" else (Cn, e.value)
        for p, q in ((e.a, e.b), (e.b, e.a)):
            if p in ix:
                M[ix[p], ix[p]] += val
                if q in ix:
                    M[ix[p], ix[q]] -= val
    A = -np.linalg.solve(Cn, G)
    B = np.linalg.solve(Cn, b)[:, None]
    return A, B


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rc_networks())
def test_random_rc_against_expm(net) -> None:
    nodes, els, v0, amps = net
    A, B = _reference_matrices(nodes, els)
    circ = Circuit(els)
    taus = circ.time_constants([])
    t = np.linspace(0.0, 3 * taus[0], 50)
    x0 = {f"v({n})": v for n, v in zip(nodes, v0, strict=True)}
    got = circ.simulate([Step(0.0, frozenset(), {"I1": amps})], t, x0, [f"v({n})" for n in nodes])
    n = len(nodes)
    ref = np.empty((n, t.size))
    for j, tj in enumerate(t):
        M = np.zeros((n + 1, n + 1))
        M[:n, :n], M[:n, n] = A * tj, B[:, 0] * amps * tj
        E = scipy.linalg.expm(M)  # reference: scipy.linalg.expm, matrix exponential
        ref[:, j] = E[:n, :n] @ v0 + E[:n, n]
    scale = max(np.abs(ref).max(), 1e-9)
    assert np.abs(got.y - ref).max() <= 1e-6 * scale
    # eigenvalues of the reference matrix give the same time constants
    assert np.sort(-1.0 / np.linalg.eigvals(A).real)[::-1] == pytest.approx(taus, rel=1e-6)


def test_rc_ladder_against_lsim() -> None:
    # three-section RC ladder driven by a current step; reference: scipy.signal.lsim
    els = [
        Element("I1", "I", "0", "a"),
        Element("R0", "R", "a", "0", 10e3),
        Element("C1", "C", "a", "0", 1e-9),
        Element("R1", "R", "a", "b", 1e3),
        Element("C2", "C", "b", "0", 10e-9),
        Element("R2", "R", "b", "c", 100.0),
        Element("C3", "C", "c", "0", 100e-9),
    ]
    nodes = ["a", "b", "c"]
    A, B = _reference_matrices(nodes, els)
    t = np.linspace(0, 5e-3, 5001)
    sys = scipy.signal.StateSpace(A, B, np.eye(3), np.zeros((3, 1)))
    _, yref, _ = scipy.signal.lsim(sys, np.full(t.size, 1e-3), t)
    got = Circuit(els).simulate(
        [Step(0.0, inputs={"I1": 1e-3})], t, None, [f"v({n})" for n in nodes]
    )
    assert np.abs(got.y - yref.T).max() <= 1e-6 * np.abs(yref).max()


@pytest.mark.parametrize("uniform", [True, False])
def test_expm_fallback_matches_eigen_path(monkeypatch: pytest.MonkeyPatch, uniform: bool) -> None:
    # the engine's two exact methods agree (eigenbasis vs expm with repeated multiplication)
    from tests.reference.test_circuit_closed_form import meter_with_load

    circ, net = meter_with_load("demo-b", 0.05, 200e-9)
    ms = net.closed_switches("AC V")
    x0 = circ.simulate([Step(0.0, ms | {"Kc"}, {"Isup": 1.0})], [], t_end=1.0).x_end
    closed = ms | {"Kd"}
    t = (
        np.linspace(0, 2e-5, 4001)
        if uniform
        else np.sort(np.random.default_rng(1).uniform(0, 2e-5, 500))
    )
    a = circ.simulate([Step(0.0, closed)], t, x0, ["i(Rload)"]).y[0]
    monkeypatch.setattr(circuit_mod, "EIG_COND_LIMIT", 0.0)
    slow = Circuit(circ.elements, circ.ground)
    assert not slow.model(closed).eig_ok
    b = slow.simulate([Step(0.0, closed)], t, x0, ["i(Rload)"]).y[0]
    assert np.abs(a - b).max() <= 1e-6 * np.abs(a).max()
