"""The identification's fit on synthetic data sets: its batched Jacobian against scipy's own
forward differences, and the recovery of a known source network from its closed-form response.

Data sets are made with :func:`rig.analysis.sourcenet.linear_current` (a Foster RC one-port
into a series R-L load, solved by eigen-decomposition; checked against the ODE engine and the
stored charge V0 sum(C) in tests/unit/test_nonlinear_load.py) on the two captures and two
loads the simulated bench uses.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import approx_fprime

from rig.analysis.identify import DataSet, _event_charge, _jacobian, _residuals, fit_source
from rig.analysis.sourcenet import FosterSource, linear_current

SRC = FosterSource(1000.0, 3e-9, (20.0, 1200.0, 220e3), (0.5e-9, 2.2e-9, 100e-9))


def _sets(rng: np.random.Generator) -> list[DataSet]:
    out = []
    for load, ohms, henry in (("short", 0.1, 0.0), ("1k", 1000.1, 300e-9)):
        for cap, dt, pole, t_end in (("peak", 1e-9, 500e6, 18e-6), ("charge", 2e-7, 5e6, 0.05)):
            t = np.unique(
                np.concatenate([np.arange(0, 40) * dt, np.geomspace(40 * dt, t_end, 110)])
            )
            if dt >= 1e-7:
                t = t[t >= 30e-6]
            y = linear_current(SRC.theta, SRC.volts, ohms, henry, t, pole)
            sig = 3e-3 * np.abs(y) + 1e-6
            y = y + rng.normal(0, 1, y.size) * sig * 0.3
            tt = np.geomspace(1e-12, 0.05, 4000)
            i = linear_current(SRC.theta, SRC.volts, ohms, henry, tt)
            q = np.full(5, np.trapezoid(i, tt))
            out.append(
                DataSet(
                    load, cap, t, y, sig, ohms, henry, pole, 0.0, np.full(5, i.max()), q, t_end, dt
                )
            )
    return out


def test_batched_jacobian_matches_scipy_finite_differences():
    sets = _sets(np.random.default_rng(1))
    x = np.concatenate([SRC.theta + 0.05, np.full(len(sets), 0.3)])
    lo, hi = np.full(x.size, -np.inf), np.full(x.size, np.inf)
    ours = _jacobian(x, SRC.volts, sets, lo, hi)
    # scipy's forward differences with the steps its least_squares takes by default
    # (sqrt(eps) max(1, |x|), signed as x): what the fit used before it had its own Jacobian
    step = np.sqrt(np.finfo(float).eps) * np.maximum(1.0, np.abs(x)) * np.where(x < 0, -1, 1)
    same = approx_fprime(x, _residuals, step, SRC.volts, sets)
    np.testing.assert_allclose(ours, same, rtol=1e-6, atol=1e-6 * np.abs(same).max())
    # an upper bound within one step: that parameter steps backward, as scipy's does
    hi[1] = x[1] + 1e-12
    step[1] = -step[1]
    ours = _jacobian(x, SRC.volts, sets, lo, hi)
    same = approx_fprime(x, _residuals, step, SRC.volts, sets)
    np.testing.assert_allclose(ours, same, rtol=1e-6, atol=1e-6 * np.abs(same).max())


def test_fit_recovers_a_known_source_network():
    src = fit_source(_sets(np.random.default_rng(2)), SRC.volts)
    c, tau = src.dominant()
    assert c == pytest.approx(100e-9, rel=5e-3)
    assert tau == pytest.approx(220e3 * 100e-9, rel=5e-3)
    assert src.stored_charge() == pytest.approx(SRC.stored_charge(), rel=5e-3)


def _capture(dt: float, record: float, charges: np.ndarray, noise: float, **tail) -> DataSet:
    e = np.empty(0)
    return DataSet(
        "short", "c", e, e, e, 0.1, 0.0, None, 0.2, e, charges, record, dt, noise, **tail
    )


def test_event_charge_takes_the_edge_from_the_fine_capture_and_leaves_out_scope_noise():
    """Events whose charge truly varies by 1 %, seen by a coarse capture with white noise
    (integrated over N samples: sigma dt sqrt(N), any measurement text) that hits or misses
    the fast spike at the edge, and by a fine capture of the edge."""
    rng = np.random.default_rng(7)
    n = 400
    early = 1e-6 * (1 + 2e-3 * rng.normal(size=n))
    late = 30e-6 * (1 + 1e-2 * rng.normal(size=n))
    dt, record, noise = 2e-7, 0.05, 4e-3
    late_seen = late + noise * dt * np.sqrt(record / dt) * rng.normal(size=n)
    coarse = late_seen + early * rng.uniform(0.0, 2.0, n)  # the spike's samples hit or miss
    tails = np.column_stack([late_seen + 0.5 * early, late_seen, 0.5 * late_seen])
    long = _capture(dt, record, coarse, noise, tail_t=np.array([1e-6, 1e-5, 1e-3]), tails=tails)
    fine = _capture(1e-9, 1e-5, early, 1e-6)
    med, sd = _event_charge(fine, long)
    assert med == pytest.approx(np.median(early) + np.median(late), rel=2e-3)
    true_sd = np.hypot(np.std(early), np.std(late))
    assert sd == pytest.approx(true_sd, rel=0.15)
    assert _event_charge(long, long)[1] > 2 * true_sd  # the coarse capture alone: far wider
