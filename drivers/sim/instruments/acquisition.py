"""One single-shot record of the simulated scope: trigger search and sample generation.

An :class:`Acquisition` freezes the scope's settings when it is armed and then does the
physics side of a capture against the World. The trigger search follows the contract in
DEVELOPERS.md: the trigger input is evaluated (noise-free, DC-coupled, with its bandwidth
limit) on the sample grid starting at the arming time and at every switching instant of the
world, up to ``points`` samples per start and never beyond the clock's present; the first
sample that crosses the level with the slope is the trigger. Records get Gaussian noise
(``config.noise_volts`` rms) and, for AC coupling, a first-order 10 Hz high-pass that assumes
the input sat at its first value before the record (an approximation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.signal import lfilter

from drivers.sim.interfaces import World

__all__ = ["AC_COUPLING_HZ", "N_INPUTS", "Acquisition", "InputSettings", "first_crossing"]

N_INPUTS = 4
AC_COUPLING_HZ = 10.0  # corner of the AC-coupling high-pass (common practice, no source)
CHUNK = 1_000_000  # samples evaluated per World call (trigger search, record generation)


@dataclass
class InputSettings:
    """One input's front-end settings (coupling, ohms, bandwidth limit in Hz, span and offset
    in volts, acquired or not)."""

    coupling: str = "DC"
    ohms: float = 1e6
    bw_hz: float = 20e6
    bw_on: bool = False
    range_v: float = 1.0
    offset_v: float = 0.0
    on: bool = True


@dataclass
class Acquisition:
    """One single-shot record: settings frozen at arming, trigger search state, data."""

    t_arm: float
    dt: float
    points: int
    trigger_offset_s: float  # time of the first sample from the trigger
    source: int
    level: float
    slope: str
    bandwidths: tuple[float | None, ...]
    inputs: tuple[InputSettings, ...]
    windows: dict[float, tuple[int, float | None]] = field(default_factory=dict)
    t_trig: float | None = None
    volts: dict[int, np.ndarray] | None = None  # per input: volts - offset, float32

    def t_last(self) -> float:
        """Time of the record's last sample on the world clock, seconds (once triggered)."""
        assert self.t_trig is not None
        return self.t_trig + self.trigger_offset_s + (self.points - 1) * self.dt

    def search(self, world: World, now: float) -> float | None:
        """Run the trigger search on ``world`` up to ``now`` (s); the trigger time or None."""
        # start -> whether the network switched there (then the sample one interval before
        # the switch is the "previous" sample, so an edge right at arming is still seen)
        starts = {self.t_arm: False}
        starts.update((s, True) for s in world.switching_times(self.t_arm, now))
        src = self.source
        bws = self.bandwidths[:src]
        found: list[float] = []
        for s in sorted(starts):
            done, last = self.windows.get(s, (0, None))
            if done >= self.points or now < s:
                continue
            if s < self.t_arm or (found and s >= min(found)):
                continue  # a later window cannot trigger earlier than a found crossing
            available = min(self.points, int(math.floor((now - s) / self.dt * (1 + 1e-12))) + 1)
            if last is None and starts[s]:
                before = world.scope_inputs(np.array([s - self.dt]), bws)
                last = float(before[src - 1, 0])
            while done < available:
                stop = min(available, done + CHUNK)
                t = s + np.arange(done, stop) * self.dt
                v = world.scope_inputs(t, bws)[src - 1]
                hit = first_crossing(v, last, self.level, self.slope)
                if hit is not None:
                    found.append(float(t[hit]))
                    break
                done, last = stop, float(v[-1])
            self.windows[s] = (done, last)
        if not found:
            return None
        # windows overlap on different sample grids; a sample evaluated at the very instant
        # of a later switch saw the old state, so the earliest crossing of any window counts
        return min(found)

    def make_record(self, world: World, rng: np.random.Generator) -> dict[int, np.ndarray]:
        """Samples of every enabled input, stored as float32 volts relative to the input's
        offset (float32 keeps 16-bit resolution near mid-scale even with a large offset)."""
        assert self.t_trig is not None
        on = [k + 1 for k, i in enumerate(self.inputs) if i.on]
        highest = max(on)
        out = {n: np.empty(self.points, dtype=np.float32) for n in on}
        noise = float(world.config.noise_volts)
        rc = 1.0 / (2.0 * math.pi * AC_COUPLING_HZ)
        a = rc / (rc + self.dt)
        # AC coupling, first-order high-pass y[k] = a (y[k-1] + x[k] - x[k-1]), its state carried
        # across chunks; before the record the input is taken as steady at its first value
        hp_state: dict[int, tuple[float, np.ndarray]] = {}
        t0 = self.t_trig + self.trigger_offset_s
        for start in range(0, self.points, CHUNK):
            stop = min(self.points, start + CHUNK)
            t = t0 + np.arange(start, stop) * self.dt
            v = world.scope_inputs(t, self.bandwidths[:highest])
            for n in on:
                inp = self.inputs[n - 1]
                x = np.asarray(v[n - 1], dtype=np.float64)
                if inp.coupling == "AC":
                    prev, zi = hp_state.get(n, (float(x[0]), np.zeros(1)))
                    x, zi = lfilter([a], [1.0, -a], np.diff(x, prepend=prev), zi=zi)
                    hp_state[n] = (float(v[n - 1][-1]), zi)
                if noise > 0:
                    x = x + rng.normal(0.0, noise, stop - start)
                out[n][start:stop] = x - inp.offset_v
        return out


def first_crossing(v: np.ndarray, last: float | None, level: float, slope: str) -> int | None:
    """Index of the first sample of ``v`` that crosses ``level`` with ``slope``."""
    if last is None:
        prev, cur, offset = v[:-1], v[1:], 1
    else:
        prev, cur, offset = np.concatenate(([last], v[:-1])), v, 0
    rising = (prev < level) & (cur >= level)
    falling = (prev > level) & (cur <= level)
    mask = rising if slope == "POSitive" else falling if slope == "NEGative" else rising | falling
    hits = np.flatnonzero(mask)
    return int(hits[0]) + offset if hits.size else None
