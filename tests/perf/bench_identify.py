"""Benchmark: identify one group of 25 events, predict into one nonlinear load; and (with
``--sweep``) the accuracy figures of the identification on the simulated bench.

Run by hand: ``python tests/perf/bench_identify.py [--sweep]``. Runs demo meter A (AC V,
1 kV) 25 times into a short and 25 times into 1 kohm on the simulated bench (virtual clock),
then prints the time to identify its source (reading the waveforms, then the fit), the time
to predict into the 3.3 V logic input's clamp (nominal and 8 parameter draws, so with its 95 %
intervals), the time of one nonlinear engine simulation of the meter's full netlist into the
same load over the same window, and the ratios. Targets (the issue): identification and
prediction each under a second on this machine.

``--sweep`` also runs both demo meters with bench seeds 1..3 and prints, per meter and seed,
the identified dominant capacitance and time constant against the netlist's with the events'
relative spread and the fit's misfit (peak / charge) that widen the intervals; per load (10
ohm, 100 ohm, logic input, LED string) the predicted and true peak and charge, the errors,
whether the 95 % intervals cover the truth and their relative half-widths (peak/charge); then
the worst errors, the coverage over the sweep, and the median (max) half-widths, also of the
interval without the events' spread (one for the mean response rather than a new event) with
its coverage.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from rig.analysis.identify import collect, fit_source  # noqa: E402
from rig.analysis.predict import _SPREAD_OF, Z95, _time_grid, predict  # noqa: E402
from rig.analysis.runs import load_run  # noqa: E402
from rigbase.loadfile import load_from_spec  # noqa: E402
from tests.nonlinear_support import (  # noqa: E402
    CONTACT_OHMS,
    WIRING_HENRY,
    charged_state,
    demo_load,
    identification_run,
    meter_into,
)

WINDOW = 0.05
DOMINANT = {"demo-a": 100e-9, "demo-b": 33e-9}


def _truth(meter, load, t):
    nl, net = meter_into(meter, load)
    x0 = charged_state(nl, net, load, "AC V", 1000.0)
    t0 = time.perf_counter()
    i = nl.simulate(net.closed_switches("AC V") | {"Kd"}, x0, t, ["i(Lw)"]).y[0]
    return float(np.abs(i).max()), float(np.trapezoid(i, t)), time.perf_counter() - t0


def timing(tmp: Path) -> None:
    run = identification_run(tmp / "a", "demo-a", seed=1, reps=25)
    model = load_run(run)["meter"].iloc[0]
    t0 = time.perf_counter()
    sets, v0 = collect(run, ["short", "1k"], meter=model, mode="AC V", volts=1000.0)
    t1 = time.perf_counter()
    src = fit_source(sets, v0)
    t2 = time.perf_counter()
    load = demo_load("logic-3v3")
    p = predict(src, load, np.random.default_rng(1), WINDOW, None, CONTACT_OHMS, WIRING_HENRY)
    t3 = time.perf_counter()
    _truth("demo-a", load, p.t)  # warm-up: models built once
    _, _, t_eng = _truth("demo-a", load, p.t)
    ident = t2 - t0
    print("events per load            25 (x 2 loads x 2 captures = 100 records)")
    print(
        f"identification             {ident:7.3f} s  (read {t1 - t0:.3f} s + fit {t2 - t1:.3f} s,"
        f" {src.order} branches)   ratio to one engine run {ident / t_eng:6.1f}"
    )
    print(
        f"prediction into logic-3v3  {t3 - t2:7.3f} s  (nominal + 8 draws)"
        f"          ratio to one engine run {(t3 - t2) / t_eng:6.1f}"
    )
    print(f"one engine run (netlist)   {t_eng:7.3f} s  (nonlinear, Radau, {WINDOW * 1e3:g} ms)")
    print(
        f"targets: each under 1 s -> identification {'met' if ident < 1 else 'NOT met'}, "
        f"prediction {'met' if t3 - t2 < 1 else 'NOT met'}"
    )


def sweep(tmp: Path) -> None:
    loads = ["10", "100", "logic-3v3", "led-string"]
    hits = total = hits_mean = 0
    widths: dict[str, list[float]] = {"peak_a": [], "charge_c": []}
    widths_mean: dict[str, list[float]] = {"peak_a": [], "charge_c": []}
    worst = {"peak": 0.0, "charge": 0.0, "C": 0.0, "tau": 0.0}
    print(
        "meter   seed load        peak pred/true (err)         charge pred/true (err)"
        "           covered  half-widths"
    )
    for seed in (1, 2, 3):
        for meter in ("demo-a", "demo-b"):
            run = identification_run(tmp / f"{meter}-{seed}", meter, seed=seed, reps=16)
            model = load_run(run)["meter"].iloc[0]
            sets, v0 = collect(run, ["short", "1k"], meter=model, mode="AC V", volts=1000.0)
            src = fit_source(sets, v0)
            nl, net = meter_into(meter, load_from_spec("0.05"))
            taus = nl.circuit.time_constants(net.closed_switches("AC V") | {"Kd"})
            tau = float(taus[taus < 1.0][0])
            c_id, tau_id = src.dominant()
            ec, et = c_id / DOMINANT[meter] - 1, tau_id / tau - 1
            worst["C"], worst["tau"] = max(worst["C"], abs(ec)), max(worst["tau"], abs(et))
            print(
                f"{meter} {seed}    dominant C {c_id * 1e9:.2f} nF ({ec:+.2%}), tau "
                f"{tau_id * 1e3:.3f} ms vs {tau * 1e3:.3f} ms ({et:+.2%}), {src.order} branches;"
                f" events' spread peak {src.spread['peak']:.2%} charge {src.spread['charge']:.2%},"
                f" misfit {src.misfit['peak']:.2%} / {src.misfit['charge']:.2%}"
            )
            rng = np.random.default_rng(seed)
            for name in loads:
                load = load_from_spec(name) if name[0].isdigit() else demo_load(name)
                p = predict(src, load, rng, WINDOW, None, CONTACT_OHMS, WIRING_HENRY)
                pk, q, _ = _truth(meter, load, _time_grid(WINDOW))
                cov = []
                for m, truth in (("peak_a", pk), ("charge_c", q)):
                    ok = p.low[m] <= truth <= p.high[m]
                    hits, total = hits + ok, total + 1
                    cov.append("yes" if ok else "NO")
                    # the interval without the events' own spread: one for the mean response
                    sd = np.log(p.high[m] / p.value[m]) / Z95
                    sd_mean = np.sqrt(max(sd**2 - src.spread[_SPREAD_OF[m]] ** 2, 0.0))
                    hits_mean += abs(np.log(truth / p.value[m])) <= Z95 * sd_mean
                    widths[m].append(np.expm1(Z95 * sd))
                    widths_mean[m].append(np.expm1(Z95 * sd_mean))
                e_p, e_q = p.value["peak_a"] / pk - 1, p.value["charge_c"] / q - 1
                worst["peak"] = max(worst["peak"], abs(e_p))
                worst["charge"] = max(worst["charge"], abs(e_q))
                print(
                    f"{meter} {seed}    {name:11s} {p.value['peak_a']:7.3f}/{pk:7.3f} A "
                    f"({e_p:+.2%})   {p.value['charge_c'] * 1e6:7.3f}/{q * 1e6:7.3f} uC "
                    f"({e_q:+.2%})   {'/'.join(cov):7s}  {widths['peak_a'][-1]:.2%}/"
                    f"{widths['charge_c'][-1]:.2%}"
                )
    print(
        f"worst |error|: peak {worst['peak']:.2%} (target 5 %), charge {worst['charge']:.2%}"
        f" (target 3 %), dominant C {worst['C']:.2%}, tau {worst['tau']:.2%} (targets 5 %)"
    )
    print(
        f"95 % intervals covering the truth: {hits}/{total} = {hits / total:.0%} (target >= 90 %)"
    )
    print(
        "95 % interval half-width, median (max): "
        + ", ".join(f"{m} {np.median(w):.2%} ({np.max(w):.2%})" for m, w in widths.items())
    )
    print(
        "without the events' spread (the mean response's interval): "
        + ", ".join(f"{m} {np.median(w):.2%} ({np.max(w):.2%})" for m, w in widths_mean.items())
        + f"; covering the truth {hits_mean}/{total}"
    )


if __name__ == "__main__":
    with tempfile.TemporaryDirectory(prefix="rig-bench-id-") as d:
        timing(Path(d))
        if "--sweep" in sys.argv:
            sweep(Path(d))
