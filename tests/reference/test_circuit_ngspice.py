"""Circuit engine against ngspice (Debian package ``ngspice``) on the demo meters.

Each demo meter in each mode is charged to 1 kV, then discharged into a short (0.05 ohm with
200 nH of wiring) and into 500 ohm; the network is exported to an ngspice deck and run with
``ngspice -b`` (``.tran ... uic``, ``wrdata``). The engine, evaluated at ngspice's own time
points, must agree within 0.5 % of the peak over the whole record. ngspice's own error
shrinks with its tolerances (reltol 1e-7 here), so the residual is ngspice's.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from drivers.sim.circuit import Step
from drivers.sim.netlist import load_netlist, meter_models_dir
from drivers.sim.spice import ngspice_available, run_ngspice, to_deck
from tests.reference.test_circuit_closed_form import meter_with_load

if not ngspice_available():
    if os.environ.get("CI") == "true":
        pytest.fail("ngspice is required in CI (.ci/run installs it)", pytrace=False)
    pytest.skip("ngspice not on PATH", allow_module_level=True)

METERS = ["demo-a", "demo-b"]
MODES = load_netlist(meter_models_dir() / "demo-a.toml").modes
LOADS = {"short": (0.05, 200e-9), "500ohm": (500.0, 200e-9)}
VOLTS = 1000.0


def _charged(circ, net, mode: str) -> np.ndarray:
    ms = net.closed_switches(mode)
    return circ.simulate([Step(0.0, ms | {"Kc"}, {"Isup": VOLTS / 1e3})], [], t_end=1.5).x_end


@pytest.mark.parametrize("load", sorted(LOADS))
@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("meter", METERS)
def test_discharge_matches_ngspice(meter: str, mode: str, load: str) -> None:
    circ, net = meter_with_load(meter, *LOADS[load])
    x0 = _charged(circ, net, mode)
    closed = net.closed_switches(mode) | {"Kd"}
    outs = ["i(Rload)", f"v({net.input})"]
    t_stop = 0.1
    ref = run_ngspice(circ, closed, {}, x0, t_stop, 1e-9, outs, max_step=t_stop / 2000, reltol=1e-7)
    got = circ.simulate([Step(0.0, closed)], ref.t, x0, outs)
    for k, name in enumerate(outs):
        peak = np.abs(ref.y[k]).max()
        dev = np.abs(got.y[k] - ref.y[k]).max()
        # reference: ngspice transient (.tran ... uic) of the same netlist, within 0.5 % of peak
        assert dev <= 5e-3 * peak, f"{name}: {100 * dev / peak:.3f} % of peak {peak:.4g}"
    # the record covers the whole event: amperes at first, the tail has died out at the end
    assert np.abs(ref.y[0]).max() > 1.0
    assert abs(ref.y[0][-1]) < 1e-3 * np.abs(ref.y[0]).max()


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("meter", METERS)
def test_charge_phase_matches_ngspice(meter: str, mode: str) -> None:
    circ, net = meter_with_load(meter, *LOADS["short"])
    closed = net.closed_switches(mode) | {"Kc"}
    x0 = circ.state_vector()
    outs = [f"v({net.input})", "i(Rchg)"]
    inputs = {"Isup": VOLTS / 1e3}
    t_stop = 0.2
    ref = run_ngspice(
        circ, closed, inputs, x0, t_stop, 1e-9, outs, max_step=t_stop / 2000, reltol=1e-7
    )
    got = circ.simulate([Step(0.0, closed, inputs)], ref.t, x0, outs)
    for k, name in enumerate(outs):
        peak = np.abs(ref.y[k]).max()
        dev = np.abs(got.y[k] - ref.y[k]).max()
        # reference: ngspice transient (.tran ... uic) of the same netlist, within 0.5 % of peak
        assert dev <= 5e-3 * peak, f"{name}: {100 * dev / peak:.3f} % of peak {peak:.4g}"


def test_deck_carries_parasitics_and_initial_conditions() -> None:
    circ, net = meter_with_load("demo-a", *LOADS["short"])
    x0 = _charged(circ, net, "AC V")
    deck = to_deck(circ, net.closed_switches("DC V") | {"Kd"}, {}, x0, 1e-3, 1e-9, ["i(Rload)"])
    # DC V leaves the AC coupling capacitor's far node without a DC path: GMIN resistor there
    assert "rgmin_d" in deck
    assert "uic" in deck and "ic=" in deck
    assert "s_acv" not in deck  # open switch removed
