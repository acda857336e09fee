"""One single-shot record of the simulated scope: trigger search and sample generation.

An :class:`Acquisition` freezes the scope's settings when it is armed and then does the
physics side of a capture against the World. The sample clock runs freely, like a real
digitiser's: its grid ``t_arm + (phase + k) dt`` has a random phase (drawn from the scope's
seeded Generator at arming), so it bears no relation to the switching instant of the event.
The trigger search follows the contract in DEVELOPERS.md: the trigger input is evaluated
(noise-free, DC-coupled, with its bandwidth limit) on that grid from the arming time and from
the first grid point at or after every switching instant of the world, up to ``points``
samples per start and never beyond the clock's present (the trigger comparator sees the
analog input: for ``TRIGGER_FINE_S`` after each switching instant the input is evaluated at
the native rate ``NATIVE_S`` when the sample interval is longer); the first sample that
crosses the level with the slope triggers, and the trigger time is interpolated linearly between it and
the sample before. The record's first sample is the first grid point at or after trigger +
``trigger_offset_s``, so the reported time of the first sample from the trigger carries the
sub-sample phase.

Two samplings (``SAMPLINGS``): ``"POINt"`` stores the input at each grid instant; ``"MEAN"``
stores the mean of the input over the sample's interval [t - dt/2, t + dt/2] (what
high-resolution and averaging acquisition modes do), so a pulse much shorter than the
sample interval keeps its charge. The mean is a midpoint rule: ``MEAN_FINE_POINTS`` points
(spaced at most ``MEAN_FINE_S``) per interval for ``MEAN_FAST_S`` after every switching
instant, where the network's fast modes live, and ``MEAN_SLOW_POINTS`` elsewhere (relative
error (dt / tau)^2 / (24 m^2) on a slow exponential, midpoint rule, textbook numerics).
Records get Gaussian noise: ``config.noise_volts`` rms per sample at the digitiser's native
rate (``NATIVE_S``); a MEAN sample averages dt / NATIVE_S native samples, so its noise is
that divided by sqrt(dt / NATIVE_S) (independent samples); and, for AC coupling, a first-order 10 Hz high-pass that assumes the input sat at its first
value before the record (an approximation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.signal import lfilter

from drivers.sim.interfaces import World

__all__ = [
    "AC_COUPLING_HZ",
    "N_INPUTS",
    "SAMPLINGS",
    "Acquisition",
    "InputSettings",
    "first_crossing",
]

N_INPUTS = 4
AC_COUPLING_HZ = 10.0  # corner of the AC-coupling high-pass (common practice, no source)
CHUNK = 1_000_000  # samples evaluated per World call (trigger search, record generation)
SAMPLINGS = ("POINt", "MEAN")
MEAN_FAST_S = 100e-6  # after a switching instant: intervals averaged finely, s
MEAN_FINE_S = 1e-9  # spacing of the fine midpoint rule, at most, s
MEAN_FINE_POINTS = 8192  # fine midpoint points per interval, at most (1 ns spacing up to 8 us)
MEAN_SLOW_POINTS = 1  # elsewhere: the interval midpoint (slow signals; error below)
NATIVE_S = 1e-9  # the simulated digitiser's native sample interval (1 GS/s), s
TRIGGER_FINE_S = 10e-6  # after a switching instant the trigger is evaluated every NATIVE_S


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
    phase: float  # sample-clock phase at arming, fraction of dt in [0, 1)
    dt: float
    points: int
    trigger_offset_s: float  # time of the first sample from the trigger
    source: int
    level: float
    slope: str
    bandwidths: tuple[float | None, ...]
    inputs: tuple[InputSettings, ...]
    sampling: str = "POINt"
    windows: dict[float, tuple[int, float | None]] = field(default_factory=dict)
    fine_done: set[float] = field(default_factory=set)  # switching instants scanned finely
    t_trig: float | None = None
    volts: dict[int, np.ndarray] | None = None  # per input: volts - offset, float32

    def grid_at_or_after(self, t: float) -> float:
        """The first instant of the free-running sample grid at or after ``t``, s."""
        g0 = self.t_arm + self.phase * self.dt
        k = math.ceil((t - g0) / self.dt - 1e-9)
        return g0 + k * self.dt

    def t_first(self) -> float:
        """Time of the record's first sample on the world clock, s (once triggered)."""
        assert self.t_trig is not None
        return self.grid_at_or_after(self.t_trig + self.trigger_offset_s)

    def first_sample_s(self) -> float:
        """Time of the first sample from the (interpolated) trigger, s."""
        assert self.t_trig is not None
        return self.t_first() - self.t_trig

    def t_last(self) -> float:
        """Time of the record's last sample on the world clock, seconds (once triggered)."""
        last = self.t_first() + (self.points - 1) * self.dt
        # a mean sample needs the input up to the end of its interval
        return last + (0.5 * self.dt if self.sampling == "MEAN" else 0.0)

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
            if starts[s] and self.dt > NATIVE_S and s not in self.fine_done:
                # the trigger comparator sees the analog input, not the stored samples: just
                # after a switching instant (where pulses shorter than dt live) it is
                # evaluated at the native rate for TRIGGER_FINE_S
                if now < s + TRIGGER_FINE_S:
                    continue  # wait until the fine window has passed
                self.fine_done.add(s)
                t_f = s + (np.arange(int(TRIGGER_FINE_S / NATIVE_S)) + self.phase) * NATIVE_S
                v_f = world.scope_inputs(t_f, bws)[src - 1]
                prev_f = float(world.scope_inputs(np.array([s - NATIVE_S]), bws)[src - 1, 0])
                hit = first_crossing(v_f, prev_f, self.level, self.slope)
                if hit is not None:
                    before = float(v_f[hit - 1]) if hit > 0 else prev_f
                    found.append(
                        self._interpolate(float(t_f[hit]), before, float(v_f[hit]), NATIVE_S)
                    )
                    continue
            g = self.grid_at_or_after(s)
            if now < g:
                continue
            available = min(self.points, int(math.floor((now - g) / self.dt * (1 + 1e-12))) + 1)
            if last is None and starts[s]:
                before = world.scope_inputs(np.array([g - self.dt]), bws)
                last = float(before[src - 1, 0])
            while done < available:
                stop = min(available, done + CHUNK)
                t = g + np.arange(done, stop) * self.dt
                v = world.scope_inputs(t, bws)[src - 1]
                hit = first_crossing(v, last, self.level, self.slope)
                if hit is not None:
                    prev = float(v[hit - 1]) if hit > 0 else last
                    found.append(self._interpolate(float(t[hit]), prev, float(v[hit])))
                    break
                done, last = stop, float(v[-1])
            self.windows[s] = (done, last)
        if not found:
            return None
        # windows overlap on different sample grids; a sample evaluated at the very instant
        # of a later switch saw the old state, so the earliest crossing of any window counts
        return min(found)

    def _interpolate(
        self, t_hit: float, prev: float | None, cur: float, step: float | None = None
    ) -> float:
        """Trigger time between the sample before ``t_hit`` (``step`` earlier, default dt)
        and ``t_hit`` where the input crosses the level, by linear interpolation (s)."""
        step = self.dt if step is None else step
        if prev is None or cur == prev:
            return t_hit
        frac = min(1.0, max(0.0, (self.level - prev) / (cur - prev)))
        return t_hit - step + frac * step

    def _sample(
        self, world: World, t: np.ndarray, bandwidths: tuple[float | None, ...]
    ) -> np.ndarray:
        """Inputs at the sample instants ``t`` (POINt) or their interval means (MEAN)."""
        if self.sampling != "MEAN":
            return world.scope_inputs(t, bandwidths)
        m_fine = int(min(MEAN_FINE_POINTS, max(1, math.ceil(self.dt / MEAN_FINE_S))))
        lo, hi = float(t[0]) - self.dt, float(t[-1]) + self.dt
        fast = np.zeros(t.size, dtype=bool)
        for s in world.switching_times(lo - MEAN_FAST_S, hi):
            fast |= (t + 0.5 * self.dt >= s) & (t - 0.5 * self.dt <= s + MEAN_FAST_S)
        out = np.empty((len(bandwidths), t.size))
        for sel, m in ((~fast, MEAN_SLOW_POINTS), (fast, m_fine)):
            idx = np.flatnonzero(sel)
            if not idx.size:
                continue
            offsets = ((np.arange(m) + 0.5) / m - 0.5) * self.dt
            per = max(1, CHUNK // m)
            for a in range(0, idx.size, per):
                part = idx[a : a + per]
                tt = (t[part][:, None] + offsets[None, :]).ravel()
                v = world.scope_inputs(tt, bandwidths)
                out[:, part] = v.reshape(len(bandwidths), part.size, m).mean(axis=2)
        return out

    def make_record(self, world: World, rng: np.random.Generator) -> dict[int, np.ndarray]:
        """Samples of every enabled input, stored as float32 volts relative to the input's
        offset (float32 keeps 16-bit resolution near mid-scale even with a large offset)."""
        assert self.t_trig is not None
        on = [k + 1 for k, i in enumerate(self.inputs) if i.on]
        highest = max(on)
        out = {n: np.empty(self.points, dtype=np.float32) for n in on}
        noise = float(world.config.noise_volts)
        if self.sampling == "MEAN":
            noise /= math.sqrt(max(1.0, self.dt / NATIVE_S))
        rc = 1.0 / (2.0 * math.pi * AC_COUPLING_HZ)
        a = rc / (rc + self.dt)
        # AC coupling, first-order high-pass y[k] = a (y[k-1] + x[k] - x[k-1]), its state carried
        # across chunks; before the record the input is taken as steady at its first value
        hp_state: dict[int, tuple[float, np.ndarray]] = {}
        t0 = self.t_first()
        for start in range(0, self.points, CHUNK):
            stop = min(self.points, start + CHUNK)
            t = t0 + np.arange(start, stop) * self.dt
            v = self._sample(world, t, self.bandwidths[:highest])
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
