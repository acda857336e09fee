"""Median and 5-95 % bands of a group's current records, streamed one record at a time onto a
decimated time grid, in memory that does not grow with the number of records.

The grid (:class:`BandGrid`, from the first record's t0, dt and length and a linear window) has
two parts, and every record is reduced onto it before any statistics:

* **linear part** (the peak): the window's samples themselves when it holds at most
  :data:`LIN_POINTS` of them, so each record contributes its exact sample values; otherwise
  :data:`LIN_POINTS` equal bins and each record contributes, per bin, its sample of largest
  |current| (so a peak narrower than a bin keeps its full height in every record; a flat
  noisy stretch reads a little high, at the scale of the noise).
* **log part** (the tail): :data:`LOG_BINS` log-spaced bins from the first sample after the
  trigger to the record's end, and each record contributes its **mean** over each bin. A bin's
  mean times its width is the bin's charge, so the bins together hold exactly the record's
  charge after the trigger (sum x dt) and a long tail is not aliased by point sampling.

Before reduction a record loses its baseline (the mean of its pre-trigger samples, when there
are at least 8) and is turned so its largest |current| is positive; its polarity counts towards
the group's dominant one, which the linear part is drawn with. The quantiles across records
at every grid point come from :class:`~rig.analysis.gridquantiles.GridQuantiles`: exact
(numpy's) up to :data:`~rig.analysis.gridquantiles.EXACT_CAP` records, then within
:data:`~rig.analysis.gridquantiles.REL_ERROR` of the value (plus a floor far below the noise).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from rig.analysis.gridquantiles import EXACT_CAP, FLOOR_RATIO, REL_ERROR, GridQuantiles

__all__ = [
    "LIN_POINTS",
    "LOG_BINS",
    "MIN_PRE_SAMPLES",
    "BandAccumulator",
    "BandGrid",
    "Bands",
    "band_grid",
    "caption_note",
    "method_note",
    "peak_window",
]

LIN_POINTS = 1000  # most points of the linear (peak) part of the grid
LOG_BINS = 200  # log-spaced bins of the tail part (fewer where bins would hold no sample)
MIN_PRE_SAMPLES = 8  # pre-trigger samples needed to estimate a record's baseline and noise
QUANTILES = (0.05, 0.5, 0.95)  # the band's edges and its middle line


def method_note() -> str:
    """One sentence on how the bands are computed, with the constants (plain text)."""
    return (
        f"Records are reduced to a grid of up to {LIN_POINTS} points around the peak (the "
        f"samples themselves, or each record's largest value per bin) and {LOG_BINS} "
        "log-spaced bins over the tail (each record's mean per bin, which keeps its charge). "
        f"Quantiles are exact up to {EXACT_CAP} events per group; beyond, they come from "
        f"log-spaced histograms per point (DDSketch buckets) within {REL_ERROR * 100:g} % of the "
        "value."
    )


def caption_note() -> str:
    """The bands' accuracy in a few words, for a figure caption (plain text)."""
    return (
        f"Bands: exact quantiles up to {EXACT_CAP} events per group, "
        f"within {REL_ERROR * 100:g} % beyond (streamed on a decimated time grid)."
    )


def peak_window(t: np.ndarray, mean_abs: np.ndarray) -> tuple[float, float]:
    """Time window (s) that shows the fast peak on a linear axis, from the mean |current|
    of the aligned records sampled at ``t``.

    From a little before the trigger to eight times the time the mean trace takes to fall from
    its peak to half of it: the fast part fills the panel even when a slow tail follows at a
    tenth of the peak (common practice for a readable zoom, no source).
    """
    k = int(np.argmax(mean_abs))
    after = np.flatnonzero(mean_abs[k:] < 0.5 * mean_abs[k])
    fall = t[k + int(after[0])] - t[k] if after.size else t[-1] - t[k]
    dt = float(t[1] - t[0]) if t.size > 1 else 1e-9
    end = min(float(t[-1]), float(t[k]) + max(8.0 * float(fall), 40 * dt))
    start = max(float(t[0]), -0.15 * end)
    return start, end


