"""Figures of a run: waveforms, distributions, trends, bounce, self-discharge (matplotlib, Agg).

The look and the plumbing (palette, style, PNG/SVG output) are in :mod:`.style`, the waveform
figures and sparklines in :mod:`.waves`, and the figures of events across groups in
:mod:`.groups`. Builders take DataFrames and arrays and return a Figure; :func:`render` writes
it as PNG and SVG and hands the bytes back for embedding. The report's sections use this
package as ``F`` (``from rig.report import figures as F``) through the names below.
"""

from rig.report.figures.groups import (
    fig_iec_charge,
    fig_pulses,
    fig_selfdischarge,
    fig_strip,
    fig_vs_voltage,
)
from rig.report.figures.style import (
    OKABE_ITO,
    RenderedFigure,
    colour_map,
    house_style,
    mpl_text,
    render,
)
from rig.report.figures.waves import (
    Series,
    TraceSummary,
    fig_waveforms,
    linear_window,
    sparkline_svg,
    summarise_traces,
)

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
