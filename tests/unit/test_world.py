"""The bench world (drivers/sim/world.py) with a virtual clock: ground truth for the runner."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from drivers.clock import VirtualClock
from drivers.sim.circuit import Circuit, Step
from drivers.sim.interfaces import BenchWiring, BounceSpec, Faults, LoadSpec, SenseSpec, WorldConfig
from drivers.sim.netlist import load_netlist, meter_models_dir, parse_netlist
from drivers.sim.world import BenchWorld
from rigbase.errors import FileFormatError

DEMO_A = str(meter_models_dir() / "demo-a.toml")
DEMO_B = str(meter_models_dir() / "demo-b.toml")

ONE_CAP = """
[meter]
model = "Test one-capacitor meter"
rating = "test"
modes = ["DC V", "AC V"]
input = "VIN"
common = "COM"

[[element]]
name = "C_in"
kind = "C"
nodes = ["VIN", "COM"]
farads = 1e-6
"""


def _world(
    tmp_path: Path | None = None, meter: str = DEMO_A, **kw
) -> tuple[BenchWorld, VirtualClock]:
    if tmp_path is not None:
        p = tmp_path / "one-cap.toml"
        p.write_text(ONE_CAP)
        meter = str(p)
    clock = VirtualClock(100.0)
    return BenchWorld(WorldConfig(meter, **kw), clock), clock


def test_short_dwell_leaves_capacitor_partly_charged(tmp_path: Path) -> None:
    wiring = BenchWiring(divider_ratio=None)
    w, clk = _world(tmp_path, wiring=wiring, bounce=BounceSpec(max_bounces=0))
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=0.1, output=True)
    tau = (wiring.supply_output_ohms + wiring.charge_ohms + 0.05) * 1e-6
    clk.sleep(0.5 * tau)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    clk.sleep(1e-3)
    # first-order charge v = V (1 - exp(-t/tau)) (Horowitz & Hill, The Art of Electronics,
    # 3rd ed., 1.4.2; section from memory)
    assert w.meter_input_volts() == pytest.approx(1000.0 * (1 - np.exp(-0.5)), rel=1e-3)


def test_charge_current_rule_of_thumb() -> None:
    # 1 kV through 200 kohm of series resistance starts at 5 mA (Ohm's law; common practice,
    # no source). The meter's 1.2 kohm PTC adds 0.6 %.
    wiring = BenchWiring(supply_output_ohms=100e3, charge_ohms=100e3)
    w, _ = _world(wiring=wiring)
    w.meter_set_mode("DC V")
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=0.1, output=True)
    volts, amps = w.supply_measure()
    assert amps == pytest.approx(5e-3, rel=1e-2)


def test_current_limit_holds_then_returns_to_cv() -> None:
    w, clk = _world()
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=1e-3, output=True)
    clk.sleep(5e-3)
    v1, a1 = w.supply_measure()
    assert a1 == pytest.approx(1e-3, rel=1e-9)  # CC: the limit
    clk.sleep(1.0)
    v2, a2 = w.supply_measure()
    assert a2 < 0.5e-3 and v2 == pytest.approx(1000.0, rel=2e-3)  # back in CV, near setpoint


def _scope_step_rise(tmp_path: Path, bw: float | None, sense: SenseSpec | None = None) -> float:
    # a 1 uF input discharged into 500 ohm without inductance: a clean current step
    loads = (LoadSpec("r500", 500.0, 0.0),)
    wiring = BenchWiring(loads=loads, sense=sense or SenseSpec("shunt", 0.1))
    w, clk = _world(tmp_path, wiring=wiring, bounce=BounceSpec(max_bounces=0))
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=0.1, output=True)
    clk.sleep(0.2)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    t0 = clk.now()
    v_before = w.meter_input_volts()
    w.relay_set([2], True)
    clk.sleep(1e-3)
    t = t0 + np.linspace(0.0, 5.0 / (bw or (sense and sense.bandwidth_hz)), 20001)
    y = w.scope_inputs(t, [bw])[0]
    top = y.max()  # the step's top (the 500 us decay is negligible over the rise)
    t10 = np.interp(0.1 * top, y[: np.argmax(y)], t[: np.argmax(y)])
    t90 = np.interp(0.9 * top, y[: np.argmax(y)], t[: np.argmax(y)])
    return t90 - t10, top, v_before


@pytest.mark.parametrize("bw", [20e6, 100e6])
def test_scope_bandwidth_rise_time(tmp_path: Path, bw: float) -> None:
    # rise time x bandwidth = ln 9 / (2 pi) = 0.35 for a first-order input: 10-90 % of
    # 1 - exp(-t/tau) takes tau ln 9 and f_3dB = 1 / (2 pi tau) (derived here; common practice)
    assert _scope_step_rise(tmp_path, bw)[0] == pytest.approx(0.35 / bw, rel=0.05)


def test_current_probe_bandwidth_and_scale(tmp_path: Path) -> None:
    # a current probe (first order, 50 MHz) instead of the shunt: same 0.35/BW rule
    # (derived above) and volts = amps / (amps per volt)
    probe = SenseSpec("probe", amps_per_volt=10.0, bandwidth_hz=50e6)
    rise, top, v_before = _scope_step_rise(tmp_path, None, probe)
    assert rise == pytest.approx(0.35 / 50e6, rel=0.05)
    # Ohm's law: the step is V / (500 ohm + 0.05 ohm contact), seen at 10 A/V
    assert top == pytest.approx(v_before / 500.05 / 10.0, rel=1e-3)


def _bounce_history(seed: int) -> list:
    w, clk = _world(seed=seed, bounce=BounceSpec(max_bounces=4, min_s=20e-9, max_s=2e-6))
    for _ in range(10):
        w.relay_set([2], True)
        clk.sleep(1e-3)
        w.relay_set([2], False)
        clk.sleep(1e-3)
    return [(t, d["relays"][2]) for t, d in w.history()]


def test_bounce_within_bounds_and_reproducible() -> None:
    h = _bounce_history(7)
    assert h == _bounce_history(7)
    assert h != _bounce_history(8)
    changes = [(t, s) for (t, s), (_, prev) in zip(h[1:], h[:-1], strict=True) if s != prev]
    n_breaks = 0
    for (ta, sa), (tb, _) in zip(changes[:-1], changes[1:], strict=True):
        dt = tb - ta
        if dt < 1e-4:  # a bounce interval (commands are 1 ms apart)
            assert 20e-9 * (1 - 1e-9) <= dt <= 2e-6 * (1 + 1e-9)
            n_breaks += sa
    assert n_breaks > 0  # some bounces happened with up to 4 per closing


def _cycle(w: BenchWorld, clk: VirtualClock) -> None:
    w.relay_set([1], True)
    w.supply_program(volts=500.0, amps=0.05, output=True)
    clk.sleep(0.3)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)  # break ...
    w.relay_set([2], True)  # ... before make, at the same instant
    clk.sleep(0.05)
    w.relay_set([2], False)


def _both_conducting(w: BenchWorld) -> bool:
    return any(d["relays"][1] and d["relays"][2] for _, d in w.history())


def test_break_before_make_in_history() -> None:
    w, clk = _world()
    _cycle(w, clk)
    assert not _both_conducting(w)
    # the same commands with a welded charge relay do show both paths conducting
    w2, clk2 = _world(faults=Faults(relay_stuck_closed=(1,)))
    _cycle(w2, clk2)
    assert _both_conducting(w2)
    assert w2.relay_commanded([1, 2]) == [False, False]


def test_supply_stuck_on_keeps_delivering() -> None:
    w, clk = _world(faults=Faults(supply_stuck_on=True))
    w.relay_set([1], True)
    w.supply_program(volts=800.0, amps=0.05, output=True)
    clk.sleep(0.3)
    w.supply_program(volts=0.0, output=False)
    clk.sleep(0.5)
    assert w.history()[-1][1]["supply_on"] is True
    assert w.meter_input_volts() > 700.0


def test_modes_connect_and_errors(tmp_path: Path) -> None:
    w, clk = _world()
    assert w.meter_modes() == ("AC V", "AC mV", "DC V")
    with pytest.raises(ValueError, match="no mode"):
        w.meter_set_mode("Ohms")
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=0.05, output=True)
    clk.sleep(0.3)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    assert w.meter_input_volts() > 900.0
    w.meter_connect(DEMO_B)
    assert w.meter_mode() == "AC V"
    assert abs(w.meter_input_volts()) < 1e-9  # new meter starts discharged
    bad = tmp_path / "bad.toml"
    bad.write_text(ONE_CAP.replace("farads = 1e-6", "farads = -1"))
    with pytest.raises(FileFormatError, match=r"bad.toml \[element.C_in.farads\]"):
        w.meter_connect(str(bad))
    # before the world existed: the initial quiet state
    assert np.abs(w.scope_inputs(np.array([0.0, 50.0]), [None, None])).max() < 1e-12
    short = BenchWorld(WorldConfig(DEMO_A), clk, horizon_s=0.5)
    for _ in range(3):
        short.relay_set([3], True)
        clk.sleep(0.4)
        short.relay_set([3], False)
    with pytest.raises(ValueError, match="before the kept history"):
        short.scope_inputs(np.array([clk.now() - 2.0]), [None])
    with pytest.raises(ValueError, match="after now"):
        w.scope_inputs(np.array([clk.now() + 1.0]), [None])


def test_self_discharge_follows_slowest_time_constant() -> None:
    # with the input open the AC coupling charge decays with the slowest time constant of the
    # meter's own network (plus the 100 Mohm divider probe here)
    w, clk = _world(wiring=BenchWiring(divider_ratio=None))
    w.relay_set([1], True)
    w.supply_program(volts=1000.0, amps=0.05, output=True)
    clk.sleep(0.5)
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    clk.sleep(0.01)
    v1 = w.meter_input_volts()
    clk.sleep(0.5)
    v2 = w.meter_input_volts()
    net = load_netlist(DEMO_A)
    tau = Circuit.from_netlist(net).time_constants(net.closed_switches("AC V"), "v(VIN)")[0]
    assert 0.2 < tau < 5.0
    assert -0.5 / np.log(v2 / v1) == pytest.approx(tau, rel=1e-3)


@pytest.mark.parametrize("mode", ["AC V", "AC mV"])
def test_demo_meters_amperes_then_milliamperes(mode: str) -> None:
    # design intent of the invented meters: amperes for tens of ns into a short, then a
    # milliampere tail over milliseconds; demo-a keeps more charge than demo-b in AC modes
    from tests.reference.test_circuit_closed_form import meter_with_load

    q = {}
    for name in ("demo-a", "demo-b"):
        circ, net = meter_with_load(name, 0.05, 200e-9)
        ms = net.closed_switches(mode)
        x0 = circ.simulate([Step(0.0, ms | {"Kc"}, {"Isup": 1.0})], [], t_end=1.0).x_end
        t = np.concatenate([np.linspace(0, 1e-5, 100_001), np.linspace(1e-5, 0.2, 100_000)[1:]])
        i = circ.simulate([Step(0.0, ms | {"Kd"})], t, x0, ["i(Rload)"]).y[0]
        assert i.max() > 5.0 and t[np.argmax(i)] < 100e-9
        assert 1e-3 < np.interp(1e-3, t, i) < 50e-3
        q[name] = np.trapezoid(i, t)
    assert q["demo-a"] > 1.3 * q["demo-b"]


def test_netlist_errors_name_file_and_key(tmp_path: Path) -> None:
    cases = {
        'kind = "C"': ('kind = "Q"', "element.C_in.kind"),
        "farads = 1e-6": ('farads = "big"', "element.C_in.farads"),
        'input = "VIN"': ('input = "NOPE"', "meter.input"),
        'modes = ["DC V", "AC V"]': ('modes = ["DC V", "DC V"]', "meter.modes"),
    }
    for old, (new, key) in cases.items():
        with pytest.raises(FileFormatError) as exc:
            parse_netlist(ONE_CAP.replace(old, new), tmp_path / "m.toml")
        assert exc.value.key == key and "m.toml" in str(exc.value)
    sw = (
        ONE_CAP
        + '\n[[element]]\nname = "S1"\nkind = "S"\nnodes = ["VIN", "x"]\nclosed_in = ["Ohms"]\n'
    )
    with pytest.raises(FileFormatError, match=r"element.S1.closed_in.*unknown mode 'Ohms'"):
        parse_netlist(sw, "m.toml")


def test_thread_safe_under_concurrent_calls() -> None:
    import threading

    w, clk = _world()
    errors: list[BaseException] = []

    def relays() -> None:
        try:
            for _ in range(50):
                w.relay_set([2], True)
                clk.sleep(1e-4)
                w.relay_set([2], False)
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    def readers() -> None:
        try:
            for _ in range(50):
                now = clk.now()
                w.scope_inputs(now - np.linspace(0, 1e-4, 64), [100e6, None])
                w.supply_measure()
                w.switching_times(0.0, now)
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=f) for f in (relays, readers, readers)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert not errors
    times = [t for t, _ in w.history()]
    assert times == sorted(times)


def test_unfiltered_inputs_over_old_segments_follow_the_rc_decay(tmp_path: Path) -> None:
    # scope inputs without a bandwidth limit carry no filter state from segment to segment;
    # read back over segments that later switching left behind, the divider input still
    # follows the first-order decay v = V0 exp(-t / RC) (Horowitz & Hill, The Art of
    # Electronics, 3rd ed., 1.4.2; section from memory), R = (R_bleed + contact) || R_divider
    wiring = BenchWiring()
    w, clk = _world(tmp_path, wiring=wiring, bounce=BounceSpec(max_bounces=0))
    w.relay_set([1], True)
    w.supply_program(volts=100.0, amps=0.1, output=True)
    clk.sleep(1.0)  # 1 s = 10 time constants of the 101 kohm charge path: fully charged
    w.supply_program(volts=0.0, output=False)
    w.relay_set([1], False)
    v0 = w.meter_input_volts()
    t_bleed = clk.now()
    w.relay_set([3], True)
    clk.sleep(0.02)
    for _ in range(5):  # later segments: the bleed window becomes history
        w.relay_set([2], True)
        clk.sleep(1e-4)
        w.relay_set([2], False)
        clk.sleep(1e-4)
    r = 1.0 / (1.0 / (wiring.bleed_ohms + 0.05) + 1.0 / wiring.divider_ohms)
    t = t_bleed + np.linspace(0.0, 0.02, 201)
    divider = w.scope_inputs(t, [None, None])[1]
    expected = v0 * np.exp(-(t - t_bleed) / (r * 1e-6)) / wiring.divider_ratio
    np.testing.assert_allclose(divider, expected, rtol=1e-6, atol=1e-12)
    # the same instants asked again, now from the kept filter states, give the same numbers
    assert np.array_equal(w.scope_inputs(t, [None, None])[1], divider)
