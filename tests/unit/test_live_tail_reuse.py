"""The live display's cheaper whole charge: a group's later events reuse the tail's time
constants of an earlier one and refit only its amplitudes (one linear solve,
rig.analysis.wholecharge.refit_amplitudes) instead of the nonlinear fit.

Reference: a two-term tail i(t) = A1 exp(-t / tau1) + A2 exp(-t / tau2) sampled as interval
means, whose whole charge is A1 tau1 + A2 tau2 (the integral of an exponential from 0 to
infinity, any calculus handbook). The cheaper figure must agree with that closed form and
with the full fit within the full fit's own standard uncertainty; time constants that do not
describe a record must leave the full fit's figures exactly as they are.
"""

from __future__ import annotations

import io
from types import SimpleNamespace

import numpy as np
import pytest
from rich.console import Console

from rig.analysis.metrics import event_metrics
from rig.analysis.wholecharge import TAU_MAX_SPANS, log_bins, refit_amplitudes
from rig.runner.display import LiveDisplay
from rig.store.waveform import Waveform

DT = 5e-6  # s per sample, like the demo's charge capture
N_PRE, N_POST = 2000, 24000  # 10 ms before the trigger, 120 ms after
AMPS = (2e-3, 5e-3)  # A
TAUS = (20e-3, 2e-3)  # s: the record holds 6 of the slow time constants
NOISE = 5e-5  # A per sample
CLOSED = sum(a * t for a, t in zip(AMPS, TAUS, strict=True))  # whole charge, C: sum A_k tau_k


def _record(rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """One event, float amperes: each sample the mean of i(t) over its interval (so the sum
    of samples x dt is the integral exactly), plus white noise."""
    t = (np.arange(N_PRE + N_POST) - N_PRE) * DT
    lo, hi = np.maximum(t, 0.0), np.maximum(t + DT, 0.0)
    i = sum(
        a * tau * (np.exp(-lo / tau) - np.exp(-hi / tau)) / DT
        for a, tau in zip(AMPS, TAUS, strict=True)
    )
    return (i + rng.normal(0.0, NOISE, t.size))[None, :], float(t[0])


def _taus(res: dict[str, np.ndarray]) -> np.ndarray:
    return np.array([res[f"term{j}_tau_s"][0] for j in range(1, int(res["tail_terms"][0]) + 1)])


def test_reused_time_constants_give_the_whole_charge_within_its_uncertainty() -> None:
    rng = np.random.default_rng(1402)
    data, t0 = _record(rng)
    first = event_metrics(data, dt=DT, t0=t0)
    taus = _taus(first)
    assert taus.size >= 1 and abs(first["charge_c"][0] - CLOSED) < 3 * first["charge_u_c"][0]
    err_live, err_full = [], []
    for _ in range(12):
        data, t0 = _record(rng)
        full = event_metrics(data, dt=DT, t0=t0)
        live = event_metrics(data, dt=DT, t0=t0, tail_taus=taus)
        np.testing.assert_array_equal(_taus(live), taus)  # reused, not fitted afresh
        u = full["charge_u_c"][0]
        assert np.isfinite(u) and u < 0.01 * CLOSED
        assert abs(live["charge_u_c"][0] / u - 1) < 0.5  # an uncertainty of the same size
        assert abs(live["charge_c"][0] - full["charge_c"][0]) < 4 * u
        err_live.append((live["charge_c"][0] - CLOSED) / u)  # the closed form sum A_k tau_k
        err_full.append((full["charge_c"][0] - CLOSED) / u)
        assert not live["flag_truncated"][0] and not full["flag_truncated"][0]
        # only the tail differs: the record's own figures are the same numbers
        for name in ("charge_record_c", "abs_peak_a", "baseline_a", "tau_s"):
            assert live[name][0] == full[name][0], name
    # against the closed form, each within 4 u (the reused time constants carry the first
    # event's error to every later one: a shared bias, about 1 u here, hence not 3 u)
    assert max(np.abs(err_live)) < 4 and max(np.abs(err_full)) < 4


@pytest.mark.parametrize("wrong", [[1e-4], [300e-3, 50e-3], [2e-3, 20e-3, 0.2e-3]])
def test_time_constants_that_do_not_fit_leave_the_full_fit_unchanged(wrong: list) -> None:
    data, t0 = _record(np.random.default_rng(77))
    full = event_metrics(data, dt=DT, t0=t0)
    live = event_metrics(data, dt=DT, t0=t0, tail_taus=np.array(wrong))
    for name, v in full.items():
        np.testing.assert_array_equal(live[name], v, err_msg=name)


def test_a_time_constant_beyond_the_fit_bound_is_refused() -> None:
    edges = log_bins(0, 1000)
    a, b = edges[:-1].astype(float), edges[1:].astype(float)
    y = np.exp(-(a + b) / 2 / 200.0)
    s = np.full(y.size, 1e-3)
    assert refit_amplitudes(a, b, y, s, 1000.0, 1e-3, 1000.0, np.array([200.0])) is not None
    far = np.array([TAU_MAX_SPANS * 1000.0])  # at the bound: the full fit calls it unmeasured
    assert refit_amplitudes(a, b, y, s, 1000.0, 1e-3, 1000.0, far) is None


def test_the_display_carries_the_time_constants_from_event_to_event() -> None:
    gain = 1e-6  # A per code of a 16-bit record (the 7 mA peak is 7000 codes)
    plan = SimpleNamespace(events=[None] * 3)
    console = Console(file=io.StringIO(), force_terminal=False)
    display = LiveDisplay(plan, console=console, charge_captures=frozenset({"charge"}))
    row = {"meter": "M", "mode": "AC V", "capture": "charge", "volts": 1000.0, "load": "short"}
    row["delay_s"] = 0.0
    rng = np.random.default_rng(5)
    seen = []
    with display:
        for _ in range(2):
            data, t0 = _record(rng)
            wf = Waveform(
                np.round(data / gain).astype(np.int16),
                np.array([gain]),
                np.zeros(1),
                np.array([-32768]),
                np.array([32767]),
                DT,
                t0,
                ("current",),
                ("A",),
            )
            display.committed(row, wf)
            (g,) = display.groups.values()
            seen.append(g.taus)
            assert abs(g.last / CLOSED - 1) < 0.01
    assert seen[0] is not None and seen[0].size >= 1
    np.testing.assert_array_equal(seen[1], seen[0])  # reused, not refitted
