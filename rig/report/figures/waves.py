"""Waveform figures: many records of a group reduced to quantile bands, and one-event sparklines.

The report may hold hundreds of 10^5-sample records per group, so waveforms are reduced before
plotting (:func:`summarise_traces`): the 5/50/95 % quantiles across events are computed on a
linear window around the peak (:func:`linear_window`) and on log-spaced time bins for the
tail, then thinned to a min/max envelope of a few thousand points. :func:`fig_waveforms` draws
the reduced groups (linear time for the peak, log time and log current for the tail);
:func:`sparkline_svg` is the small inline SVG of one event in the tables.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.figure import Figure

from rig.report.figures.style import (
    GREY,
    SERIES,
    eng_ticks,
    house_style,
    mpl_text,
    new_figure,
    scaled,
)
from rigbase.units import axis_label

__all__ = [
    "Series",
    "TraceSummary",
    "fig_waveforms",
    "linear_window",
    "sparkline_svg",
    "summarise_traces",
]


@dataclass(frozen=True)
class TraceSummary:
    """5/50/95 % quantiles across events of one group, reduced for plotting.

    Linear panel: ``lin_t`` (s) with ``lin_lo/mid/hi`` (A, dominant polarity kept).
    Log panel: ``log_t`` (s, > 0) with ``log_lo/mid/hi`` (A, magnitude, bin means).
    ``noise`` is the median pre-trigger rms (A) and ``peak`` the largest |median| (A).
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


def _aligned(t: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, float, float]:
    """Baseline-removed events with one polarity (the dominant one); (rows, sign, noise)."""
    v = np.atleast_2d(np.asarray(values, dtype=float))
    pre = t < 0
    if pre.sum() >= 8:
        v = v - v[:, pre].mean(axis=1, keepdims=True)
        noise = float(np.median(v[:, pre].std(axis=1)))
    else:
        noise = float("nan")
    k = np.argmax(np.abs(v), axis=1)
    signs = np.sign(v[np.arange(v.shape[0]), k])
    signs[signs == 0] = 1.0
    dominant = 1.0 if signs.sum() >= 0 else -1.0
    return v * (signs * dominant)[:, None], dominant, noise


def linear_window(t: np.ndarray, values: np.ndarray) -> tuple[float, float]:
    """Time window (s) that shows the fast peak on a linear axis.

    From a little before the trigger to eight times the time the mean trace takes to fall from
    its peak to half of it: the fast part fills the panel even when a slow tail follows at a
    tenth of the peak (common practice for a readable zoom, no source).
    """
    v, _, _ = _aligned(t, values)
    mean = np.abs(v.mean(axis=0))
    k = int(np.argmax(mean))
    after = np.flatnonzero(mean[k:] < 0.5 * mean[k])
    fall = t[k + int(after[0])] - t[k] if after.size else t[-1] - t[k]
    dt = float(t[1] - t[0]) if t.size > 1 else 1e-9
    end = min(float(t[-1]), float(t[k]) + max(8.0 * float(fall), 40 * dt))
    start = max(float(t[0]), -0.15 * end)
    return start, end