def align(t: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, float, float]:
    """One record sampled at ``t`` (s) with its baseline (the mean of the samples before the
    trigger, when there are at least MIN_PRE_SAMPLES) removed and turned so its largest
    |value| is positive: (aligned values, the record's polarity +1/-1, pre-trigger rms or
    NaN)."""
    v = np.asarray(values, dtype=np.float64)
    # before the trigger by half a sample or more: t0 + k dt leaves a residue of either sign
    # at the trigger sample, which must not count as baseline
    pre = t < -0.5 * (float(t[1] - t[0]) if t.size > 1 else 0.0)
    noise = float("nan")
    if np.count_nonzero(pre) >= MIN_PRE_SAMPLES:
        v = v - v[pre].mean()
        noise = float(v[pre].std())
    k = int(np.argmax(np.abs(v))) if v.size else 0
    sign = -1.0 if v.size and v[k] < 0 else 1.0
    return (v if sign > 0 else -v), sign, noise


@dataclass(frozen=True)
class BandGrid:
    """Where a record of ``n`` samples (``t = t0 + k dt``) is reduced (see the module doc).

    ``lin_starts``: first sample of each linear bin (one sample each when ``lin_exact``),
    ``lin_stop`` the sample after the last;
    ``log_starts``/``log_counts``: first sample and size of each tail bin; ``lin_t``,
    ``log_t``: the points' times (s; a bin's centre, the mean time of a tail bin).
    """

    t0: float
    dt: float
    n: int
    lin_exact: bool
    lin_starts: np.ndarray
    lin_stop: int
    lin_t: np.ndarray
    log_starts: np.ndarray
    log_counts: np.ndarray
    log_t: np.ndarray

    @property
    def width(self) -> int:
        """Grid points: linear part then tail part."""
        return int(self.lin_t.size + self.log_t.size)

    def time(self) -> np.ndarray:
        """Sample times of a record on this grid (s)."""
        return self.t0 + self.dt * np.arange(self.n)

    def reduce(self, aligned: np.ndarray) -> np.ndarray:
        """One record (``n`` samples, any baseline) reduced onto the grid: (width,) values."""
        x = np.asarray(aligned, dtype=np.float64)
        if x.shape != (self.n,):
            raise ValueError(f"BandGrid: a record of {x.shape} samples, expected ({self.n},)")
        if self.lin_exact:
            lin = x[self.lin_starts]
        else:  # per bin, the sample of largest |value| (with its sign)
            seg = x[: self.lin_stop]
            top = np.maximum.reduceat(seg, self.lin_starts)
            bottom = np.minimum.reduceat(seg, self.lin_starts)
            lin = np.where(-bottom > top, bottom, top)
        if not self.log_starts.size:  # no sample after the trigger
            return lin.astype(np.float64)
        first = int(self.log_starts[0])
        tail = np.add.reduceat(x[first:], self.log_starts - first) / self.log_counts
        return np.concatenate([lin, tail])

    def tail_charge(self, row: np.ndarray) -> float:
        """Charge (C, for A rows) of the tail part of a reduced row: sum of bin mean x count x
        dt, which equals the record's sum x dt after the trigger (float rounding aside)."""
        tail = np.asarray(row, dtype=np.float64)[self.lin_t.size :]
        return float(np.sum(tail * self.log_counts) * self.dt)


def band_grid(
    t0: float,
    dt: float,
    n: int,
    window: tuple[float, float],
    lin_points: int = LIN_POINTS,
    log_bins: int = LOG_BINS,
) -> BandGrid:
    """The grid of records of ``n`` samples at ``t = t0 + k dt`` (s) for the linear ``window``
    (s) around the peak: see the module docstring."""
    if n < 2 or not dt > 0:
        raise ValueError(f"band_grid: a record needs 2 samples or more and dt > 0 (n {n}, dt {dt})")
    t = t0 + dt * np.arange(n)
    inside = np.flatnonzero((t >= window[0]) & (t <= window[1]))
    if inside.size == 0:  # a window outside the record: its nearest sample
        inside = np.array([int(np.clip(round((window[0] - t0) / dt), 0, n - 1))])
    a, b = int(inside[0]), int(inside[-1]) + 1
    if b - a <= lin_points:
        lin_exact = True
        lin_starts = np.arange(a, b)
        lin_t = t[lin_starts]
    else:
        lin_exact = False
        width = math.ceil((b - a) / lin_points)
        lin_starts = np.arange(a, b, width)
        ends = np.minimum(lin_starts + width, b)
        lin_t = 0.5 * (t[lin_starts] + t[ends - 1])
    # tail: samples after the trigger; t0 + k dt leaves ~1e-22 s instead of 0 at the trigger
    # sample, hence dt / 2
    first = int(np.searchsorted(t, 0.5 * dt, side="right"))
    if first >= n - 1:
        log_starts = np.empty(0, np.int64)
        log_counts = np.empty(0, np.int64)
        log_t = np.empty(0)
    else:
        tp = t[first:]
        edges = np.geomspace(tp[0], tp[-1], log_bins + 1)
        starts = np.unique(np.searchsorted(tp, edges[:-1]))
        starts = starts[starts < tp.size]
        log_counts = np.diff(np.append(starts, tp.size))
        log_t = np.add.reduceat(tp, starts) / log_counts
        log_starts = starts + first
    return BandGrid(
        float(t0),
        float(dt),
        int(n),
        lin_exact,
        lin_starts,
        b,
        lin_t,
        log_starts,
        log_counts,
        log_t,
    )


