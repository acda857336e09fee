"""The neutral nonlinear solver, load files and the identified source's file, on closed forms.

References: the Shockley diode equation I = IS (exp(V / (N VT)) - 1) with VT = k T / q
(any semiconductor physics textbook; k and q exact since the 2019 SI), the first-order RC
discharge v = V0 exp(-t / (R C)) (any circuits textbook).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from rig.analysis.sourcenet import (
    FosterSource,
    linear_current,
    modes_at,
    response_modes,
    source_parts,
)
from rigbase.errors import FileFormatError
from rigbase.loadfile import load_from_spec, read_load
from rigbase.nonlinear import VT_300K, DiodeParams, Part, assemble, integrate, stack

D = DiodeParams(is_a=1e-14, n=1.2, rs_ohms=2.0, cjo_farads=5e-12)


def test_thermal_voltage_at_300_k():
    # k T / q with k = 1.380649e-23 J/K and q = 1.602176634e-19 C (SI 2019): 25.852 mV
    assert VT_300K == pytest.approx(0.0258520, abs=1e-7)


def test_diode_settles_on_the_shockley_equation():
    amps = 1e-3
    parts = [
        Part("I", "I", "0", "a", amps),  # 1 mA into the anode
        Part("C", "C", "a", "0", 1e-9),
        Part("D", "D", "a", "0", 0.0, D),
    ]
    sysm = assemble(parts)
    t = np.array([0.0, 1e-3])
    X = integrate(sysm, sysm.state_vector(), t)
    v = sysm.node_volts(X)["a"][-1]
    # Shockley equation plus the drop across RS (textbook): V = N VT ln(I/IS + 1) + I RS
    expect = 1.2 * VT_300K * math.log(amps / 1e-14 + 1) + amps * 2.0
    assert v == pytest.approx(expect, rel=1e-5)
    assert D.volts_at(amps) == pytest.approx(expect, rel=1e-12)


def test_rc_discharge_matches_the_exponential():
    parts = [Part("C", "C", "a", "0", 1e-6), Part("R", "R", "a", "0", 1e3)]
    sysm = assemble(parts)
    t = np.linspace(0, 5e-3, 51)
    X = integrate(sysm, sysm.state_vector({"a": 10.0}), t, rtol=1e-9, atol=1e-12)
    # first-order RC discharge (textbook): v = V0 exp(-t / RC)
    np.testing.assert_allclose(X[0], 10.0 * np.exp(-t / 1e-3), rtol=1e-6, atol=1e-9)


def test_stacked_systems_integrate_as_each_alone():
    """Two RC discharges and a diode clamp integrated as one stacked system: each RC still
    follows v = V0 exp(-t / RC) (first-order RC discharge, textbook), the clamp its own
    separate integration."""
    rc = [
        assemble([Part("C", "C", "a", "0", 1e-6), Part("R", "R", "a", "0", r)]) for r in (1e3, 2e2)
    ]
    dio = assemble(
        [
            Part("C", "C", "a", "0", 1e-6),
            Part("D", "D", "a", "0", 0.0, DiodeParams(1e-14, 1.0, 2.0, 1e-12)),
        ]
    )
    t = np.linspace(0, 5e-3, 51)
    parts = [(rc[0], {"a": 10.0}), (dio, {"a": 3.0}), (rc[1], {"a": 5.0})]
    x0 = np.concatenate([s.state_vector(v) for s, v in parts])
    X = integrate(stack([s for s, _ in parts]), x0, t, rtol=1e-9, atol=1e-12)
    n0, n1 = rc[0].A.shape[0], dio.A.shape[0]
    np.testing.assert_allclose(X[0], 10.0 * np.exp(-t / 1e-3), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(X[n0 + n1], 5.0 * np.exp(-t / 2e-4), rtol=1e-6, atol=1e-9)
    alone = integrate(dio, dio.state_vector({"a": 3.0}), t, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(X[n0 : n0 + n1], alone, rtol=1e-5, atol=1e-9)


def test_batched_responses_equal_one_at_a_time():
    src = FosterSource(100.0, 50e-9, (20.0, 1e4), (1e-9, 1e-7))
    th = src.theta + np.array([[0.0] * 5, [0.1, -0.2, 0.0, 0.3, 0.0], [0.0, 0.0, 0.5, 0.0, -0.1]])
    t = np.geomspace(1e-10, 1e-3, 50)
    for pole in (None, 5e6):
        got = modes_at(*response_modes(th, 100.0, 5.0, 1e-7, pole), t)
        for k in range(len(th)):
            np.testing.assert_allclose(got[k], linear_current(th[k], 100.0, 5.0, 1e-7, t, pole))


def test_source_network_agrees_with_its_closed_form():
    src = FosterSource(100.0, 50e-9, (20.0, 1e4), (1e-9, 1e-7))
    parts = source_parts(src) + [Part("RL", "R", "src:t", "0", 5.0)]
    sysm = assemble(parts)
    t = np.concatenate([[0.0], np.geomspace(1e-10, 20e-3, 600)])
    x0 = sysm.state_vector({"src:c1": 100.0, "src:c2": 100.0})
    X = integrate(sysm, x0, t, rtol=1e-9, atol=1e-12)
    i_ode = X[sysm.states.index("i(src:L)")]
    i_eig = linear_current(src.theta, 100.0, 5.0, 0.0, t)
    np.testing.assert_allclose(i_ode, i_eig, rtol=1e-5, atol=1e-6 * np.abs(i_eig).max())
    # all the stored charge leaves through the load: V0 times the total capacitance
    assert np.trapezoid(i_eig, t) == pytest.approx(src.stored_charge(), rel=1e-3)


def test_diode_without_capacitance_is_refused():
    with pytest.raises(ValueError, match="junction capacitance"):
        assemble([Part("R", "R", "a", "0", 1.0), Part("D", "D", "a", "0", 0.0, DiodeParams(1e-14))])


def test_bundled_loads_read_and_forward_voltage_sets_is():
    led = load_from_spec("led-string.toml")
    assert len([p for p in led.parts if p.kind == "D"]) == 3
    d = led.parts[0].diode
    # the datasheet point the file gives: 2.0 V at 5 mA
    assert d.volts_at(5e-3) == pytest.approx(2.0, rel=1e-9)
    assert not led.linear and load_from_spec("1k").series_ohms == 1000.0


def _write(tmp_path, body: str):
    p = tmp_path / "load.toml"
    p.write_text('[load]\nformat = 1\nname = "x"\ninput = "A"\ncommon = "K"\n' + body)
    return p


@pytest.mark.parametrize(
    ("body", "key", "problem"),
    [
        (
            '[[part]]\nname = "D"\nkind = "D"\nnodes = ["A", "K"]\ndiode = "nope"\n',
            "part[0].diode",
            "no [diode.nope] table",
        ),
        ('[[part]]\nname = "R"\nkind = "Q"\nnodes = ["A", "K"]\n', "part[0].kind", "Q"),
        (
            '[[part]]\nname = "R"\nkind = "R"\nnodes = ["A", "K"]\nohms = -1\n',
            "part[0].ohms",
            "positive",
        ),
        (
            '[[part]]\nname = "D"\nkind = "D"\nnodes = ["A", "K"]\ndiode = "d"\n[diode.d]\n'
            'is_amps = 1e-14\nforward_volts = 0.7\nforward_amps = 1e-3\ncjo_farads = "1p"\n',
            "diode.d.is_amps",
            "either",
        ),
        (
            '[[part]]\nname = "R"\nkind = "R"\nnodes = ["A", "B"]\nohms = 1\n',
            "load.common",
            "on no part",
        ),
    ],
)
def test_bad_load_file_names_file_key_and_problem(tmp_path, body, key, problem):
    path = _write(tmp_path, body)
    with pytest.raises(FileFormatError) as err:
        read_load(path)
    msg = str(err.value)
    assert str(path) in msg and key in msg and problem in msg


def test_not_a_load_spec():
    with pytest.raises(ValueError, match="neither a .toml load file nor a resistance"):
        load_from_spec("banana")


def test_identified_source_round_trip(tmp_path):
    src = FosterSource(
        989.0,
        3e-9,
        (20.0, 2.2e5),
        (4.7e-10, 1e-7),
        ((1.0, 0.0), (0.0, 1.0)),
        {"peak": 0.01},
        {"charge": 0.02},
        {"order": 2},
    )
    path = tmp_path / "src.json"
    src.save(path)
    back = FosterSource.load(path)
    assert back.ohms == src.ohms and back.farads == src.farads and back.spread == src.spread
    assert back.dominant() == (1e-7, pytest.approx(0.022))
    path.write_text('{"volts": 1}')
    with pytest.raises(FileFormatError, match="henry"):
        FosterSource.load(path)
