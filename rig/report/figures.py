"""Figures of a run: waveforms, distributions, trends, bounce, self-discharge (matplotlib, Agg).

Every figure is built on a bare :class:`matplotlib.figure.Figure` with an Agg canvas (no
pyplot, no display, no global state beyond an ``rc_context``), in the project's own look
(:func:`house_style`), with the Okabe-Ito colour-blind-safe palette and SI units with
engineering prefixes (:mod:`rigbase.units`). Builders take DataFrames and arrays and return a
Figure; :func:`render` writes it as PNG and SVG and hands the bytes back for embedding.

Waveforms are reduced before plotting (the report may hold hundreds of 10^5-sample records):
the 5/50/95 % quantiles across events are computed on a linear window around the peak and on
log-spaced time bins for the tail, then thinned to a min/max envelope of a few thousand points.
"""

from __future__ import annotations

import io
import logging
import math
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib
import matplotlib.lines
import matplotlib.patches
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from rigbase.units import axis_label, eng, eng_scale

__all__ = [
    "OKABE_ITO",
    "RenderedFigure",
    "Series",
    "TraceSummary",
    "colour_map",
    "fig_iec_charge",
    "fig_pulses",
    "fig_selfdischarge",
    "fig_strip",
    "fig_vs_voltage",
    "fig_waveforms",
    "house_style",
    "linear_window",
    "mpl_text",
    "render",
    "sparkline_svg",
    "summarise_traces",
]

log = logging.getLogger(__name__)

# Okabe & Ito (2008), "Color Universal Design": distinguishable with the common colour-vision
# deficiencies. Series take them in this order; black is kept for limits and references.
OKABE_ITO = {
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "bluish green": "#009E73",
    "reddish purple": "#CC79A7",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "yellow": "#F0E442",
    "black": "#000000",
}
_SERIES = [
    OKABE_ITO[k]
    for k in ("blue", "vermillion", "bluish green", "reddish purple", "orange", "sky blue")
]
_REF = "#000000"  # limits, reference lines
_GREY = "#6b6b6b"

_STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 10.5,
    "axes.titlesize": 11.5,
    "axes.titleweight": "bold",
    "axes.labelsize": 10.5,
    "axes.edgecolor": "#444444",
    "axes.linewidth": 0.8,
    "axes.grid": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.axisbelow": True,
    "axes.prop_cycle": matplotlib.cycler(color=_SERIES),
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "legend.fontsize": 9,
    "legend.frameon": False,
    "xtick.labelsize": 9.5,
    "ytick.labelsize": 9.5,
    "lines.linewidth": 1.6,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
    "svg.fonttype": "none",  # text stays text: small files, searchable
    "svg.hashsalt": "discharge-rig",  # stable element ids between runs
    "text.usetex": False,
}
DPI = 100


@contextmanager
def house_style() -> Iterator[None]:
    """The project's figure look, applied for the duration of the block."""
    with matplotlib.rc_context(_STYLE):
        yield