@dataclass(frozen=True)
class Bands:
    """5/50/95 % quantiles across the records of one group, on a :class:`BandGrid`.

    Linear part: ``lin_t`` (s) with ``lin_lo/mid/hi`` (A, the dominant polarity's sign).
    Tail: ``log_t`` (s, > 0) with ``log_lo/mid/hi`` (A, records turned positive, bin means).
    ``noise`` is the median pre-trigger rms (A, NaN without a pre-trigger), ``peak`` the
    largest |median| of the linear part (A), ``exact`` whether the quantiles are numpy's
    (n <= EXACT_CAP) rather than the histograms' estimate.
    """

    n: int
    lin_t: np.ndarray
    lin_lo: np.ndarray
    lin_mid: np.ndarray
    lin_hi: np.ndarray
    log_t: np.ndarray
    log_lo: np.ndarray
    log_mid: np.ndarray
    log_hi: np.ndarray
    noise: float
    peak: float
    exact: bool = True


class BandAccumulator:
    """Streams records of one group onto ``grid`` and keeps the quantiles of every grid point.

    ``span``: the largest |current| a record can hold (A; e.g. twice the scope's full scale,
    as removing a baseline can double a value); larger values read back as about ``span``.
    Memory: the grid, plus EXACT_CAP x width float32 values, or width x buckets counts past
    the cap; nothing grows with the number of records beyond that.
    """

    def __init__(
        self,
        grid: BandGrid,
        span: float,
        cap: int = EXACT_CAP,
        rel_error: float = REL_ERROR,
        floor_ratio: float = FLOOR_RATIO,
    ) -> None:
        self.grid = grid
        self._t = grid.time()
        self.values = GridQuantiles(grid.width, span, cap, rel_error, floor_ratio)
        self.noises = GridQuantiles(1, span, cap, rel_error, floor_ratio)
        self.polarity = 0  # records with a positive peak minus those with a negative one

    @property
    def n(self) -> int:
        """Records added."""
        return self.values.n

    @property
    def nbytes(self) -> int:
        """Bytes held by the quantile estimators (the part that could grow with n)."""
        return self.values.nbytes + self.noises.nbytes

    def add(self, values: np.ndarray) -> None:
        """Add one record (``grid.n`` samples, A, on the grid's time base)."""
        x, sign, noise = align(self._t, values)
        self.values.add(self.grid.reduce(x))
        if math.isfinite(noise):
            self.noises.add(np.array([noise]))
        self.polarity += 1 if sign > 0 else -1

    def merge(self, other: BandAccumulator) -> BandAccumulator:
        """Take in ``other``'s records (same grid and layout); returns self."""
        g, h = self.grid, other.grid
        if (g.t0, g.dt, g.n, g.width) != (h.t0, h.dt, h.n, h.width):
            raise ValueError("BandAccumulator: cannot merge accumulators on different grids")
        self.values.merge(other.values)
        self.noises.merge(other.noises)
        self.polarity += other.polarity
        return self

    def result(self) -> Bands:
        """The bands of the records added so far."""
        q = self.values.quantile(QUANTILES)
        nl = self.grid.lin_t.size
        dominant = 1.0 if self.polarity >= 0 else -1.0
        lin = q[:, :nl] * dominant
        lo, hi = np.minimum(lin[0], lin[2]), np.maximum(lin[0], lin[2])
        mid = lin[1]
        noise = float(self.noises.quantile([0.5])[0, 0]) if self.noises.n else float("nan")
        peak = float(np.nanmax(np.abs(mid))) if mid.size and self.n else 0.0
        return Bands(
            n=self.n,
            lin_t=self.grid.lin_t,
            lin_lo=lo,
            lin_mid=mid,
            lin_hi=hi,
            log_t=self.grid.log_t,
            log_lo=q[0, nl:],
            log_mid=q[1, nl:],
            log_hi=q[2, nl:],
            noise=noise,
            peak=peak,
            exact=self.values.exact,
        )
