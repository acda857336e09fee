"""Every failure branch of the interlocks and of the safe-state procedure, driven by a fake
bench whose readbacks a test sets (the integration fault table drives the same branches on the
simulated bench; these run in milliseconds so a mutation check can afford them)."""

from __future__ import annotations

import math
from types import SimpleNamespace

import pytest

from rig.runner.interlocks import Interlocks
from rigbase.errors import LimitError, SafetyError


class FakeBench:
    def __init__(self) -> None:
        self.on = False
        self.volts = 0.0
        self.amps = 0.0
        self.closed_set: set[int] = set()
        self.stuck: set[int] = set()  # coil readback says closed whatever is commanded
        self.residual_v = [0.0]  # successive divider readings (the last one repeats)
        self.fail: set[str] = set()
        self.slept = 0.0
        self.supply = SimpleNamespace(
            output_is_on=lambda: self._maybe("output", self.on),
            measure_voltage=lambda: self._maybe("volts", self.volts),
            measure_current=lambda: self.amps,
            make_safe=lambda: self._maybe("make_safe", None),
        )
        self.switch = SimpleNamespace(
            closed=lambda chans: self._maybe(
                "closed", [c in self.closed_set or c in self.stuck for c in chans]
            ),
            open=lambda chans: self._maybe("open", self.closed_set.difference_update(chans)),
            close=lambda chans: self._maybe("close", self.closed_set.update(chans)),
        )
        self.scope = SimpleNamespace(measure_dc=self._dc, abort=lambda: None)
        self.clock = SimpleNamespace(sleep=self._sleep)

    def _maybe(self, name, value):
        if name in self.fail:
            raise ConnectionError(f"{name} failed")
        return value

    def _dc(self, ch: int) -> float:
        v = self.residual_v.pop(0) if len(self.residual_v) > 1 else self.residual_v[0]
        return v / 1000.0

    def _sleep(self, s: float) -> None:
        self.slept += s


CONFIG = SimpleNamespace(
    limits=SimpleNamespace(
        max_volts=1100.0,
        hazardous_live_volts=60.0,
        safe_residual_volts=1.0,
        current_limit_amps=0.02,
    ),
    channels=SimpleNamespace(charge=1, discharge=2, bleed=3),
    loads=[SimpleNamespace(name="short", channel=4, ohms=0.05)],
    divider_ratio=1000.0,
    charge_ohms=100e3,
)


def _lock(b: FakeBench | None = None) -> tuple[Interlocks, FakeBench]:
    b = b or FakeBench()
    return Interlocks(b, CONFIG), b


@pytest.mark.parametrize("volts", [1100.0001, -1.0, math.nan, math.inf])
def test_voltage_outside_the_bench_limit_is_refused_before_sending(volts):
    lock, _ = _lock()
    with pytest.raises(LimitError):
        lock.check_voltage(volts)


def test_voltage_at_the_limit_is_allowed():
    lock, _ = _lock()
    lock.check_voltage(1100.0)


def test_precheck_passes_on_a_quiet_bench():
    lock, _ = _lock()
    assert lock.precheck() == 0.0


@pytest.mark.parametrize(
    ("setup", "words"),
    [
        (lambda b: setattr(b, "on", True), "reads back ON"),
        (lambda b: setattr(b, "volts", 61.0), "does not turn off"),
        (lambda b: b.closed_set.add(1), "[1] read back closed"),
        (lambda b: b.closed_set.add(2), "[2] read back closed"),
        (lambda b: setattr(b, "residual_v", [1.5]), "residual 1.5 V"),
    ],
)
def test_precheck_refuses_each_unsafe_reading(setup, words):
    lock, b = _lock()
    setup(b)
    with pytest.raises(SafetyError) as err:
        lock.precheck()
    assert words in str(err.value)


def test_supply_at_the_hazardous_live_limit_is_not_live():
    lock, b = _lock()
    b.volts = 60.0
    assert lock.supply_live() is None
    b.volts = 60.01
    assert lock.supply_live() == pytest.approx(60.01)


def test_require_open_names_the_stuck_channel():
    lock, b = _lock()
    lock.require_open((1, 2), "x")
    b.stuck.add(2)
    with pytest.raises(SafetyError, match=r"\[2\] read back closed x"):
        lock.require_open((1, 2), "x")