def _figure(width_in: float, height_in: float) -> Figure:
    fig = Figure(figsize=(width_in, height_in), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def mpl_text(s: object) -> str:
    """A string from a file made safe for matplotlib text (no mathtext from ``$``)."""
    return str(s).replace("$", r"\$")


def colour_map(names: Sequence[str]) -> dict[str, str]:
    """One palette colour per name, in the given order (cycling after six)."""
    return {n: _SERIES[i % len(_SERIES)] for i, n in enumerate(dict.fromkeys(names))}


@dataclass(frozen=True)
class RenderedFigure:
    """A figure written to disk, with the bytes the report embeds."""

    name: str
    png: bytes
    svg: str
    png_path: Path
    svg_path: Path


def render(fig: Figure, name: str, out_dir: str | Path) -> RenderedFigure:
    """Write ``fig`` as ``<out_dir>/<name>.png`` and ``.svg``; returns both contents."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    with house_style():
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
        png = buf.getvalue()
        # the layout is solved; keep it for the SVG instead of solving it again
        fig.set_layout_engine("none")
        sbuf = io.StringIO()
        fig.savefig(sbuf, format="svg", metadata={"Creator": None, "Date": None})
        svg = sbuf.getvalue()
    png_path, svg_path = out / f"{name}.png", out / f"{name}.svg"
    png_path.write_bytes(png)
    svg_path.write_text(svg, encoding="utf-8")
    return RenderedFigure(name, png, svg, png_path, svg_path)


# --- axes helpers ------------------------------------------------------------------------------


def _eng_ticks(ax: Any, axis: str, unit: str) -> None:
    """Tick labels with engineering prefixes on a log axis (``10 ns``, ``1 µs``...)."""
    fmt = FuncFormatter(lambda v, _pos: eng(v, unit, 3))
    target = ax.xaxis if axis == "x" else ax.yaxis
    target.set_major_locator(LogLocator(base=10.0, numticks=12))
    target.set_major_formatter(fmt)
    target.set_minor_formatter(NullFormatter())


def _scaled(values: np.ndarray, unit: str) -> tuple[float, str]:
    """(factor, axis unit with prefix) for linear axes from the data's largest magnitude."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    peak = float(np.max(np.abs(finite))) if finite.size else 0.0
    factor, prefix = eng_scale(peak)
    return factor, prefix + unit


# --- waveform reduction ------------------------------------------------------------------------


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
    rows: Sequence[tuple[str, Sequence[Series], tuple[float, float]]], title: str
) -> Figure:
    """Median traces with 5-95 % bands: one row per (title, series, linear window).

    Left: linear time around the peak. Right: log time and log |current| for the tail.
    """
    with house_style():
        fig = _figure(10.5, 0.7 + 2.9 * len(rows))
        axes = fig.subplots(len(rows), 2, squeeze=False)
        fig.suptitle(mpl_text(title), fontweight="bold", fontsize=12.5)
        for (row_title, series, window), (ax_l, ax_r) in zip(rows, axes, strict=True):
            allv = np.concatenate([np.r_[s.summary.lin_lo, s.summary.lin_hi] for s in series])
            yf, yunit = _scaled(allv, "A")
            tf, tunit = _scaled(np.array(window), "s")
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
            ax_l.axhline(0, color=_GREY, linewidth=0.8)
            ax_l.set_xlabel(axis_label("Time after trigger", "s", tunit[:-1]))
            ax_l.set_ylabel(axis_label("Current", "A", yunit[:-1]))
            ax_l.set_title(mpl_text(row_title) + " · peak (linear time)", loc="left")
            ax_r.set_xscale("log")
            ax_r.set_yscale("log")
            if top > 0 and np.isfinite(floor) and floor > 0:
                ax_r.set_ylim(floor, top * 2)
            _eng_ticks(ax_r, "x", "s")
            _eng_ticks(ax_r, "y", "A")
            ax_r.set_xlabel("Time after trigger (s, log)")
            ax_r.set_ylabel("|Current| (A, log)")
            ax_r.set_title("tail (log time)", loc="left")
            ax_l.legend(loc="upper right", title="median, band 5–95 %", title_fontsize=8.5)
    return fig


# --- distributions and trends -------------------------------------------------------------------


def fig_strip(
    df: pd.DataFrame,
    value: str,
    unit: str,
    quantity: str,
    modes: Sequence[str],
    colours: dict[str, str],
    rng: np.random.Generator,
    title: str,
) -> Figure:
    """Every event as a jittered point, per mode (panel), voltage (x) and meter (colour).

    ``df`` has columns mode, volts, meter, ``value`` and a boolean ``flagged`` (hollow marks).
    A box spans the quartiles, whiskers 5-95 %, and a thick black bar marks the median.
    """
    meters = list(colours)
    with house_style():
        fig = _figure(min(3.0 + 3.0 * len(modes), 13), 4.4)
        axes = fig.subplots(1, len(modes), squeeze=False, sharey=True)[0]
        factor, yunit = _scaled(df[value].to_numpy(float), unit)
        w = 0.8 / max(len(meters), 1)
        for ax, mode in zip(axes, modes, strict=True):
            dm = df[df["mode"] == mode]
            volts = sorted(dm["volts"].unique())
            for xi, v in enumerate(volts):
                for j, meter in enumerate(meters):
                    d = dm[(dm["volts"] == v) & (dm["meter"] == meter)].dropna(subset=[value])
                    if d.empty:
                        continue
                    pos = xi + (j - (len(meters) - 1) / 2) * w
                    y = d[value].to_numpy(float) * factor
                    x = pos + rng.uniform(-0.28 * w, 0.28 * w, y.size)
                    flagged = d["flagged"].to_numpy(bool)
                    ax.boxplot(
                        [y],
                        positions=[pos],
                        widths=0.75 * w,
                        whis=(5, 95),
                        showfliers=False,
                        manage_ticks=False,
                        boxprops={"color": colours[meter], "linewidth": 1.0},
                        whiskerprops={"color": colours[meter], "linewidth": 1.0},
                        capprops={"color": colours[meter], "linewidth": 1.0},
                        medianprops={"color": _REF, "linewidth": 2.4},
                    )
                    ax.scatter(
                        x[~flagged],
                        y[~flagged],
                        s=16,
                        color=colours[meter],
                        alpha=0.75,
                        linewidths=0,
                        zorder=3,
                    )
                    ax.scatter(
                        x[flagged],
                        y[flagged],
                        s=30,
                        facecolors="none",
                        edgecolors=colours[meter],
                        linewidths=1.2,
                        zorder=3,
                    )
            ax.set_xticks(range(len(volts)), [eng(v, "V") for v in volts])
            ax.set_xlim(-0.6, len(volts) - 0.4)
            ax.set_xlabel("Charge voltage")
            ax.set_title(mpl_text(mode), loc="left")
        top = float(np.nanmax(df[value].to_numpy(float))) * factor if len(df) else 1.0
        axes[0].set_ylim(0, 1.08 * top if np.isfinite(top) and top > 0 else 1.0)
        axes[0].set_ylabel(axis_label(quantity, unit, yunit[: -len(unit)] if unit else ""))
        handles = [
            matplotlib.lines.Line2D([], [], marker="o", linestyle="", color=c, label=mpl_text(m))
            for m, c in colours.items()
        ]
        handles.append(
            matplotlib.lines.Line2D(
                [],
                [],
                marker="o",
                linestyle="",
                markerfacecolor="none",
                color=_GREY,
                label="flagged event",
            )
        )
        handles.append(matplotlib.lines.Line2D([], [], color=_REF, linewidth=2.4, label="median"))
        fig.legend(handles=handles, loc="outside lower center", ncols=min(len(handles), 5))
        fig.suptitle(mpl_text(title), fontweight="bold", fontsize=12.5)
    return fig


