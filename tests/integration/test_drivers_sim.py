"""The role drivers against the simulated bench, through pyvisa-py over loopback TCP.

The bench's world is the single-RC test double ``tests/sim_support.py::SimpleRcWorld`` on a
virtual clock, so every answer has a closed form. The tests never call a server object:
commands go through ScpiSession and pyvisa-py exactly as to hardware; the world is read only
as ground truth.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pytest

from drivers.clock import VirtualClock
from drivers.metermode import ManualMeterMode, ScpiMeterMode
from drivers.profile import Profile
from drivers.scope import Scope, Trace
from drivers.session import ScpiSession
from drivers.sim.bench import SimBench, start_sim_bench
from drivers.sim.interfaces import BenchWiring, Faults, LoadSpec, WorldConfig
from drivers.supply import Supply
from drivers.switch import SwitchBoard
from rigbase.errors import BlockFormatError, LimitError, ProfileError, SafetyError, ScpiError
from tests.sim_support import LEAK_OHMS, MODE_FARADS, SimpleRcWorld

PROFILE = Profile.load("scpi1999")
METER = str(Path(__file__).resolve().parents[2] / "drivers" / "sim" / "meters" / "demo-a.toml")
LOAD_OHMS = 1000.0  # slow enough to sample at 1 us: tau = 100 nF x 1 kohm = 100 us
CONFIG = WorldConfig(
    meter_model=METER,
    wiring=BenchWiring(loads=(LoadSpec("r1k", LOAD_OHMS, 0.0),)),
    noise_volts=0.0,
)
CHARGE, DISCHARGE, BLEED = 1, 2, 3


@dataclass
class Rig:
    sim: SimBench
    world: SimpleRcWorld
    clock: VirtualClock
    sessions: dict[str, ScpiSession]
    supply: Supply
    switch: SwitchBoard
    scope: Scope
    meter: ScpiMeterMode

    def close(self) -> None:
        for s in self.sessions.values():
            s.close()
        self.sim.close()


def open_rig(
    config: WorldConfig = CONFIG, world_cls: type[SimpleRcWorld] = SimpleRcWorld, **session_kw
) -> Rig:
    clock = VirtualClock()
    world = world_cls(config, clock)
    sim = start_sim_bench(config, clock, world=world)
    kw = {"timeout_s": 0.5, "reconnect_backoff_s": 0.01, **session_kw}
    sessions = {
        role: ScpiSession(res, role, profile=PROFILE, **kw) for role, res in sim.resources.items()
    }
    return Rig(
        sim=sim,
        world=world,
        clock=clock,
        sessions=sessions,
        supply=Supply(sessions["supply"], PROFILE, max_volts=500.0, max_amps=0.01),
        switch=SwitchBoard(sessions["switch"], PROFILE),
        scope=Scope(sessions["scope"], PROFILE),
        meter=ScpiMeterMode(sessions["meter"], PROFILE),
    )


@pytest.fixture
def rig() -> Iterator[Rig]:
    r = open_rig()
    yield r
    r.close()


def relays_at(world: SimpleRcWorld) -> list[tuple[float, dict[int, bool]]]:
    return [(t, dict(snap["relays"])) for t, snap in world.history()]  # type: ignore[arg-type]


def charge(rig: Rig, volts: float, dwell_s: float) -> None:
    """Charge the meter input to about ``volts`` and isolate it (supply off, relay open)."""
    rig.supply.set_current_limit(0.01)
    rig.supply.set_voltage(volts)
    rig.switch.transfer([DISCHARGE, BLEED], [CHARGE], clock=rig.clock, settle_s=1e-3)
    rig.supply.output(True)
    rig.clock.sleep(dwell_s)
    rig.supply.make_safe()
    rig.switch.open([CHARGE])


# -- identity and supply -----------------------------------------------------------------------


def test_every_instrument_answers_and_has_an_empty_error_queue(rig: Rig) -> None:
    for role, s in rig.sessions.items():
        assert s.identify().startswith("SIMULATED,"), role
        assert s.errors() == []


def test_supply_charging_current_follows_the_rc_law(rig: Rig) -> None:
    w = CONFIG.wiring
    rig.supply.set_current_limit(0.005)
    rig.supply.set_voltage(100.0)
    assert rig.supply.programmed_voltage() == pytest.approx(100.0)
    assert rig.supply.programmed_current_limit() == pytest.approx(0.005)
    rig.switch.transfer([DISCHARGE, BLEED], [CHARGE], clock=rig.clock, settle_s=1e-3)
    rig.supply.output(True)
    assert rig.supply.output_is_on()
    t = 5e-3
    rig.clock.sleep(t)
    # textbook first-order RC charge (Horowitz & Hill, The Art of Electronics, 3rd ed., 1.4.2
    # RC circuits; section from memory) through R_out + R_charge, with the leakage of the
    # test double's meter in parallel with C
    r_series = w.supply_output_ohms + w.charge_ohms
    farads = MODE_FARADS["AC V"]
    g = 1 / r_series + 1 / LEAK_OHMS
    v_final = 100.0 * (1 / r_series) / g
    v_node = v_final * (1 - math.exp(-t * g / farads))
    amps = (100.0 - v_node) / r_series
    assert rig.supply.measure_current() == pytest.approx(amps, rel=1e-6)
    assert rig.supply.measure_voltage() == pytest.approx(100.0 - amps * w.supply_output_ohms)
    assert rig.world.meter_input_volts() == pytest.approx(v_node, rel=1e-9)


def test_limits_are_enforced_before_anything_is_sent(rig: Rig) -> None:
    before = len(rig.world.history())
    sent = rig.sessions["supply"].errors  # any command would show up in the world history
    with pytest.raises(LimitError, match="bench limit"):
        rig.supply.set_voltage(600.0)  # profile allows 1500 V, the bench only 500 V
    with pytest.raises(LimitError):
        rig.supply.set_voltage(-1.0)
    with pytest.raises(LimitError):
        rig.supply.set_voltage(float("nan"))
    with pytest.raises(LimitError):
        rig.supply.set_current_limit(0.02)
    with pytest.raises(LimitError):
        rig.switch.close([17])  # profile: channels 1..16
    assert len(rig.world.history()) == before
    assert sent() == []
    assert rig.supply.programmed_voltage() == 0.0


def test_make_safe_turns_the_output_off_before_zeroing(rig: Rig) -> None:
    rig.supply.set_voltage(200.0)
    rig.supply.output(True)
    start = len(rig.world.history())
    rig.supply.make_safe()
    changes = [snap for _, snap in rig.world.history()[start:]]
    assert [(c["supply_on"], c["supply_volts"]) for c in changes] == [(False, 200.0), (False, 0.0)]
    assert not rig.supply.output_is_on()
    assert rig.supply.programmed_voltage() == 0.0


def test_refused_setting_raises_scpi_error() -> None:
    r = open_rig(replace(CONFIG, faults=Faults(scpi_error_every=2)))
    try:
        r.supply.set_voltage(10.0)
        with pytest.raises(ScpiError) as info:
            r.supply.set_voltage(20.0)
        assert (info.value.instrument, info.value.code) == ("supply", -200)
        assert info.value.command == PROFILE.command("supply", "set_voltage", volts=20.0)
        assert r.supply.programmed_voltage() == 10.0  # the refused command did nothing
        r.supply.output(True)  # 3rd setting: accepted
        with pytest.raises(ScpiError) as info:
            r.supply.make_safe()  # 4th (output off) refused, 5th (0 V) still sent
        assert info.value.command == PROFILE.command("supply", "output_off")
        last = r.world.history()[-1][1]
        assert (last["supply_on"], last["supply_volts"]) == (True, 0.0)
    finally:
        r.close()


# -- switch ------------------------------------------------------------------------------------


def test_switch_readback_and_break_before_make(rig: Rig) -> None:
    rig.switch.close([CHARGE, 5])
    assert rig.switch.closed([CHARGE, DISCHARGE, 5]) == [True, False, True]
    rig.switch.transfer([CHARGE, 5], [DISCHARGE], clock=rig.clock, settle_s=2e-3)
    assert rig.switch.closed([CHARGE, DISCHARGE, 5]) == [False, True, False]
    history = relays_at(rig.world)
    # ground truth: charge and discharge never conduct together; the make comes settle_s
    # after the break
    assert not any(r.get(CHARGE) and r.get(DISCHARGE) for _, r in history)
    t_open = next(t for t, r in history if r.get(CHARGE) is False)
    t_close = next(t for t, r in history if r.get(DISCHARGE))
    assert t_close - t_open == pytest.approx(2e-3)
    rig.switch.open_all()
    assert rig.switch.closed(range(1, 17)) == [False] * 16


class LyingBoardWorld(SimpleRcWorld):
    """The relay board reads channel 2 back as closed whatever it was told (a welded
    readback contact): the driver must refuse to make another path."""

    def relay_commanded(self, channels: Sequence[int]) -> list[bool]:
        real = super().relay_commanded(channels)
        return [True if int(c) == DISCHARGE else v for c, v in zip(channels, real, strict=True)]


def test_transfer_stops_when_the_readback_disagrees() -> None:
    r = open_rig(world_cls=LyingBoardWorld)
    try:
        with pytest.raises(SafetyError, match=r"\[2\] still read closed"):
            r.switch.transfer([DISCHARGE], [CHARGE], clock=r.clock, settle_s=0.0)
        assert not any(relays.get(CHARGE) for _, relays in relays_at(r.world))
    finally:
        r.close()


# -- scope -------------------------------------------------------------------------------------


def configure_scope(scope: Scope, bits: int, order: str) -> None:
    scope.configure_channel(
        1, coupling="DC", impedance_ohms=50, bandwidth_hz=None, range_volts=0.04, offset_volts=0.0
    )
    scope.configure_channel(
        2, coupling="DC", impedance_ohms=1e6, bandwidth_hz=None, range_volts=0.4, offset_volts=0.0
    )
    scope.configure_acquisition(1e-6, 2000, -100e-6)
    scope.configure_trigger(1, 1e-3, "positive")
    scope.set_format(bits, order)  # type: ignore[arg-type]


@pytest.mark.parametrize(("bits", "order"), [(16, "little"), (8, "big")])
def test_discharge_capture_matches_the_rc_decay(rig: Rig, bits: int, order: str) -> None:
    w = CONFIG.wiring
    charge(rig, 100.0, dwell_s=0.1)
    configure_scope(rig.scope, bits, order)
    rig.scope.arm()
    assert rig.scope.state() == "waiting"
    rig.switch.transfer([CHARGE, BLEED], [DISCHARGE], clock=rig.clock, settle_s=1e-5)
    t_event = rig.clock.now()
    v0 = rig.world.meter_input_volts()  # ground truth at the instant the discharge relay made
    assert rig.scope.wait_complete(rig.clock, timeout_s=0.1, poll_s=1e-4)
    # the virtual clock moved only through the polls, and at least to the end of the record
    assert 1.9e-3 <= rig.clock.now() - t_event <= 1.9e-3 + 2e-4
    trace = rig.scope.fetch(1)
    assert trace.bits == bits and trace.codes.dtype == np.dtype(f"int{bits}")
    assert len(trace.codes) == 2000
    t = trace.time()
    # the sample clock runs freely: the first sample lies within one interval after the
    # offset asked for (the trigger time is interpolated between samples)
    assert -100e-6 <= t[0] < -99e-6 and t[1] - t[0] == pytest.approx(1e-6)
    # textbook RC discharge i(t) = (V0/R) exp(-t/RC) (Horowitz & Hill, The Art of
    # Electronics, 3rd ed., 1.4.2; section from memory), seen as the shunt voltage; R is
    # load + shunt, in parallel with the test double's leakage
    r_dis = LOAD_OHMS + w.sense.ohms
    tau = MODE_FARADS["AC V"] / (1 / r_dis + 1 / LEAK_OHMS)
    volts = trace.volts()
    # codes are rounded to the nearest step and clipped at the top code (full scale - 1 step)
    top = trace.reference_volts + (2 ** (bits - 1) - 1) * trace.volts_per_code
    dt = trace.sample_interval_s

    def error(lag: float) -> float:
        ts = t + lag  # seconds since the relay made
        want = np.where(ts >= 0, v0 / r_dis * w.sense.ohms * np.exp(-np.clip(ts, 0, None) / tau), 0)
        return float(np.max(np.abs(volts - np.minimum(want, top))))

    # the interpolated trigger lies within one sample of the switching instant
    lag = 0.0
    for width in (dt, dt / 400, dt / 160_000):  # a grid, refined twice around its best
        lags = np.linspace(lag - width, lag + width, 801)
        lag = float(lags[int(np.argmin([error(x) for x in lags]))])
    assert error(lag) <= trace.volts_per_code * 0.5 + 1e-9
    after = t + lag >= 0
    assert np.all(np.abs(volts[~after]) <= trace.volts_per_code)  # relay open before the trigger
    # a log-linear fit of the tail gives the time constant back
    keep = after & (volts > 0.2 * volts[after].max())
    slope = np.polyfit(t[keep], np.log(volts[keep]), 1)[0]
    assert -1 / slope == pytest.approx(tau, rel=0.02 if bits == 8 else 2e-3)
    divider = rig.scope.fetch(2)
    assert divider.volts()[np.argmin(np.abs(t))] == pytest.approx(
        v0 / w.divider_ratio, abs=divider.volts_per_code
    )


def test_scope_and_switch_values_are_checked_before_sending(rig: Rig) -> None:
    scope = rig.sessions["scope"]
    before = scope.query("SENSe1:VOLTage:RANGe:PTPeak?")
    good = {
        "coupling": "DC",
        "impedance_ohms": 50,
        "bandwidth_hz": None,
        "range_volts": 0.5,
        "offset_volts": 0.0,
    }
    for ch, bad in [
        (5, {}),  # profile: inputs 1..4
        (1, {"coupling": "GND"}),
        (1, {"range_volts": 0.0}),
        (1, {"bandwidth_hz": -1.0}),
        (1, {"offset_volts": float("inf")}),
    ]:
        with pytest.raises(LimitError):
            rig.scope.configure_channel(ch, **{**good, **bad})
    with pytest.raises(LimitError):
        rig.scope.configure_acquisition(1e-6, 500, 0.0)  # profile: 1000 points at least
    with pytest.raises(LimitError):
        rig.scope.configure_trigger(1, 0.1, "sideways")
    with pytest.raises(LimitError):
        rig.scope.set_format(12, "big")
    with pytest.raises(LimitError):
        rig.scope.wait_complete(rig.clock, timeout_s=1.0, poll_s=0.0)
    with pytest.raises(LimitError):
        rig.switch.transfer([1], [1, 2], clock=rig.clock, settle_s=0.0)
    assert scope.query("SENSe1:VOLTage:RANGe:PTPeak?") == before
    assert scope.errors() == []
    assert not any(any(r.values()) for _, r in relays_at(rig.world))


def test_wait_complete_gives_up_when_nothing_triggers(rig: Rig) -> None:
    configure_scope(rig.scope, 8, "big")
    rig.scope.arm()
    t0 = rig.clock.now()
    assert not rig.scope.wait_complete(rig.clock, timeout_s=2e-3, poll_s=5e-4)
    assert rig.clock.now() - t0 == pytest.approx(2e-3)
    assert rig.scope.state() == "waiting"
    rig.scope.abort()
    assert rig.scope.condition() & 0b101000 == 0


def test_fetch_without_a_record_reports_the_instruments_error(rig: Rig) -> None:
    configure_scope(rig.scope, 8, "big")
    with pytest.raises(ScpiError) as info:
        rig.scope.fetch(1)
    # SCPI-1999 Vol. 2, 21.8 error list (from memory): -230 "Data corrupt or stale"
    assert info.value.code == -230
    assert rig.sessions["scope"].errors() == []


def test_measure_dc_reads_the_divider(rig: Rig) -> None:
    charge(rig, 50.0, dwell_s=0.1)
    expected = rig.world.meter_input_volts() / CONFIG.wiring.divider_ratio
    assert rig.scope.measure_dc(2) == pytest.approx(expected, rel=1e-6)


def test_corrupt_block_is_refused_and_the_next_one_reads() -> None:
    r = open_rig(replace(CONFIG, faults=Faults(corrupt_block_every=2)))
    try:
        charge(r, 100.0, dwell_s=0.05)
        configure_scope(r.scope, 16, "big")
        r.scope.arm()
        r.switch.transfer([CHARGE], [DISCHARGE], clock=r.clock, settle_s=1e-5)
        assert r.scope.wait_complete(r.clock, timeout_s=0.1, poll_s=1e-3)
        first = r.scope.fetch(1)
        with pytest.raises(BlockFormatError):
            r.scope.fetch(1)
        third = r.scope.fetch(1)
        np.testing.assert_array_equal(first.codes, third.codes)
    finally:
        r.close()


# -- meter mode and reconnects -----------------------------------------------------------------


def test_scpi_and_manual_meter_modes(rig: Rig) -> None:
    rig.meter.set_mode("DC mV")
    assert rig.world.meter_mode() == "DC mV"
    assert rig.meter.mode() == "DC mV"
    before = len(rig.world.history())
    with pytest.raises(ProfileError, match="Capacitance"):
        rig.meter.set_mode("Capacitance")
    assert len(rig.world.history()) == before
    turned: list[str] = []

    def dial(mode: str) -> None:  # the simulation's operator turns the dial
        turned.append(mode)
        rig.world.meter_set_mode(mode)

    manual = ManualMeterMode(dial)
    assert manual.mode() is None
    manual.set_mode("AC mV")
    manual.set_mode("AC mV")  # prompts again: the meter may have been touched meanwhile
    assert turned == ["AC mV", "AC mV"]
    assert manual.mode() == "AC mV" == rig.world.meter_mode()


def test_sessions_ride_through_dropped_links() -> None:
    r = open_rig(replace(CONFIG, faults=Faults(drop_connection_after=3)), timeout_s=0.2)
    try:
        calls: list[str] = []
        s = r.sessions["supply"]
        s.setup = lambda sess: calls.append(sess.name)
        for k in range(6):
            r.supply.set_voltage(float(k))  # a write checked in one compound message
            assert r.supply.programmed_voltage() == float(k)
        assert len(calls) >= 3  # reconnected (and re-ran the set-up) again and again
    finally:
        r.close()


def test_trace_scaling_follows_the_profile_formula() -> None:
    # volts = (code - reference_code) * volts_per_code + reference_volts and
    # seconds = first_sample_s + i * sample_interval_s (the scaling rule stated in the
    # shipped profile's [scope.scaling_fields] comment)
    codes = np.array([-128, 0, 10, 127], dtype=np.int8)
    tr = Trace(
        codes,
        sample_interval_s=2e-9,
        first_sample_s=-4e-9,
        volts_per_code=0.5,
        reference_volts=1.0,
        reference_code=10.0,
        bits=8,
    )
    np.testing.assert_array_equal(tr.volts(), [-68.0, -4.0, 1.0, 59.5])
    np.testing.assert_allclose(tr.time(), [-4e-9, -2e-9, 0.0, 2e-9], atol=1e-24)
    assert tr.volts().dtype == np.float64


def test_drivers_run_the_shipped_bench_world() -> None:
    """The same drivers against the circuit-engine world that ``start_sim_bench`` builds by
    default (not the test double): a charge, a discharge and a capture end to end."""
    clock = VirtualClock()
    config = WorldConfig(meter_model=METER)
    with start_sim_bench(config, clock) as sim:
        sessions = [
            ScpiSession(res, role, profile=PROFILE, timeout_s=2.0)
            for role, res in sim.resources.items()
        ]
        try:
            by_role = {s.name: s for s in sessions}
            supply = Supply(by_role["supply"], PROFILE)
            switch = SwitchBoard(by_role["switch"], PROFILE)
            scope = Scope(by_role["scope"], PROFILE)
            meter = ScpiMeterMode(by_role["meter"], PROFILE)
            first = sim.world.meter_modes()[0]
            meter.set_mode(first)
            assert meter.mode() == first == sim.world.meter_mode()
            supply.set_current_limit(0.01)
            supply.set_voltage(100.0)
            switch.transfer([DISCHARGE, BLEED], [CHARGE], clock=clock, settle_s=1e-3)
            supply.output(True)
            clock.sleep(2.0)
            supply.make_safe()
            switch.open([CHARGE])
            assert sim.world.meter_input_volts() > 50.0
            scope.configure_channel(
                1,
                coupling="DC",
                impedance_ohms=50,
                bandwidth_hz=None,
                range_volts=2.0,
                offset_volts=0.0,
            )
            scope.configure_acquisition(1e-9, 5000, -200e-9)
            scope.configure_trigger(1, 0.02, "either")
            scope.set_format(16, "big")
            scope.arm()
            switch.transfer([CHARGE, BLEED], [DISCHARGE], clock=clock, settle_s=1e-6)
            assert scope.wait_complete(clock, timeout_s=0.01, poll_s=1e-5)
            volts = scope.fetch(1).volts()
            assert np.abs(volts).max() > 0.02  # the event crossed the trigger level
        finally:
            for s in sessions:
                s.close()
