"""Waveform figures: many records of a group reduced to quantile bands, and one-event sparklines.

The report may hold thousands of 10^5-sample records per group, so waveforms are reduced before
plotting: the 5/50/95 % quantiles across events on a decimated grid (a linear window around
the peak, :func:`linear_window`, and log-spaced time bins for the tail), streamed one record
at a time by :mod:`rig.analysis.bands`; :func:`summarise_traces` does the same for records
already in memory. :func:`fig_waveforms` draws
the reduced groups (linear time for the peak, log time and log current for the tail);
:func:`sparkline_svg` is the small inline SVG of one event in the tables.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.figure import Figure

from rig.analysis.bands import (
    LIN_POINTS,
    LOG_BINS,
    BandAccumulator,
    Bands,
    align,
    band_grid,
    peak_window,
)
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


TraceSummary = Bands  # one group's bands, reduced for plotting (rig.analysis.bands)


def _aligned_mean(t: np.ndarray, values: np.ndarray) -> np.ndarray:
    """|Mean| of the records (events x samples) after rig.analysis.bands.align."""
    v = np.atleast_2d(np.asarray(values, dtype=float))
    total = np.zeros(v.shape[1])
    for row in v:
        total += align(t, row)[0]
    return np.abs(total / max(v.shape[0], 1))


def linear_window(t: np.ndarray, values: np.ndarray) -> tuple[float, float]:
    """Time window (s) that shows the fast peak of ``values`` (events x samples, A) on a
    linear axis: :func:`rig.analysis.bands.peak_window` of their aligned mean."""
    t = np.asarray(t, dtype=float)
    return peak_window(t, _aligned_mean(t, values))


def _half_step(t: np.ndarray) -> float:
    """Half a sample interval (s): the first sample that counts as after the trigger."""
    return 0.5 * float(t[1] - t[0]) if t.size > 1 else 0.0


def summarise_traces(
    t: np.ndarray,
    values: np.ndarray,
    window: tuple[float, float],
    max_points: int = LIN_POINTS,
    log_bins: int = LOG_BINS,
) -> TraceSummary:
    """Reduce ``values`` (events x samples, A) sampled at ``t`` (s, evenly spaced) for the
    waveform panels: the records go one by one through a
    :class:`rig.analysis.bands.BandAccumulator` (at most ``max_points`` linear points,
    ``log_bins`` tail bins), as the report streams them from disk."""
    t = np.asarray(t, dtype=float)
    v = np.atleast_2d(np.asarray(values, dtype=float))
    dt = float(t[-1] - t[0]) / (t.size - 1) if t.size > 1 else 1e-9
    grid = band_grid(float(t[0]), dt, t.size, window, max_points, log_bins)
    top = float(np.max(np.abs(v))) if v.size else 0.0
    acc = BandAccumulator(grid, 2.0 * top if top > 0 else 1.0)
    for row in v:
        acc.add(row)
    return acc.result()


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
        height = 0.7 + 2.9 * len(rows)
        # fixed margins (inches) instead of the constrained layout: solving that layout took
        # about a third of the report's drawing time, and these panels always carry the same
        # labels (tick labels of at most 6 characters)
        fig = new_figure(10.5, height, layout=None)
        top, bottom, gap = 0.78, 0.55, 0.85
        panel = (height - top - bottom - gap * (len(rows) - 1)) / len(rows)
        fig.subplots_adjust(
            left=0.075,
            right=0.97,
            top=1 - top / height,
            bottom=bottom / height,
            wspace=0.27,
            hspace=gap / panel,
        )
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
                # end the time axis soon after the last band sinks below the floor: a tail
                # of noise around zero would otherwise stretch it over an empty panel
                shown = np.concatenate([s.summary.log_t[s.summary.log_hi >= floor] for s in series])
                ends = [float(s.summary.log_t[-1]) for s in series if s.summary.log_t.size]
                if shown.size and ends:
                    ax_r.set_xlim(right=min(3.0 * float(shown.max()), max(ends)))
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