def fig_vs_voltage(
    groups: pd.DataFrame,
    metrics: Sequence[tuple[str, str, str]],
    modes: Sequence[str],
    colours: dict[str, str],
    title: str,
) -> Figure:
    """Median (with its CI), tolerance bound (utl) and limit against charge voltage.

    ``groups`` is groups.csv filtered to one load and delay; ``metrics`` lists
    (metric column, quantity label, unit); one row of panels per metric, one column per mode.
    """
    with house_style():
        fig = _figure(min(3.0 + 3.0 * len(modes), 13), 0.9 + 3.0 * len(metrics))
        axes = fig.subplots(len(metrics), len(modes), squeeze=False, sharey="row")
        vmax = float(groups["volts"].max()) if not groups.empty else 1.0
        vmin = float(groups["volts"].min()) if not groups.empty else 0.0
        dodge = 0.012 * max(vmax - vmin, vmax)
        for r, (metric, quantity, unit) in enumerate(metrics):
            gm = groups[groups["metric"] == metric]
            vals = gm[["median", "utl", "limit", "median_ci_high"]].to_numpy(float)
            factor, yunit = _scaled(vals, unit)
            for c, mode in enumerate(modes):
                ax = axes[r, c]
                g = gm[gm["mode"] == mode]
                for j, (meter, colour) in enumerate(colours.items()):
                    d = g[g["meter"] == meter].sort_values("volts")
                    if d.empty:
                        continue
                    x = d["volts"].to_numpy(float) + (j - (len(colours) - 1) / 2) * dodge
                    med = d["median"].to_numpy(float) * factor
                    err = np.vstack(
                        [
                            med - d["median_ci_low"].to_numpy(float) * factor,
                            d["median_ci_high"].to_numpy(float) * factor - med,
                        ]
                    )
                    err = np.where(np.isfinite(err), np.clip(err, 0, None), 0)
                    ax.errorbar(x, med, yerr=err, color=colour, marker="o", markersize=5, capsize=3)
                    ax.plot(
                        x,
                        d["utl"].to_numpy(float) * factor,
                        color=colour,
                        linestyle="--",
                        marker="^",
                        markerfacecolor="white",
                        markersize=6,
                    )
                lim = g.dropna(subset=["limit"]).groupby("volts")["limit"].min()
                if not lim.empty:
                    ax.plot(
                        lim.index.to_numpy(float),
                        lim.to_numpy(float) * factor,
                        color=_REF,
                        linestyle="-.",
                        linewidth=1.4,
                        marker="_",
                        markersize=14,
                    )
                top = np.nanmax(vals) * factor if np.isfinite(vals).any() else 1.0
                ax.set_ylim(0, 1.08 * top)
                if r == len(metrics) - 1:
                    ax.set_xlabel("Charge voltage (V)")
                if c == 0:
                    ax.set_ylabel(axis_label(quantity, unit, yunit[: -len(unit)]))
                ax.set_title(mpl_text(f"{mode} · {quantity}"), loc="left")
        Line2D = matplotlib.lines.Line2D
        handles = [
            Line2D([], [], color=c, marker="o", label=mpl_text(f"{m}: median, 95 % CI"))
            for m, c in colours.items()
        ]
        handles.append(
            Line2D(
                [],
                [],
                color=_GREY,
                linestyle="--",
                marker="^",
                markerfacecolor="white",
                label="upper tolerance bound (utl)",
            )
        )
        handles.append(Line2D([], [], color=_REF, linestyle="-.", label="limit"))
        labels = [h.get_label() for h in handles]
        fig.legend(handles, labels, loc="outside lower center", ncols=min(len(handles), 4))
        fig.suptitle(mpl_text(title), fontweight="bold", fontsize=12.5)
    return fig