def test_charged_check_catches_a_low_input_and_a_tripped_supply():
    lock, b = _lock()
    b.on = True
    b.residual_v = [499.0]
    with pytest.raises(SafetyError, match="reached only 499 V"):
        lock.verify_charged(1000.0)
    assert lock.suspects  # the safe-state report will not claim the relays open
    lock2, b2 = _lock()
    b2.on, b2.residual_v = True, [501.0]
    assert lock2.verify_charged(1000.0) == pytest.approx(501.0)
    b2.on = False
    with pytest.raises(SafetyError, match="tripped"):
        lock2.verify_charged(1000.0)


def test_isolation_check_finds_current_through_a_welded_charge_relay():
    lock, b = _lock()
    b.amps = 0.1 * 1000.0 / 100e3 * 0.99  # just inside a tenth of V/R_charge
    lock.verify_isolated(1000.0, 1000.0)
    b.amps = 0.1 * 1000.0 / 100e3 * 1.01
    with pytest.raises(SafetyError, match="charge relay channel 1 conducts"):
        lock.verify_isolated(1000.0, 1000.0)
    rep = lock.make_safe(bleed_s=0.01, max_wait_s=0.1)
    assert not rep.reached and any("channel 1" in p for p in rep.problems)


def test_discharge_path_check():
    lock, b = _lock()
    b.residual_v = [11.0]  # above 1 % of 1000 V: no current flowed
    with pytest.raises(SafetyError, match="discharge relay channel 2 or load selector channel 4"):
        lock.verify_discharge_path(False, 1000.0, "short", 4)
    lock, b = _lock()
    b.residual_v = [9.0]
    lock.verify_discharge_path(False, 1000.0, "short", 4)  # emptied: the scope is at fault
    lock.verify_discharge_path(True, 1000.0, "short", 4)  # captured: current flowed


def test_peak_bound_of_the_selected_load():
    lock, _ = _lock()
    lock.check_peak(3.9, 1000.0, 500.0, "500R")
    with pytest.raises(SafetyError, match="welded load selector"):
        lock.check_peak(4.1, 1000.0, 500.0, "500R")


def test_bleed_that_cannot_empty_the_input_raises_and_leaves_the_bleed_closed():
    lock, b = _lock()
    b.residual_v = [50.0]
    with pytest.raises(SafetyError, match="still above"):
        lock.bleed_until_safe(bleed_s=0.01, max_wait_s=0.1)
    assert 3 in b.closed_set


def test_bleed_returns_the_residual_once_safe():
    lock, b = _lock()
    b.residual_v = [50.0, 0.5]
    assert lock.bleed_until_safe(bleed_s=0.01, max_wait_s=1.0) == pytest.approx(0.5)
    assert 3 not in b.closed_set


def test_make_safe_on_a_quiet_bench_confirms_everything():
    lock, b = _lock()
    rep = lock.make_safe(bleed_s=0.01, max_wait_s=0.1)
    assert rep.reached and rep.supply_off and rep.relays_open and rep.bleed_closed


@pytest.mark.parametrize(
    ("setup", "words"),
    [
        (lambda b: b.fail.add("make_safe"), "could not switch off"),
        (lambda b: b.fail.add("open"), "could not open"),
        (lambda b: b.fail.add("close"), "could not close bleed"),
        (lambda b: setattr(b, "on", True), "still reads back ON"),
        (lambda b: setattr(b, "volts", 100.0), "switch it off at the mains"),
        (lambda b: b.stuck.add(2), "[2] still read back closed"),
        (lambda b: b.fail.add("closed"), "switch readback failed"),
        (lambda b: setattr(b, "residual_v", [5.0]), "above 1 V after"),
    ],
)
def test_make_safe_tries_every_step_and_says_what_it_could_not_confirm(setup, words):
    lock, b = _lock()
    setup(b)
    rep = lock.make_safe(bleed_s=0.01, max_wait_s=0.1)
    assert not rep.reached
    assert any(words in p for p in rep.problems), rep.problems
    assert "NOT CONFIRMED" in rep.summary()
    assert b.slept >= 0.01  # it still bled
