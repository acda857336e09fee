"""Contact arcs of the simulated relays against ngspice (Debian package ``ngspice``).

A breaking relay contact that carries current arcs: the simulated bench holds ARC_VOLTS
against the current, as the closed contact (contact_ohms) in parallel with a constant current
source (the Norton form), until the current reaches zero or the contact makes again
(drivers.sim.arcs). Each arc of a bouncing discharge (the setup of test_arc_energy) is
exported to an ngspice deck with the same network, state and sources (``.tran ... uic``,
reltol 1e-7) and run past the arc's end. Checked against ngspice's transient:

- the arc current over the arc, within 0.1 % of its largest value;
- the energy into the arc, ARC_VOLTS times the integral of the current (trapezoid rule on
  ngspice's time points), within 0.1 %;
- where the world ended the arc because its current reached zero, ngspice's current crosses
  zero at the same instant, within 0.1 % of the arc's duration.

Measured when written: energies within 1e-5, currents within 3e-6 of their peak.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from drivers.sim.circuit import Probe
from drivers.sim.spice import ngspice_available, run_ngspice
from tests.reference.test_arc_energy import bouncing_discharge

if not ngspice_available():
    if os.environ.get("CI") == "true":
        pytest.fail("ngspice is required in CI (.ci/run installs it)", pytrace=False)
    pytest.skip("ngspice not on PATH", allow_module_level=True)

SEEDS = range(1, 7)


def _arcs(seed: int):
    """(world, segment, contact, arc volts, duration s, ended by a make) of every arc."""
    world, segs, _before, t_end = bouncing_discharge(seed)
    for k, seg in enumerate(segs):
        for name, vs in world._arc_segment(seg).items():
            nxt = segs[k + 1] if k + 1 < len(segs) else None
            span = (nxt.t0 if nxt is not None else t_end) - seg.t0
            made = nxt is not None and name in nxt.closed
            yield world, seg, name, vs, span, made


def test_the_setup_makes_arcs_of_both_endings():
    arcs = [a for s in SEEDS for a in _arcs(s)]
    assert len(arcs) >= 5
    assert any(made for *_, made in arcs) and not all(made for *_, made in arcs)


@pytest.mark.parametrize("seed", SEEDS)
def test_arcs_match_ngspice(seed: int) -> None:
    for world, seg, name, vs, span, made in _arcs(seed):
        r_k = world.config.bounce.contact_ohms
        e = seg.circuit.element_by_name[name]
        inputs = {n: float(seg.u[j]) for j, n in enumerate(seg.circuit.inputs)}
        # past the arc's end (the arc's source is kept on, so the current goes through zero)
        t_stop = float(f"{1.05 * span:.6g}")
        ref = run_ngspice(
            seg.circuit,
            seg.closed,
            inputs,
            seg.x0,
            t_stop,
            t_stop / 4000,
            [Probe("v", e.a, e.b)],
            max_step=t_stop / 4000,
            reltol=1e-7,
        )
        i_ref = (ref.y[0] - vs) / r_k  # the Norton pair's total: the arc's current
        inside = ref.t <= span
        t, i = ref.t[inside], i_ref[inside]
        i_world = world._arc_current(seg, name, vs, t)
        peak = np.abs(i).max()
        assert np.abs(i_world - i).max() <= 1e-3 * peak, (seed, name)
        # energy up to ngspice's last point inside the arc, both from the same instants
        e_ref = vs * float(np.sum(0.5 * (i[1:] + i[:-1]) * np.diff(t)))
        e_world = world._arc_energy(seg, seg.t0 + float(t[-1]))
        assert e_world == pytest.approx(e_ref, rel=1e-3), (seed, name)
        if not made:  # ended by the world at current zero: ngspice's current crosses there
            s = i_ref * np.sign(vs)
            k = int(np.nonzero(s <= 0)[0][0])
            t0 = ref.t[k - 1] + s[k - 1] / (s[k - 1] - s[k]) * (ref.t[k] - ref.t[k - 1])
            assert t0 == pytest.approx(span, rel=1e-3), (seed, name, t0, span)