def fig_iec_charge(
    df: pd.DataFrame, colours: dict[str, str], rng: np.random.Generator, limit_c: float = 45e-6
) -> Figure:
    """Charge per event (log axis) per mode and meter against the IEC 61010-1 45 µC figure.

    ``df`` has mode, meter, volts, charge_c, flagged; one row of points per (mode, meter).
    """
    keys = list(df.groupby(["mode", "meter", "volts"], sort=False).groups)
    with house_style():
        fig = _figure(11.0, 1.3 + 0.42 * max(len(keys), 2))
        ax = fig.subplots()
        q = df["charge_c"].to_numpy(float)
        q = q[np.isfinite(q) & (q > 0)]
        lo = min(float(q.min()) if q.size else limit_c, limit_c) / 3
        hi = max(float(q.max()) if q.size else limit_c, limit_c) * 3
        for i, (mode, meter, volts) in enumerate(keys):
            d = df[(df["mode"] == mode) & (df["meter"] == meter) & (df["volts"] == volts)]
            y = d["charge_c"].to_numpy(float)
            ok = np.isfinite(y) & (y > 0)
            yy = i + rng.uniform(-0.18, 0.18, y.size)
            colour = colours.get(meter, _GREY)
            ax.scatter(y[ok], yy[ok], s=16, color=colour, alpha=0.75, linewidths=0, zorder=3)
            if ok.any():
                med, mx = float(np.median(y[ok])), float(np.max(y[ok]))
                ax.plot([med, med], [i - 0.3, i + 0.3], color=_REF, linewidth=2.2, zorder=4)
                ax.annotate(
                    f"max {eng(mx, 'C')} = {100 * mx / limit_c:.0f} % of {eng(limit_c, 'C')}",
                    (1.01, i),
                    xycoords=("axes fraction", "data"),
                    ha="left",
                    va="center",
                    fontsize=9,
                    color=_GREY,
                )
        ax.axvline(limit_c, color=_REF, linestyle="-.", linewidth=1.4)
        ax.text(
            limit_c * 1.12,
            0.5,
            f"IEC 61010-1: {eng(limit_c, 'C')}",
            fontsize=9,
            rotation=90,
            va="center",
            ha="left",
            transform=ax.get_xaxis_transform(),
        )
        ax.set_xscale("log")
        ax.set_xlim(lo, hi)
        ax.set_ylim(len(keys) - 0.5, -0.5)
        _eng_ticks(ax, "x", "C")
        ax.set_yticks(
            range(len(keys)), [mpl_text(f"{m} · {mt} · {eng(v, 'V')}") for m, mt, v in keys]
        )
        ax.grid(axis="y", visible=False)
        ax.set_xlabel("Charge delivered into the load (C, log)")
        ax.set_title(
            "Charge per event against the IEC 61010-1 stored-charge figure (black bar: median)",
            loc="left",
        )
    return fig


