"""Predict what an identified source does to any load: waveform, peak, charge, energy.

The source (:class:`rig.analysis.sourcenet.FosterSource`) is connected through optional
wiring (``series_ohms``, ``series_henry``) to a load (:class:`rigbase.loadfile.LoadModel`, with
diodes or without) and solved with :mod:`rigbase.nonlinear`. Metrics over ``window_s`` from
contact: ``peak_a`` (largest |current|), ``charge_c`` (integral of the current), ``energy_j``
(integral of load voltage times current), and the energy into each part of the load (J; a
capacitor's or inductor's is what it holds at the end, a current source's what it absorbs;
each above the part's quiescent dissipation at the load's initial operating point).

Prediction intervals (95 %) combine, on the logarithm of each metric, three independent parts
in quadrature: the identified parameters' uncertainty (``samples`` draws from their fitted
covariance, each simulated into the load), the events' own relative spread in the loads the
source was fitted to (a new event varies as those did; of the charge, without the scope's
noise integrated over the record, see ``rig.analysis.identify._event_charge``) and the fit's
largest relative misfit on those loads' median metrics (what the model could not reproduce
where it was checked).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from rig.analysis.sourcenet import TERMINAL, FosterSource, linear_current, source_parts
from rigbase.loadfile import LoadModel
from rigbase.nonlinear import Part, System, assemble, integrate, stack

__all__ = ["METRICS", "Prediction", "predict", "simulate_into", "simulate_many"]

METRICS = ("peak_a", "charge_c", "energy_j")
Z95 = 1.959964  # two-sided 95 % quantile of the standard normal (any statistics table)
_SPREAD_OF = {"peak_a": "peak", "charge_c": "charge", "energy_j": "charge"}


@dataclass
class Prediction:
    """Predicted discharge of ``source`` into ``load``: current ``i`` (A) at times ``t`` (s),
    its pointwise 95 % band ``i_lo``/``i_hi`` over the parameter draws, and per metric
    (``METRICS``) the value with its 95 % prediction interval; ``energy_parts`` (J)."""

    load: str
    t: np.ndarray
    i: np.ndarray
    i_lo: np.ndarray
    i_hi: np.ndarray
    value: dict[str, float]
    low: dict[str, float]
    high: dict[str, float]
    energy_parts: dict[str, float] = field(default_factory=dict)
    window_s: float = 0.0

    def rows(self) -> list[dict[str, object]]:
        """One row per metric: load, metric, value, low, high."""
        return [
            {
                "load": self.load,
                "metric": m,
                "value": self.value[m],
                "low": self.low[m],
                "high": self.high[m],
            }
            for m in METRICS
        ]


def _time_grid(window_s: float, n: int = 1500) -> np.ndarray:
    return np.concatenate([[0.0], np.geomspace(1e-12, window_s, n)])


def simulate_into(
    src: FosterSource,
    load: LoadModel,
    t: np.ndarray,
    volts: float | None = None,
    series_ohms: float = 0.0,
    series_henry: float = 0.0,
    rtol: float = 1e-6,
) -> tuple[np.ndarray, dict[str, float], float]:
    """(current into the load at ``t`` in A, energy per load part in J, energy into the load
    in J) for the source charged to ``volts`` (default: as identified); ``rtol`` is the
    integrator's relative tolerance."""
    return simulate_many([src], load, t, volts, series_ohms, series_henry, rtol)[0]


def simulate_many(
    srcs: list[FosterSource],
    load: LoadModel,
    t: np.ndarray,
    volts: float | None = None,
    series_ohms: float = 0.0,
    series_henry: float = 0.0,
    rtol: float = 1e-6,
) -> list[tuple[np.ndarray, dict[str, float], float]]:
    """:func:`simulate_into` for each of ``srcs`` (the same load and wiring), integrated
    together as one stacked system (:func:`rigbase.nonlinear.stack`): one step sequence for
    all, which the integrator's per-step cost makes several times faster than one run each."""
    r_load = load.series_ohms
    if r_load is not None:  # a resistor (with its inductance): the exact linear response
        h = sum(p.value for p in load.parts if p.kind == "L")
        name = next(p.name for p in load.parts if p.kind == "R")
        out = []
        for src in srcs:
            v0 = src.volts if volts is None else float(volts)
            i = linear_current(src.theta, v0, r_load + series_ohms, h + series_henry, t)
            e = float(np.trapezoid(i * i, t)) * r_load
            out.append((i, {name: e}, e))
        return out
    built = [_system(src, load, volts, series_ohms, series_henry) for src in srcs]
    x0 = np.concatenate([x for _, x, _ in built])
    X_all = integrate(stack([s for s, _, _ in built]), x0, t, rtol=rtol)
    out, row = [], 0
    for sysm, x, top in built:
        X = X_all[row : row + x.size]
        row += x.size
        i = X[sysm.states.index("i(src:L)")]
        V = sysm.node_volts(X)
        e_load = float(np.trapezoid(V[top] * i, t))
        out.append((i, _part_energies(sysm, X, V, t), e_load))
    return out


