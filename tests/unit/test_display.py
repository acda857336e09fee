"""The live display renders on a terminal: per group and capture, the figure meant for it."""

from __future__ import annotations

import io
import re
from types import SimpleNamespace

import numpy as np
from rich.console import Console

from rig.runner.display import LiveDisplay
from rig.store.waveform import Waveform


def rc_waveform(dt: float, n: int, amps: float, tau: float) -> Waveform:
    """An RC discharge i = I0 exp(-t/tau) as int16 codes (textbook RC relation)."""
    t = np.arange(n) * dt - 0.1 * n * dt
    i = np.where(t >= 0, amps * np.exp(-np.clip(t, 0, None) / tau), 0.0)
    gain = 2.5 * amps / 65536  # full scale above the peak: no clipping
    codes = np.round(i / gain).astype(np.int16)[None, :]
    return Waveform(
        codes,
        np.array([gain]),
        np.array([0.0]),
        np.array([-32768]),
        np.array([32767]),
        dt,
        float(t[0]),
        ("current",),
        ("A",),
    )


def test_terminal_table_shows_peak_for_fast_and_charge_for_long_captures():
    out = io.StringIO()
    console = Console(file=out, force_terminal=True, width=160)
    plan = SimpleNamespace(events=[None] * 4)
    display = LiveDisplay(plan, console=console, charge_captures=frozenset({"charge"}))
    assert not display.quiet
    base = {"meter": "M", "mode": "AC V", "volts": 1000.0, "load": "short", "delay_s": 0.0}
    with display:
        display.committed({**base, "capture": "peak"}, rc_waveform(1e-9, 4000, 20.0, 30e-9))
        display.committed({**base, "capture": "charge"}, rc_waveform(2e-7, 5000, 0.01, 2e-4))
        display.committed({**base, "capture": "charge"}, None)  # not captured
    text = out.getvalue()
    assert "|peak|" in text and "charge" in text
    assert "20 A" in text  # the fast capture's peak
    # the long capture's charge: the whole discharge I0 tau = 10 mA x 200 us = 2 uC (integral
    # of the textbook RC discharge), of which the record's 0.9 ms after the trigger holds
    # I0 tau (1 - e^-4.5) = 1.978 uC and the fitted tail the rest
    assert re.search(r"[^0-9.]2(\.00?)? µC", text), text


def test_running_median_equals_the_standard_library_median_at_every_step():
    import statistics

    from rig.runner.display import RunningMedian

    rng = np.random.default_rng(21)
    values = np.concatenate([rng.normal(5.0, 1.0, 300), np.full(40, 5.0), rng.integers(0, 4, 60)])
    rm, seen = RunningMedian(), []
    assert rm.median() is None and len(rm) == 0
    for x in values.tolist():
        rm.add(x)
        seen.append(x)
        assert rm.median() == statistics.median(seen)  # Python's statistics module
    assert len(rm) == len(values)