def fig_pulses(df: pd.DataFrame, modes: Sequence[str], colours: dict[str, str]) -> Figure:
    """Share of events with 1, 2, 3... current pulses (contact bounce), per mode and meter."""
    with house_style():
        fig = _figure(min(3.0 + 3.0 * len(modes), 13), 3.8)
        axes = fig.subplots(1, len(modes), squeeze=False, sharey=True)[0]
        counts = df["pulses"].dropna().astype(int)
        kmax = int(counts.max()) if not counts.empty else 1
        ks = np.arange(1, max(kmax, 1) + 1)
        w = 0.8 / max(len(colours), 1)
        for ax, mode in zip(axes, modes, strict=True):
            ns: list[str] = []
            for j, (meter, colour) in enumerate(colours.items()):
                d = df[(df["mode"] == mode) & (df["meter"] == meter)]["pulses"].dropna().astype(int)
                if d.empty:
                    continue
                share = np.array([(d == k).mean() * 100 for k in ks])
                ax.bar(
                    ks + (j - (len(colours) - 1) / 2) * w,
                    share,
                    width=w * 0.92,
                    color=colour,
                    label=mpl_text(meter),
                )
                ns.append(str(d.size))
            ax.set_xticks(ks)
            ax.set_xlabel("Current pulses per event")
            ax.set_title(mpl_text(f"{mode} · n = {', '.join(ns)}"), loc="left")
        axes[0].set_ylabel("Share of events (%)")
        handles = [matplotlib.patches.Patch(color=c, label=mpl_text(m)) for m, c in colours.items()]
        fig.legend(handles=handles, loc="outside lower center", ncols=min(len(handles), 6))
        fig.suptitle(
            "Contact bounce: separate current pulses per discharge",
            fontweight="bold",
            fontsize=12.5,
        )
    return fig


def fig_selfdischarge(events: pd.DataFrame, fits: pd.DataFrame, colours: dict[str, str]) -> Figure:
    """Charge against the delay before discharge, with q0 exp(-delay/tau) per fit row.

    ``fits`` are selfdischarge.csv rows; ``events`` the metrics rows of those groups. The
    fitted tau comes from the file; q0 is the least-squares amplitude for that tau, so the
    curve is drawn through the points it was fitted to.
    """
    modes = list(dict.fromkeys(fits["mode"]))
    with house_style():
        fig = _figure(min(3.0 + 4.0 * len(modes), 13), 4.4)
        axes = fig.subplots(1, len(modes), squeeze=False)[0]
        for ax, mode in zip(axes, modes, strict=True):
            for _, f in fits[fits["mode"] == mode].iterrows():
                d = events[
                    (events["meter"] == f["meter"])
                    & (events["mode"] == mode)
                    & (events["volts"] == f["volts"])
                    & (events["load"] == f["load"])
                ]
                d = d.dropna(subset=["charge_c", "delay_s"])
                colour = colours.get(f["meter"], _GREY)
                x, y = d["delay_s"].to_numpy(float), d["charge_c"].to_numpy(float)
                ok = y > 0
                ax.scatter(x[ok], y[ok], s=18, color=colour, alpha=0.8, linewidths=0, zorder=3)
                tau = float(f["tau_s"])
                if ok.any() and tau > 0 and np.isfinite(tau):
                    e = np.exp(-x[ok] / tau)
                    q0 = float((y[ok] * e).sum() / (e * e).sum())
                    xs = np.linspace(
                        0, max(float(x.max()), float(f.get("delay_to_safe_s", 0) or 0)), 200
                    )
                    ci = ""
                    if np.isfinite(f.get("tau_ci_low", np.nan)):
                        ci = f" ({eng(f['tau_ci_low'], 's')}–{eng(f['tau_ci_high'], 's')})"
                    ax.plot(
                        xs,
                        q0 * np.exp(-xs / tau),
                        color=colour,
                        label=mpl_text(f"{f['meter']}: τ = {eng(tau, 's')}{ci}"),
                    )
                dts = float(f.get("delay_to_safe_s", np.nan))
                if np.isfinite(dts) and dts > 0:
                    ax.axvline(dts, color=colour, linestyle=":", linewidth=1.3)
                safe = float(f.get("safe_charge_c", np.nan))
                if np.isfinite(safe):
                    # the safe charge is the meter's own (its capacitance at the safe voltage)
                    ax.axhline(safe, color=colour, linestyle="-.", linewidth=1.0)
                    ax.annotate(
                        f"safe charge {eng(safe, 'C')}",
                        (0, safe),
                        xytext=(4, 3),
                        textcoords="offset points",
                        fontsize=8.5,
                        color=colour,
                    )
            ax.set_yscale("log")
            _eng_ticks(ax, "y", "C")
            ax.set_xlabel("Delay between charge and discharge (s)")
            ax.set_ylabel("Charge delivered (C, log)")
            ax.set_title(
                mpl_text(f"{mode} (dash-dot: safe charge; dotted: delay to reach it)"), loc="left"
            )
            ax.legend(loc="upper right")
        fig.suptitle("Self-discharge: charge left after a delay", fontweight="bold", fontsize=12.5)
    return fig


# --- thumbnails ----------------------------------------------------------------------------------


def sparkline_svg(
    t: np.ndarray, y: np.ndarray, colour: str = _SERIES[0], width: int = 180, height: int = 44
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
