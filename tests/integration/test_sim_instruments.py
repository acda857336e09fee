"""The simulated supply, switch board, scope and bench meter through pyvisa-py over TCP.

The world behind them is the closed-form RC test double of ``tests/sim_support.py``, so every
physical answer is known: RC charge and discharge ``v0 exp(-t/RC)`` (textbook: Horowitz &
Hill, The Art of Electronics, 3rd ed., 1.4.2; section from memory). Blocks are decoded with
pyvisa's own ``pyvisa.util.from_ieee_block`` (reference decoder of IEEE 488.2 definite-length
blocks). Writes are asynchronous, so a test that moves
the virtual clock first waits for ``*OPC?``.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterator
from dataclasses import replace

import numpy as np
import pytest
import pyvisa
from pyvisa.util import from_ieee_block
from scipy.signal import lsim

from drivers.sim.bench import SimBench
from drivers.sim.instruments import DEFAULT_PROFILE
from drivers.sim.interfaces import BenchWiring, Faults, LoadSpec, SenseSpec, WorldConfig
from tests.sim_support import (
    error_codes,
    open_instrument,
    query_raw_block,
    start_double_bench,
)

# 1 kohm load with a 10 ohm shunt: tau = 1010 ohm * 100 nF = 101 us in the "AC V" mode
WIRING = BenchWiring(loads=(LoadSpec("r1k", 1000.0),), sense=SenseSpec(ohms=10.0))
CONFIG = WorldConfig(meter_model="test-double", wiring=WIRING, noise_volts=1e-4, seed=3)
PROFILE = tomllib.loads(DEFAULT_PROFILE.read_text(encoding="utf-8"))
CHARGE_VOLTS = 50.0


@pytest.fixture(scope="module")
def bench() -> Iterator[SimBench]:
    with start_double_bench(CONFIG) as sim:
        yield sim


@pytest.fixture
def inst(rm: pyvisa.ResourceManager, bench: SimBench) -> Iterator[dict]:
    opened = {role: open_instrument(rm, res) for role, res in bench.resources.items()}
    for i in opened.values():
        assert i.query("*RST;*CLS;*OPC?") == "1"
    assert opened["meter"].query('FUNC "VOLT:AC";*OPC?') == "1"  # 100 nF in the test double
    yield opened
    for i in opened.values():
        i.close()


def _charge(inst: dict, bench: SimBench, volts: float = CHARGE_VOLTS) -> float:
    """Charge the meter input for 20 charge time constants; returns the node voltage."""
    sw, ps = inst["switch"], inst["supply"]
    assert sw.query("ROUT:OPEN:ALL;:ROUT:CLOS (@1);*OPC?") == "1"
    assert ps.query(f"VOLT {volts};CURR MAX;:OUTP ON;*OPC?") == "1"
    bench.world.clock.sleep(20 * 101e3 * 100e-9)
    assert ps.query("OUTP OFF;:VOLT 0;*OPC?") == "1"
    assert sw.query("ROUT:OPEN (@1);*OPC?") == "1"
    return bench.world.meter_input_volts()


def _discharge(inst: dict) -> None:
    assert inst["switch"].query("ROUT:CLOS (@2);*OPC?") == "1"


def _setup_scope(scope, points: int, dt: float, first_sample_s: float, level: float = 0.1) -> None:
    assert (
        scope.query(
            f"SENS1:VOLT:RANG:PTP 1;:SENS1:VOLT:OFFS 0;:SENS:SWE:TINT {dt};POIN {points};"
            f"OFFS:TIME {first_sample_s};"
            f":TRIG:SOUR INT1;LEV {level};SLOP POS;:INIT:CONT OFF;:INIT;*OPC?"
        )
        == "1"
    )


def _scaling(scope, n: int = 1) -> dict[str, float]:
    fields = PROFILE["scope"]["scaling_fields"]
    values = [float(v) for v in scope.query(f"TRAC:SCAL? INT{n}").split(",")]
    return {name: values[i] for name, i in fields.items()}


def _volts(codes: np.ndarray, sc: dict[str, float]) -> np.ndarray:
    # the profile's scaling rule: volts = (code - reference_code) * volts_per_code + reference_volts
    return (codes - sc["reference_code"]) * sc["volts_per_code"] + sc["reference_volts"]


# -- every profile command, long and short form ------------------------------------------------

_MNEMONIC = re.compile(r"\b([A-Z]+)([a-z]+)([A-Za-z]*)\b")


def _short(command: str) -> str:
    """Short form of every mnemonic: keep the upper-case letters (SCPI-1999 6.2.1)."""
    return _MNEMONIC.sub(lambda m: "".join(c for c in m.group(0) if c.isupper()), command)


def _fill(template: str) -> str:
    values = {
        "volts": 12.5, "amps": 0.01, "channels": "(@1,3)", "ch": 2, "coupling": "AC",
        "ohms": 50, "hz": 20e6, "state": "ON", "seconds": 1e-6, "points": 2000,
        "source": "INTernal1", "slope": "NEGative", "fmt": "INTeger,16", "order": "SWAPped",
            "sampling": "MEAN",
    }  # fmt: skip
    return template.format(**values)


@pytest.mark.parametrize("form", ["long", "short", "lower"])
def test_every_profile_command_is_accepted(inst: dict, bench: SimBench, form: str) -> None:
    def variant(cmd: str) -> str:
        return {"long": cmd, "short": _short(cmd), "lower": cmd.lower()}[form]

    roles = {"supply": "supply", "switch": "switch", "scope": "scope", "meter": "meter"}
    for role, section in roles.items():
        i = inst[role]
        for key, template in PROFILE[section].items():
            if not isinstance(template, str) or key in ("fetch", "scaling", "measure_dc"):
                continue
            if section == "meter" and key == "set_function":
                for function in PROFILE["meter"]["functions"].values():
                    i.write(variant(template.format(function=function)))
                continue
            cmd = variant(_fill(template))
            if "?" in cmd:
                assert i.query(cmd) != ""
            else:
                i.write(cmd)
        assert error_codes(i) == [], (role, form)
    for name in ("common",):
        for template in PROFILE[name].values():
            if not isinstance(template, str):
                continue  # compound = true: how messages are built, not a command
            for i in inst.values():
                cmd = variant(template)
                if "?" in cmd:
                    assert i.query(cmd)
                else:
                    i.write(cmd)
    # the scope read-back commands need a completed record: make one and fetch it
    scope = inst["scope"]
    assert scope.query("TRIG:SOUR INT1;LEV 0.1;SLOP POS;*OPC?") == "1"  # *RST above reset it
    assert scope.query(variant(PROFILE["scope"]["single"]) + ";*OPC?") == "1"
    _charge(inst, bench)
    _discharge(inst)
    bench.world.clock.sleep(0.01)
    for key in ("scaling", "measure_dc"):
        assert scope.query(variant(_fill(PROFILE["scope"][key])))
    block = query_raw_block(scope, variant(_fill(PROFILE["scope"]["fetch"])))
    assert block.startswith(b"#") and block.endswith(b"\n")
    for i in inst.values():
        assert error_codes(i) == [], form


# -- supply ---------------------------------------------------------------------------------------


def test_supply_setpoints_and_ranges(inst: dict) -> None:
    ps = inst["supply"]
    ps.write("VOLT 1500;CURR 0.1")
    assert ps.query("VOLT?;CURR?") == "1500;0.1"
    for bad in ("VOLT 1500.1", "VOLT -0.5", "CURR 0.2", "CURR -1"):
        ps.write(bad)
        assert error_codes(ps) == [-222], bad  # SCPI-1999 -222 data out of range
    assert ps.query("VOLT?;CURR?") == "1500;0.1"  # refused settings change nothing
    ps.write("VOLT MIN;CURR DEF")
    assert ps.query("VOLT?;CURR?;:VOLT? MAX") == "0;0.1;1500"


def test_supply_rst_and_output(inst: dict, bench: SimBench) -> None:
    ps = inst["supply"]
    assert ps.query("VOLT 200;:OUTP ON;:OUTP?") == "1"
    assert bench.world.history()[-1][1]["supply_on"] is True
    assert ps.query("*RST;:OUTP?;:VOLT?") == "0;0"
    last = bench.world.history()[-1][1]
    assert last["supply_on"] is False and last["supply_volts"] == 0.0


def test_supply_measures_the_rc_charge(inst: dict, bench: SimBench) -> None:
    ps, sw = inst["supply"], inst["switch"]
    w = bench.world
    w.meter_connect("test-double")  # start from a discharged input
    assert sw.query("ROUT:CLOS (@1);*OPC?") == "1"
    assert ps.query("VOLT 100;:OUTP ON;*OPC?") == "1"
    r_path = CONFIG.wiring.supply_output_ohms + CONFIG.wiring.charge_ohms
    tau = w.time_constant()
    w.clock.sleep(tau)
    volts, amps = float(ps.query("MEAS:VOLT:DC?")), float(ps.query("MEAS:CURR:DC?"))
    # textbook RC charge (Horowitz & Hill, 1.4.2, from memory) with the 10 Mohm leak as a divider:
    # v(t) = v_inf (1 - exp(-t/tau)), i = (V - v) / R_path, terminal = V - i R_out
    v_inf = 100.0 * 10e6 / (10e6 + r_path)
    node = v_inf * (1 - np.exp(-1.0))
    assert amps == pytest.approx((100.0 - node) / r_path, rel=1e-9)
    assert volts == pytest.approx(100.0 - amps * CONFIG.wiring.supply_output_ohms, rel=1e-9)
    assert tau == pytest.approx(100e-9 / (1 / r_path + 1 / 10e6), rel=1e-12)


# -- switch ---------------------------------------------------------------------------------------


def test_switch_channel_lists(inst: dict, bench: SimBench) -> None:
    sw = inst["switch"]
    sw.write("ROUT:CLOS (@1,3)")
    assert sw.query("ROUT:CLOS? (@1:4)") == "1,0,1,0"
    assert sw.query("ROUT:OPEN? (@1:4)") == "0,1,0,1"
    sw.write("ROUTE:CLOSE (@5:7,16)")
    assert sw.query("ROUT:CLOS:STAT?") == "(@1,3,5,6,7,16)"
    assert bench.world.relay_commanded([5, 6, 7, 8]) == [True, True, True, False]
    sw.write("ROUT:OPEN (@3,5)")
    assert sw.query("ROUT:CLOS? (@16,5,3,1)") == "1,0,0,1"
    sw.write("ROUT:OPEN:ALL")
    assert sw.query("ROUT:CLOS? (@1:16)") == ",".join(["0"] * 16)


def test_switch_rejects_bad_channels(inst: dict, bench: SimBench) -> None:
    sw = inst["switch"]
    for bad in ("ROUT:CLOS (@2,17)", "ROUT:CLOS (@0)", "ROUT:OPEN (@15:18)"):
        sw.write(bad)
        assert error_codes(sw) == [-222], bad  # SCPI-1999 -222 data out of range
    assert bench.world.relay_commanded([2]) == [False]  # nothing of a bad list is applied
    sw.write("ROUT:CLOS 2")
    assert error_codes(sw) == [-104]  # a channel list is required: data type error (from memory)
    sw.write("ROUT:CLOS (@2);*RST")
    assert sw.query("ROUT:CLOS? (@2)") == "0"


# -- meter ----------------------------------------------------------------------------------------


def test_meter_functions(inst: dict, bench: SimBench) -> None:
    meter = inst["meter"]
    for mode, function in PROFILE["meter"]["functions"].items():
        for spelling in (function, _short(function), function.lower()):
            assert meter.query(f'SENS:FUNC "{spelling}";*OPC?') == "1"
            assert bench.world.meter_mode() == mode
            assert meter.query("FUNC?") == f'"{function}"'
    assert error_codes(meter) == []
    for bad in ('FUNC "FREQuency"', 'FUNC "VOLT"', 'FUNC "VOLT:AC:MILL:X"'):
        meter.write(bad)
        assert error_codes(meter) == [-224], bad  # illegal parameter value (from memory)


# -- scope ----------------------------------------------------------------------------------------


def test_scope_setting_errors(inst: dict) -> None:
    scope = inst["scope"]
    cases = [
        ("INP5:COUP AC", -114),  # header suffix out of range (from memory)
        ("INP1:IMP 75", -224),  # only 50 ohm and 1 Mohm
        ("SENS:SWE:POIN 999", -222),  # points below 1000
        ("SENS:SWE:POIN 10000001", -222),
        ("SENS:SWE:TINT 2", -222),
        ("FORM:DATA INT,12", -224),
        ("FORM:DATA REAL,32", -224),
        ("TRIG:SOUR INT5", -224),
        ("TRIG:SLOP UP", -224),
        ("INP1:COUP GND", -224),
        ("TRAC:DATA? INT1", -230),  # no completed acquisition yet
        ("TRAC:SCAL? INT1", -230),
    ]
    for command, code in cases:
        scope.write(command)  # a refused query sends no answer
        assert error_codes(scope) == [code], command
    scope.write("INP1:IMP 1MOHM;IMP?")
    assert scope.read() == "1000000"
    assert scope.query("INP1:IMP 50;IMP?;:FORM INT,16;FORM?;:FORM:BORD SWAP;BORD?") == (
        "50;INT,16;SWAP"
    )


def _switch_lag(volts: np.ndarray, t: np.ndarray, model, dt: float) -> tuple[float, float]:
    """The lag of the trigger after the switching instant (s, searched in [-dt, dt]) that fits
    ``model(t since the switch)`` best, and the largest error there: the sample clock runs
    freely, and the trigger time interpolated across a step lies within one sample of it."""
    lags = np.linspace(-dt, dt, 801)
    errs = [np.max(np.abs(volts - model(t + lag))) for lag in lags]
    k = int(np.argmin(errs))
    return float(lags[k]), float(errs[k])


def test_scope_triggers_on_a_discharge(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    dt, points, first_sample_s = 1e-6, 2000, -200e-6
    _charge(inst, bench)
    _setup_scope(scope, points, dt, first_sample_s, level=0.1)
    assert scope.query("STAT:OPER:COND?") == "32"  # SCPI-1999: bit 5 waiting for trigger
    w.clock.sleep(1e-3)
    assert scope.query("STAT:OPER:COND?") == "32"
    v0 = w.meter_input_volts()  # after 1 ms of self-discharge through the 10 Mohm leak
    _discharge(inst)
    w.clock.sleep(0.5e-3)
    assert scope.query("STAT:OPER:COND?") == "8"  # bit 3: post-trigger part still acquiring
    scope.write("TRAC:DATA? INT1")  # refused, no answer: the record is not complete yet
    assert error_codes(scope) == [-230]
    w.clock.sleep(2e-3)
    assert scope.query("STAT:OPER:COND?") == "0"
    scope.write("FORM INT,16")
    sc = _scaling(scope)
    assert (sc["points"], sc["sample_interval_s"]) == (points, dt)
    # the sample clock runs freely: the first sample is the first grid point at or after
    # trigger + offset, so it lies up to one sample interval later than the offset asked for
    assert first_sample_s <= sc["first_sample_s"] < first_sample_s + dt
    assert sc["volts_per_code"] == 1.0 / 2**16 and sc["reference_volts"] == 0.0
    raw = query_raw_block(scope, "TRAC:DATA? INT1")
    codes = np.asarray(from_ieee_block(raw[:-1], "h", True, np.array))
    volts = _volts(codes, sc)
    t = sc["first_sample_s"] + np.arange(points) * dt  # seconds from the trigger
    k = int(np.argmax(t >= 0))  # the first sample at or after the interpolated trigger
    assert volts[k - 1] < 0.1 <= volts[k]
    # closed form (textbook RC discharge, Horowitz & Hill 1.4.2, from memory): shunt volts =
    # v0 Rs/R exp(-t/tau) from the relay closing instant, which precedes the interpolated
    # trigger by less than one sample interval
    r = 1010.0
    tau = 1.0 / (1.0 / r + 1.0 / 10e6) * 100e-9

    def model(ts: np.ndarray) -> np.ndarray:
        return np.where(ts >= 0, v0 / r * 10.0 * np.exp(-np.clip(ts, 0, None) / tau), 0.0)

    lag, err = _switch_lag(volts, t, model, dt)
    tol = 6 * CONFIG.noise_volts + sc["volts_per_code"]
    assert abs(lag) <= dt and err < tol
    # the decay constant from a log-linear fit over 3 tau (textbook RC: tau = R C)
    post = (t > 0) & (t < 3 * tau)
    slope = np.polyfit(t[post], np.log(volts[post]), 1)[0]
    assert -1.0 / slope == pytest.approx(tau, rel=0.01)


def test_blocks_int8_and_int16_both_orders(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    v0 = _charge(inst, bench)
    # 1,000,000 points at 1 ns: 1 ms, about 10 tau after a 20 % pre-trigger part
    _setup_scope(scope, 1_000_000, 1e-9, -200e-6)
    _discharge(inst)
    w.clock.sleep(2e-3)
    scope.write("FORM:DATA INT,8")
    sc8 = _scaling(scope)
    raw8 = query_raw_block(scope, "TRAC:DATA? INT1")
    assert raw8.startswith(b"#71000000") and len(raw8) == 9 + 1_000_000 + 1
    # reference decoder: pyvisa.util.from_ieee_block
    codes8 = np.asarray(from_ieee_block(raw8[:-1], "b", False, np.array))
    assert codes8.size == 1_000_000 and codes8.min() >= -128 and codes8.max() <= 127
    t = sc8["first_sample_s"] + np.arange(codes8.size) * 1e-9
    tau = 1.0 / (1.0 / 1010.0 + 1.0 / 10e6) * 100e-9

    def model(ts: np.ndarray, v0: float = v0) -> np.ndarray:
        return np.where(ts >= 0, v0 / 101.0 * np.exp(-np.clip(ts, 0, None) / tau), 0.0)

    # 8 bits over 1 V: volts_per_code 3.9 mV; rounding error at most half a code plus noise
    assert sc8["volts_per_code"] == 1.0 / 256
    lag, err = _switch_lag(_volts(codes8, sc8), t, model, 1e-9)
    assert abs(lag) <= 1e-9 and err < sc8["volts_per_code"] / 2 + 6e-4

    # INT,16 of a 500,000-point record, both byte orders
    v0 = _charge(inst, bench)
    _setup_scope(scope, 500_000, 2e-9, -100e-6)
    _discharge(inst)
    w.clock.sleep(2e-3)
    scope.write("FORM:DATA INT,16;BORD NORM")
    sc16 = _scaling(scope)
    big = query_raw_block(scope, "TRAC:DATA? INT1")
    scope.write("FORM:BORD SWAP")
    little = query_raw_block(scope, "TRAC:DATA? INT1")
    assert big[:9] == little[:9] == b"#71000000" and big != little
    codes_big = np.asarray(from_ieee_block(big[:-1], "h", True, np.array))
    codes_little = np.asarray(from_ieee_block(little[:-1], "h", False, np.array))
    assert np.array_equal(codes_big, codes_little)
    t = sc16["first_sample_s"] + np.arange(codes_big.size) * 2e-9
    lag, err = _switch_lag(
        _volts(codes_big, sc16), t, lambda ts: model(ts, v0), sc16["sample_interval_s"]
    )
    assert abs(lag) <= 2e-9 and err < 6e-4
    # the same record as INT,8: the codes agree to within one 8-bit step
    scope.write("FORM INT,8")
    codes_same = np.asarray(
        from_ieee_block(query_raw_block(scope, "TRAC:DATA? INT1")[:-1], "b", False, np.array)
    )
    assert np.max(np.abs(codes_same.astype(np.int64) * 256 - codes_big)) <= 256
    # pyvisa's stock block reader agrees on a record it can read quickly
    small = scope.query_binary_values("TRAC:DATA? INT2", datatype="b", container=np.array)
    assert small.size == 500_000
    assert error_codes(scope) == []


def test_codes_clip_at_the_rails(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    _charge(inst, bench)
    _setup_scope(scope, 1000, 1e-6, 0.0, level=0.01)
    scope.query("SENS1:VOLT:RANG 0.1;*OPC?")  # too small a range for a 0.5 V peak
    scope.query("INIT;*OPC?")
    _discharge(inst)
    w.clock.sleep(2e-3)
    scope.write("FORM INT,8")
    codes = np.asarray(
        from_ieee_block(query_raw_block(scope, "TRAC:DATA? INT1")[:-1], "b", False, np.array)
    )
    assert codes[0] == 127 and codes.max() == 127 and codes.min() >= -128


def test_measure_dc_and_ac_coupling(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    v0 = _charge(inst, bench)
    # divider probe on input 2 (ratio 1000); the mean of 1000 samples: noise / sqrt(1000)
    measured = float(scope.query("MEAS:VOLT:DC? INT2"))
    assert measured == pytest.approx(v0 / 1000.0, abs=5 * 1e-4 / np.sqrt(1000))
    # AC coupling removes the steady level: the record of input 2 sits at 0, not at v0/1000
    scope.query("INP2:COUP AC;:SENS2:VOLT:RANG 0.2;*OPC?")
    _setup_scope(scope, 1000, 1e-6, 0.0)
    scope.query("TRIG:SOUR INT1;*OPC?")
    _discharge(inst)
    w.clock.sleep(2e-3)
    scope.write("FORM INT,16")
    sc = _scaling(scope, 2)
    codes = np.asarray(
        from_ieee_block(query_raw_block(scope, "TRAC:DATA? INT2")[:-1], "h", True, np.array)
    )
    volts = _volts(codes, sc)
    # reference: scipy.signal.lsim of the continuous first-order high-pass s / (s + w),
    # w = 2 pi 10 Hz, driven by the closed-form divider signal minus its steady level
    # (a level held since long before the record gives no output)
    # The first sample lies up to one interval after the switch (free-running sample clock):
    # the record starts at x[0] = v0/1000 exp(-lag/tau), and the high-pass takes that as the
    # level held before the record (the simulator's stated approximation).
    tau = 1.0 / (1.0 / 1010.0 + 1.0 / 10e6) * 100e-9
    dt = sc["sample_interval_s"]
    t = np.arange(codes.size) * dt
    w_hp = 2 * np.pi * 10.0

    def model(ts: np.ndarray) -> np.ndarray:
        x = v0 / 1000.0 * np.exp(-ts / tau)
        return lsim(([1.0, 0.0], [1.0, w_hp]), x - x[0], ts - ts[0])[1]

    lag, err = _switch_lag(volts, t + sc["first_sample_s"], model, dt)
    assert err < 6 * 1e-4 + sc["volts_per_code"]
    expected = model(t + sc["first_sample_s"] + lag)
    assert expected[-1] == pytest.approx(-v0 / 1000.0, rel=0.1)  # nearly the whole level


def test_bandwidth_limit_reaches_the_world(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    _charge(inst, bench)
    scope.query("INP1:FILT:LPAS:FREQ 20MHZ;STAT ON;:INP2:FILT:FREQ 1.5KHZ;*OPC?")
    assert scope.query("INP1:FILT:LPAS:FREQ?;STAT?;:INP2:FILT:STAT?") == "20000000;1;0"
    _setup_scope(scope, 1000, 1e-6, 0.0)
    _discharge(inst)
    w.clock.sleep(2e-3)
    w.bandwidth_requests.clear()
    scope.query("TRAC:SCAL? INT1")
    assert w.bandwidth_requests[0] == (20e6,)  # trigger search on input 1, limit on
    assert w.bandwidth_requests[-1] == (20e6, None, None, None)  # the record, inputs 1..4


def test_disabled_input_and_continuous_mode(inst: dict, bench: SimBench) -> None:
    scope, w = inst["scope"], bench.world
    scope.query("SENS3:STAT OFF;*OPC?")
    _charge(inst, bench)
    _setup_scope(scope, 1000, 1e-6, -100e-6)
    _discharge(inst)
    w.clock.sleep(2e-3)
    scope.write("TRAC:DATA? INT3")
    assert error_codes(scope) == [-221]  # settings conflict: the input was off
    scope.query("INIT:CONT ON;*OPC?")
    assert scope.query("STAT:OPER:COND?") == "32"  # re-armed, waiting for the next edge
    assert scope.query("TRAC:SCAL? INT1").startswith("1000,")  # the last record stays readable
    scope.query("ABOR;:INIT:CONT OFF;:ABOR;*OPC?")
    assert scope.query("STAT:OPER:COND?") == "0"


def test_never_triggers_fault(rm: pyvisa.ResourceManager) -> None:
    with start_double_bench(replace(CONFIG, faults=Faults(scope_never_triggers=True))) as sim:
        opened = {role: open_instrument(rm, res) for role, res in sim.resources.items()}
        try:
            _charge(opened, sim)
            _setup_scope(opened["scope"], 1000, 1e-6, 0.0)
            _discharge(opened)
            sim.world.clock.sleep(0.1)
            assert opened["scope"].query("STAT:OPER:COND?") == "32"
            opened["scope"].write("TRAC:DATA? INT1")
            assert error_codes(opened["scope"]) == [-230]
        finally:
            for i in opened.values():
                i.close()


def test_sixteen_bit_codes_with_a_large_offset(rm: pyvisa.ResourceManager) -> None:
    # no noise, divider ratio 1: input 2 carries the meter voltage (about 50 V); a 10 mV range
    # around a 49.5 V offset must still resolve 10 mV / 65536 = 0.15 uV steps
    wiring = replace(WIRING, divider_ratio=1.0)
    config = replace(CONFIG, wiring=wiring, noise_volts=0.0)
    with start_double_bench(config) as sim:
        opened = {role: open_instrument(rm, res) for role, res in sim.resources.items()}
        try:
            assert opened["meter"].query('FUNC "VOLT:AC";*OPC?') == "1"
            _charge(opened, sim)
            sim.world.clock.sleep(1e-3)  # self-discharge through the leak from here on
            scope = opened["scope"]
            offset = round(sim.world.meter_input_volts(), 4)
            assert (
                scope.query(
                    f"SENS2:VOLT:RANG 0.01;OFFS {offset};:SENS:SWE:TINT 1e-9;POIN 1000;"
                    f"OFFS:TIME -5e-7;:TRIG:SOUR INT1;LEV 0.1;SLOP POS;:FORM INT,16;:INIT;*OPC?"
                )
                == "1"
            )
            _discharge(opened)
            sim.world.clock.sleep(1e-3)
            sc = _scaling(scope, 2)
            codes = np.asarray(
                from_ieee_block(query_raw_block(scope, "TRAC:DATA? INT2")[:-1], "h", True, np.array)
            )
            t_trig = sim.world.history()[-1][0]  # the discharge relay closing (ground truth)
            t = t_trig + sc["first_sample_s"] + np.arange(codes.size) * sc["sample_interval_s"]
            truth = sim.world.scope_inputs(t, [None, None])[1]
            expected = np.clip(np.rint((truth - offset) / sc["volts_per_code"]), -32768, 32767)
            pre_trigger = slice(0, 500)  # steady part: the codes must match to one step
            assert np.max(np.abs(codes[pre_trigger] - expected[pre_trigger])) <= 1
            # the leak's 50 V/s decay: about 160 steps over the 500 ns before the trigger
            assert codes[0] - codes[499] > 100
        finally:
            for i in opened.values():
                i.close()
