"""Source identification on the simulated bench, then prediction into loads not used in the fit.

Each demo meter (AC V, 1 kV) is run into a short and 1 kohm on the simulated bench (contact
bounce, scope noise, bandwidth, trigger on the sample grid, bench seeds 1..3); its source is
identified from those events alone and predicted into 10 ohm, 100 ohm, the 3.3 V logic input's
clamp and an LED string. The ground truth is the circuit engine on the meter's own netlist
(the nonlinear engine, checked against ngspice in tests/reference/test_nonlinear_ngspice.py)
through the same wiring (relay contact, 200 nH). Targets from the issue: peak within 5 %,
charge within 3 %, the 95 % prediction intervals cover the truth in at least 90 % of the
cases of the sweep, and the identified dominant capacitance and its time constant within 5 %
of the netlist's.
"""

from __future__ import annotations

import numpy as np
import pytest

from rig.analysis.identify import identify
from rig.analysis.predict import predict
from rig.analysis.runs import load_run
from rigbase.loadfile import LoadModel, load_from_spec
from tests.nonlinear_support import (
    CONTACT_OHMS,
    WIRING_HENRY,
    charged_state,
    demo_load,
    identification_run,
    meter_into,
)

METERS = ["demo-a", "demo-b"]
SEEDS = [1, 2, 3]
LOADS = ["10", "100", "logic-3v3", "led-string"]
# the capacitor that holds most of the charge in AC V (netlists drivers/sim/meters/*.toml)
DOMINANT = {"demo-a": ("C_couple", 100e-9), "demo-b": ("C_acv", 33e-9)}
WINDOW_S = 0.05
REPS = 16  # events per load (tests/perf/bench_identify.py times a group of 25)


def _load(name: str) -> LoadModel:
    return load_from_spec(name) if name[0].isdigit() else demo_load(name)


def _truth(meter: str, load: LoadModel, t: np.ndarray) -> tuple[float, float]:
    nl, net = meter_into(meter, load)
    x0 = charged_state(nl, net, load, "AC V", 1000.0)
    i = nl.simulate(net.closed_switches("AC V") | {"Kd"}, x0, t, ["i(Lw)"]).y[0]
    return float(np.abs(i).max()), float(np.trapezoid(i, t))


@pytest.fixture(scope="module")
def cases(tmp_path_factory):
    """Per (meter, seed): the identified source and, per load, prediction and truth."""
    out = {}
    truth_cache: dict[tuple[str, str], tuple[float, float]] = {}
    for seed in SEEDS:
        for meter in METERS:
            run = identification_run(
                tmp_path_factory.mktemp(f"{meter}-{seed}"), meter, seed=seed, reps=REPS
            )
            model = load_run(run)["meter"].iloc[0]
            src = identify(run, ["short", "1k"], meter=model, mode="AC V", volts=1000.0)
            rng = np.random.default_rng(seed)
            preds = {}
            for name in LOADS:
                load = _load(name)
                p = predict(src, load, rng, WINDOW_S, None, CONTACT_OHMS, WIRING_HENRY)
                if (meter, name) not in truth_cache:
                    truth_cache[(meter, name)] = _truth(meter, load, p.t)
                preds[name] = (p, truth_cache[(meter, name)])
            out[(meter, seed)] = (src, preds)
    return out


@pytest.mark.parametrize("meter", METERS)
def test_prediction_into_unfitted_loads_matches_truth(cases, meter):
    for seed in SEEDS:
        _, preds = cases[(meter, seed)]
        for name, (p, (peak, charge)) in preds.items():
            # ground truth: the engine on the netlist (ngspice-checked); targets of the issue
            assert abs(p.value["peak_a"] / peak - 1) < 0.05, (meter, seed, name, p.value, peak)
            assert abs(p.value["charge_c"] / charge - 1) < 0.03, (meter, seed, name, charge)
            # the diodes conduct hard: amperes, not a leakage
            assert peak > 1.0


@pytest.mark.parametrize("meter", METERS)
def test_identification_recovers_dominant_capacitance_and_time_constant(cases, meter):
    name, farads = DOMINANT[meter]
    load = load_from_spec("0.05")
    nl, net = meter_into(meter, load)
    closed = net.closed_switches("AC V") | {"Kd"}
    # the slowest mode of the shorted meter (the floating GMIN-held modes last for hours)
    taus = nl.circuit.time_constants(closed)
    tau = float(taus[taus < 1.0][0])
    assert nl.circuit.element_by_name[name].value == farads
    for seed in SEEDS:
        src, _ = cases[(meter, seed)]
        c_id, tau_id = src.dominant()
        # netlist values (drivers/sim/meters) and the engine's eigenvalues: within 5 %
        assert abs(c_id / farads - 1) < 0.05, (meter, seed, c_id)
        assert abs(tau_id / tau - 1) < 0.05, (meter, seed, tau_id, tau)
        assert 2 <= src.order <= 4  # the data chose more than one branch


def test_prediction_intervals_cover_the_truth(cases):
    hits, total = 0, 0
    for _, preds in cases.values():
        for p, (peak, charge) in preds.values():
            for metric, truth in (("peak_a", peak), ("charge_c", charge)):
                total += 1
                hits += p.low[metric] <= truth <= p.high[metric]
    # the target: each 95 % interval covers the truth in >= 90 % of the sweep's cases
    assert total == len(METERS) * len(SEEDS) * len(LOADS) * 2
    assert hits >= 0.9 * total, f"coverage {hits}/{total}"
