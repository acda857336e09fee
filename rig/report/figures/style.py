"""The figures' look and plumbing: palette, matplotlib style, bare figures, PNG/SVG output.

Every figure of the report is built on a bare :class:`matplotlib.figure.Figure` with an Agg
canvas (:func:`new_figure`: no pyplot, no display, no global state beyond the ``rc_context`` of
:func:`house_style`). Series take the colours of the Okabe-Ito colour-blind-safe palette in a
fixed order (:func:`colour_map`); black is kept for limits and references. :func:`render`
writes a finished figure as PNG and SVG and hands the bytes back for embedding; the axis
helpers put SI units with engineering prefixes (:mod:`rigbase.units`) on the axes.
"""

from __future__ import annotations

import io
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from rigbase.units import eng, eng_scale

__all__ = [
    "DPI",
    "GREY",
    "OKABE_ITO",
    "REF",
    "SERIES",
    "RenderedFigure",
    "colour_map",
    "eng_ticks",
    "house_style",
    "mpl_text",
    "new_figure",
    "render",
    "scaled",
]

# The Okabe-Ito colour-blind-safe palette (M. Okabe and K. Ito, "Color Universal Design",
# 2002, revised 2008): distinguishable with the common colour-vision deficiencies. Series take
# them in this order; black is kept for limits and references.
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
SERIES = [
    OKABE_ITO[k]
    for k in ("blue", "vermillion", "bluish green", "reddish purple", "orange", "sky blue")
]
REF = "#000000"  # limits, reference lines
GREY = "#6b6b6b"  # neutral marks: zero lines, legend entries that stand for every meter

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
    # titles sit on the axes' top edge. Left to place themselves (None), every draw measures
    # every y tick label of the axes to see whether an offset text ("1e3") above the axis
    # overlaps the title: a quarter of a panel's drawing time, and none of these axes has one
    # (their y axes start at 0, are logarithmic or carry unit-prefixed labels)
    "axes.titley": 1.0,
    "axes.prop_cycle": matplotlib.cycler(color=SERIES),
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


def new_figure(width_in: float, height_in: float, layout: str | None = "constrained") -> Figure:
    """An empty figure of the given size (inches) on its own Agg canvas, constrained layout
    (``layout=None``: none, the caller places the axes)."""
    fig = Figure(figsize=(width_in, height_in), dpi=DPI, layout=layout)
    FigureCanvasAgg(fig)
    return fig


def mpl_text(s: object) -> str:
    """A string from a file made safe for matplotlib text (no mathtext from ``$``)."""
    return str(s).replace("$", r"\$")


def colour_map(names: Sequence[str]) -> dict[str, str]:
    """One palette colour per name, in the given order (cycling after six)."""
    return {n: SERIES[i % len(SERIES)] for i, n in enumerate(dict.fromkeys(names))}


@dataclass(frozen=True)
class RenderedFigure:
    """A figure written to disk, with the bytes the report embeds."""

    name: str
    png: bytes
    svg: str
    png_path: Path
    svg_path: Path


#: a point layer with more points than this is drawn as an image inside the SVG (axes, text
#: and lines stay vector): at 100,000 events one strip plot was an 11 MB SVG of circles
DENSE_POINTS = 5000


def _rasterize_dense(fig: Figure) -> None:
    for ax in fig.axes:
        for coll in ax.collections:
            if len(coll.get_offsets()) > DENSE_POINTS:
                coll.set_rasterized(True)


def render(fig: Figure, name: str, out_dir: str | Path) -> RenderedFigure:
    """Write ``fig`` as ``<out_dir>/<name>.png`` and ``.svg``; returns both contents. Point
    layers of more than DENSE_POINTS points are an image in the SVG (at the PNG's dpi)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    with house_style():
        # the canvases' own print methods rather than fig.savefig: savefig draws a figure with
        # a layout engine twice, once without output to solve the layout (which the drawing
        # then solves again), and the SVG once more without output; the pixels and the SVG
        # are the same
        buf = io.BytesIO()
        FigureCanvasAgg(fig).print_png(buf, metadata={"Software": None})
        png = buf.getvalue()
        # the layout is solved; keep it for the SVG instead of solving it again
        fig.set_layout_engine("none")
        _rasterize_dense(fig)
        sbuf = io.StringIO()
        FigureCanvasSVG(fig).print_svg(sbuf, metadata={"Creator": None, "Date": None})
        svg = sbuf.getvalue()
    png_path, svg_path = out / f"{name}.png", out / f"{name}.svg"
    png_path.write_bytes(png)
    svg_path.write_text(svg, encoding="utf-8")
    return RenderedFigure(name, png, svg, png_path, svg_path)


# --- axes helpers ------------------------------------------------------------------------------


def eng_ticks(ax: Any, axis: str, unit: str) -> None:
    """Tick labels with engineering prefixes on a log axis (``10 ns``, ``1 µs``...)."""
    fmt = FuncFormatter(lambda v, _pos: eng(v, unit, 3))
    target = ax.xaxis if axis == "x" else ax.yaxis
    target.set_major_locator(LogLocator(base=10.0, numticks=12))
    # minor marks at 2 and 5 only: every tick is a set of artists, and the default eight per
    # decade made building them the largest cost of drawing a log panel
    target.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 5.0), numticks=12))
    target.set_major_formatter(fmt)
    target.set_minor_formatter(NullFormatter())


def scaled(values: np.ndarray, unit: str) -> tuple[float, str]:
    """(factor, axis unit with prefix) for linear axes from the data's largest magnitude."""
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    peak = float(np.max(np.abs(finite))) if finite.size else 0.0
    factor, prefix = eng_scale(peak)
    return factor, prefix + unit