def _thin(t: np.ndarray, lo: np.ndarray, mid: np.ndarray, hi: np.ndarray, max_points: int):
    """Min/max envelope: at most ``max_points`` points, narrow peaks kept."""
    n = t.size
    if n <= max_points:
        return t, lo, mid, hi
    k = math.ceil(n / (max_points // 2))
    m = n // k
    sl = slice(0, m * k)
    tb = t[sl].reshape(m, k)
    mb = mid[sl].reshape(m, k)
    imin, imax = mb.argmin(axis=1), mb.argmax(axis=1)
    first = np.minimum(imin, imax)
    second = np.maximum(imin, imax)
    rows = np.arange(m)
    t2 = np.column_stack([tb[rows, first], tb[rows, second]]).ravel()
    mid2 = np.column_stack([mb[rows, first], mb[rows, second]]).ravel()
    lo2 = np.repeat(lo[sl].reshape(m, k).min(axis=1), 2)
    hi2 = np.repeat(hi[sl].reshape(m, k).max(axis=1), 2)
    return t2, lo2, mid2, hi2


def _half_step(t: np.ndarray) -> float:
    """Half a sample interval (s): the first sample that counts as after the trigger."""
    return 0.5 * float(t[1] - t[0]) if t.size > 1 else 0.0


def summarise_traces(
    t: np.ndarray,
    values: np.ndarray,
    window: tuple[float, float],
    max_points: int = 1500,
    log_bins: int = 200,
) -> TraceSummary:
    """Reduce ``values`` (events x samples, A) sampled at ``t`` (s) for the waveform panels."""
    t = np.asarray(t, dtype=float)
    v, dominant, noise = _aligned(t, values)
    sel = (t >= window[0]) & (t <= window[1])
    q = np.quantile(v[:, sel], [0.05, 0.5, 0.95], axis=0) * dominant
    lo, mid, hi = (np.minimum(q[0], q[2]), q[1], np.maximum(q[0], q[2]))
    lin = _thin(t[sel], lo, mid, hi, max_points)
    # log panel: per-event means over log-spaced bins after the trigger, then quantiles across
    # events; t0 + k dt leaves ~1e-22 s instead of 0 at the trigger sample, hence dt / 2
    pos = np.flatnonzero(t > _half_step(t))
    tp = t[pos]
    edges = np.geomspace(tp[0], tp[-1], log_bins + 1)
    starts = np.unique(np.searchsorted(tp, edges[:-1]))
    starts = starts[starts < tp.size]
    counts = np.diff(np.append(starts, tp.size))
    sums = np.add.reduceat(v[:, pos], starts, axis=1)
    binned = sums / counts
    tb = np.add.reduceat(tp, starts) / counts
    qb = np.quantile(binned, [0.05, 0.5, 0.95], axis=0)
    return TraceSummary(
        n=v.shape[0],
        lin_t=lin[0],
        lin_lo=lin[1],
        lin_mid=lin[2],
        lin_hi=lin[3],
        log_t=tb,
        log_lo=qb[0],
        log_mid=qb[1],
        log_hi=qb[2],
        noise=noise,
        peak=float(np.max(np.abs(mid))) if mid.size else 0.0,
    )


@dataclass(frozen=True)
class Series:
    """One group's summary in a panel, with its look."""

    summary: TraceSummary
    label: str
    colour: str
    linestyle: str = "-"


def fig_waveforms(
    rows: Sequence[tuple[str, Sequence[Series], tuple[float, float]]],
    title: str,
    left: str = "peak (linear time)",
    right: str = "tail (log time)",
) -> Figure:
    """Median traces with 5-95 % bands: one row per (title, series, linear window).

    Left: linear time around the peak. Right: log time and log |current| for the tail.
    ``left``, ``right``: the panel titles (a capture that does not resolve the peak is not
    titled "peak").
    """
    with house_style():
        fig = new_figure(10.5, 0.7 + 2.9 * len(rows))
        axes = fig.subplots(len(rows), 2, squeeze=False)
        fig.suptitle(mpl_text(title), fontweight="bold", fontsize=12.5)
        for (row_title, series, window), (ax_l, ax_r) in zip(rows, axes, strict=True):
            allv = np.concatenate([np.r_[s.summary.lin_lo, s.summary.lin_hi] for s in series])
            yf, yunit = scaled(allv, "A")
            tf, tunit = scaled(np.array(window), "s")
            floor = np.inf
            top = 0.0
            for s in series:
                sm = s.summary
                ax_l.fill_between(
                    sm.lin_t * tf,
                    sm.lin_lo * yf,
                    sm.lin_hi * yf,
                    color=s.colour,
                    alpha=0.22,
                    linewidth=0,
                )
                ax_l.plot(
                    sm.lin_t * tf,
                    sm.lin_mid * yf,
                    color=s.colour,
                    linestyle=s.linestyle,
                    label=mpl_text(f"{s.label} (n={sm.n})"),
                )
                lo = np.where(sm.log_lo > 0, sm.log_lo, np.nan)
                mid = np.where(sm.log_mid > 0, sm.log_mid, np.nan)
                ax_r.fill_between(sm.log_t, lo, sm.log_hi, color=s.colour, alpha=0.22, linewidth=0)
                ax_r.plot(sm.log_t, mid, color=s.colour, linestyle=s.linestyle)
                top = max(top, float(np.nanmax(sm.log_hi)))
                noise = 0.3 * sm.noise if math.isfinite(sm.noise) else 0.0
                floor = min(floor, max(noise, 1e-5 * sm.peak))  # noise or 100 dB below peak
            ax_l.set_xlim(window[0] * tf, window[1] * tf)
            ax_l.axhline(0, color=GREY, linewidth=0.8)
            ax_l.set_xlabel(axis_label("Time after trigger", "s", tunit[:-1]))
            ax_l.set_ylabel(axis_label("Current", "A", yunit[:-1]))
            ax_l.set_title(mpl_text(row_title) + " · " + left, loc="left")
            ax_r.set_xscale("log")
            ax_r.set_yscale("log")
            if top > 0 and np.isfinite(floor) and floor > 0:
                ax_r.set_ylim(floor, top * 2)
            eng_ticks(ax_r, "x", "s")
            eng_ticks(ax_r, "y", "A")
            ax_r.set_xlabel("Time after trigger (s, log)")
            ax_r.set_ylabel("|Current| (A, log)")
            ax_r.set_title(right, loc="left")
            ax_l.legend(loc="upper right", title="median, band 5–95 %", title_fontsize=8.5)
    return fig


def sparkline_svg(
    t: np.ndarray, y: np.ndarray, colour: str = SERIES[0], width: int = 180, height: int = 44
) -> str:
    """A small inline SVG of one event (signed current over log-spaced time bins after the
    trigger, so both the fast peak and the tail show). Axis-free; the table gives numbers."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if (t < 0).sum() >= 8:
        y = y - y[t < 0].mean()
    pos = np.flatnonzero(t > _half_step(t))
    if pos.size < 2:
        return ""
    tp, yp = t[pos], y[pos]
    edges = np.geomspace(tp[0], tp[-1], 121)
    starts = np.unique(np.searchsorted(tp, edges[:-1]))
    starts = starts[starts < tp.size]
    counts = np.diff(np.append(starts, tp.size))
    yb = np.add.reduceat(yp, starts) / counts
    span = float(np.max(np.abs(yb))) or 1.0
    xs = np.linspace(2, width - 2, yb.size)
    mid = height / 2 if yb.min() < -0.1 * span else height - 3
    scale = (height / 2 - 3) if mid == height / 2 else (height - 6)
    ys = mid - yb / span * scale
    pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(xs, ys, strict=True))
    return (
        f'<svg class="spark" width="{width}" height="{height}" viewBox="0 0 {width} {height}" '
        f'role="img" aria-label="event current, log time">'
        f'<line x1="0" y1="{mid:.1f}" x2="{width}" y2="{mid:.1f}" stroke="#bbbbbb" '
        f'stroke-width="0.8"/>'
        f'<polyline points="{pts}" fill="none" stroke="{colour}" stroke-width="1.4"/></svg>'
    )