def _system(
    src: FosterSource,
    load: LoadModel,
    volts: float | None,
    series_ohms: float,
    series_henry: float,
) -> tuple[System, np.ndarray, str]:
    """The source wired to the load: (system, initial state, the load's top node)."""
    v0 = src.volts if volts is None else float(volts)
    # the wiring's inductance joins the source's series inductance (one inductor, no node
    # between two inductors that only a GMIN resistor would hold)
    parts = source_parts(src, extra_henry=series_henry)
    top = TERMINAL
    if series_ohms > 0:
        parts.append(Part("wire:R", "R", top, "wire:a", series_ohms))
        top = "wire:a"
    parts += load.renamed("ld:", top, "0")
    sysm = assemble(parts, "0")
    init = {f"src:c{k + 1}": v0 for k in range(src.order)}
    init.update({f"ld:{n}": v for n, v in load.initial_volts.items()})
    return sysm, sysm.state_vector(init), top


def _part_energies(sysm, X, V, t) -> dict[str, float]:
    """Energy (J) into each load part over ``t`` above what it takes at the load's initial
    (quiescent) operating point: a regulator's own steady dissipation is not the meter's."""
    out: dict[str, float] = {}
    span = float(t[-1] - t[0])
    ij = sysm.junction_amps(X) if sysm.Cj.shape[0] else np.zeros((0, t.size))

    def add(name: str, e: float) -> None:
        key = name.split(":")[1]
        out[key] = out.get(key, 0.0) + e

    for p in sysm.parts:
        if not p.name.startswith("ld:"):
            continue
        v = V[p.a] - V[p.b]
        if p.kind == "R":
            add(p.name, float(np.trapezoid(v * v / p.value, t)) - v[0] ** 2 / p.value * span)
        elif p.kind == "C":
            add(p.name, 0.5 * p.value * (v[-1] ** 2 - v[0] ** 2))
        elif p.kind == "L":
            il = X[sysm.states.index(f"i({p.name})")]
            add(p.name, 0.5 * p.value * (il[-1] ** 2 - il[0] ** 2))
        elif p.kind == "I":
            add(p.name, float(np.trapezoid(v * p.value, t)) - v[0] * p.value * span)
    for k, (name, a, b) in enumerate(sysm.junctions):
        if name.startswith("ld:"):
            vj = V[a] - V[b]
            add(name, float(np.trapezoid(vj * ij[k], t)) - vj[0] * ij[k][0] * span)
    return {k: v for k, v in out.items() if not k.startswith(("Cstray", "Rgmin"))}


def _metrics(t: np.ndarray, i: np.ndarray, e: float) -> dict[str, float]:
    return {
        "peak_a": float(np.abs(i).max()),
        "charge_c": float(np.trapezoid(i, t)),
        "energy_j": e,
    }


def _draws(
    srcs: list[FosterSource], load: LoadModel, t: np.ndarray, args: tuple
) -> list[tuple[np.ndarray, dict[str, float], float]]:
    """The parameter draws simulated into the load, together (:func:`simulate_many`); if the
    integrator cannot follow them together, one by one, leaving out any it cannot follow
    (such a draw says nothing about the rest)."""
    # rtol 1e-4, stacked, moves peak, charge and energy by under 1e-5 relative (measured
    # against each draw alone at 1e-7 into the demo loads), far below the spread the draws
    # are there to show
    try:
        return simulate_many(srcs, load, t, *args, rtol=1e-4)
    except RuntimeError:
        pass
    out = []
    for s in srcs:
        try:
            out += simulate_many([s], load, t, *args, rtol=1e-4)
        except RuntimeError:
            continue
    return out


def predict(
    src: FosterSource,
    load: LoadModel,
    rng: np.random.Generator,
    window_s: float = 0.05,
    volts: float | None = None,
    series_ohms: float = 0.0,
    series_henry: float = 0.0,
    samples: int = 8,
) -> Prediction:
    """Prediction with 95 % intervals (module docstring); ``rng`` draws the parameters."""
    if window_s <= 0:
        raise ValueError("window_s must be positive")
    t = _time_grid(window_s)
    args = (volts, series_ohms, series_henry)
    i, parts, e = simulate_into(src, load, t, *args)
    nominal = _metrics(t, i, e)
    draws: list[dict[str, float]] = []
    waves = []
    cov = np.asarray(src.cov, dtype=float)
    if samples > 0 and cov.shape == (src.theta.size, src.theta.size):
        ths = rng.multivariate_normal(src.theta, cov, size=samples, method="eigh")
        for ii, _, ee in _draws([src.with_theta(th) for th in ths], load, t, args):
            draws.append(_metrics(t, ii, ee))
            waves.append(ii)
    lo, hi = {}, {}
    for m in METRICS:
        v = nominal[m]
        sd_p = 0.0
        if len(draws) >= 2 and v != 0:
            vals = np.array([d[m] for d in draws])
            sd_p = float(np.std(np.log(np.abs(vals) / abs(v)), ddof=1))
        key = _SPREAD_OF[m]
        sd = np.sqrt(sd_p**2 + src.spread.get(key, 0.0) ** 2 + src.misfit.get(key, 0.0) ** 2)
        a, b = v * np.exp(-Z95 * sd), v * np.exp(Z95 * sd)
        lo[m], hi[m] = min(a, b), max(a, b)
    W = np.array(waves) if waves else i[None, :]
    return Prediction(
        load.name,
        t,
        i,
        np.percentile(W, 2.5, axis=0),
        np.percentile(W, 97.5, axis=0),
        nominal,
        lo,
        hi,
        parts,
        window_s,
    )
