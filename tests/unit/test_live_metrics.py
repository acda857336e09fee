"""The live display's metrics without the tail fit (``tail_fit=False``).

A peak capture's live figure is its peak; fitting the tail of its microsecond record cost
about 20 times the rest of its metrics. Without the fit every other figure must be the same
and the charge must be the record's own integral, which is checked against the closed-form
integral of an exponential, A tau (1 - exp(-T / tau)) (any calculus text); nothing may claim
the record is complete, and nothing may claim it is truncated either.
"""

from __future__ import annotations

import numpy as np

from rig.analysis.metrics import event_metrics, quick_metrics
from rig.store.waveform import Waveform

DT = 1e-9
TAU = 2e-6  # the record (20 us after the trigger) holds 10 time constants of it
AMPS = 5.0


def _record(n_pre: int = 2000, n_post: int = 20000) -> tuple[np.ndarray, float]:
    t = (np.arange(n_pre + n_post) - n_pre) * DT
    i = np.where(t >= 0, AMPS * np.exp(-np.maximum(t, 0) / TAU), 0.0)
    noise = np.random.default_rng(7).normal(0.0, 1e-3, t.size)
    return (i + noise)[None, :], float(t[0])


def test_without_tail_fit_the_other_figures_are_unchanged() -> None:
    data, t0 = _record()
    full = event_metrics(data, dt=DT, t0=t0)
    live = event_metrics(data, dt=DT, t0=t0, tail_fit=False)
    for name in ("abs_peak_a", "t_peak_s", "rise_s", "noise_a", "baseline_a", "pulses"):
        np.testing.assert_array_equal(live[name], full[name], err_msg=name)
    np.testing.assert_array_equal(live["charge_record_c"], full["charge_record_c"])
    # the charge is the record's integral, not completed by a fit, and says so
    assert live["charge_c"][0] == live["charge_record_c"][0]
    assert np.isnan(live["charge_tail_c"][0]) and np.isnan(live["charge_u_c"][0])
    assert not live["flag_truncated"][0]
    # closed form over the 20 us after the trigger: A tau (1 - exp(-T / tau))
    closed = AMPS * TAU * (1.0 - np.exp(-20e-6 / TAU))
    assert abs(live["charge_c"][0] / closed - 1.0) < 5e-3


def test_a_record_too_short_is_flagged_only_when_the_tail_is_fitted() -> None:
    data, t0 = _record(n_post=3000)  # 1.5 time constants: most of the charge is missing
    full = event_metrics(data, dt=DT, t0=t0)
    live = event_metrics(data, dt=DT, t0=t0, tail_fit=False)
    assert full["flag_truncated"][0]
    assert not live["flag_truncated"][0]
    gain = 2e-4  # A per code of a 16-bit record
    wf = Waveform(
        codes=np.round(data / gain).astype(np.int16),
        gain=np.array([gain]),
        offset=np.zeros(1),
        code_min=np.array([-32768]),
        code_max=np.array([32767]),
        dt=DT,
        t0=t0,
        channels=("current",),
        units=("A",),
    )
    assert quick_metrics(wf)["flagged"]
    assert not quick_metrics(wf, tail_fit=False)["flagged"]
