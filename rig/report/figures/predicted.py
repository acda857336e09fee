"""The prediction figure: a predicted discharge (line, 95 % band over the parameter draws) on
log time and log current, over the measured events into the same load when there are some
(grey, each aligned to the prediction by its trigger crossing)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from rig.analysis.predict import Prediction
from rig.analysis.runs import group_waveforms, load_run
from rig.report.figures.style import GREY, SERIES, eng_ticks, house_style, mpl_text, new_figure
from rigbase.units import axis_label

__all__ = ["fig_prediction", "measured_medians"]


def fig_prediction(
    preds: Sequence[Prediction],
    measured: dict[str, tuple[np.ndarray, np.ndarray]] | None = None,
    title: str = "",
    trigger_amps: float = 0.2,
) -> Figure:
    """One panel: each prediction of ``preds`` (its load's name in the legend); ``measured``
    maps a load name to (t from trigger in s, rows x samples in A: events, or their median)."""
    measured = measured or {}
    with house_style():
        fig = new_figure(7.5, 4.2)
        ax = fig.add_subplot(1, 1, 1)
        for k, p in enumerate(preds):
            colour = SERIES[k % len(SERIES)]
            sel = p.t > 0
            cross = np.nonzero(np.abs(p.i) >= trigger_amps)[0]
            t_trig = float(p.t[cross[0]]) if cross.size else 0.0
            if p.load in measured:
                tm, im = measured[p.load]
                keep = tm > 0
                for row in im[:20]:  # a few events are enough to show the spread
                    ax.plot(tm[keep] + t_trig, np.abs(row[keep]), color=GREY, lw=0.6, alpha=0.5)
            ax.fill_between(
                p.t[sel], np.abs(p.i_lo[sel]), np.abs(p.i_hi[sel]), color=colour, alpha=0.25, lw=0
            )
            ax.plot(p.t[sel], np.abs(p.i[sel]), color=colour, label=mpl_text(p.load))
        ax.set_xscale("log")
        ax.set_yscale("log")
        eng_ticks(ax, "x", "s")
        ax.set_xlabel(axis_label("time from contact", "s"))
        ax.set_ylabel(axis_label("|current|", "A"))
        ymax = max(float(np.abs(p.i).max()) for p in preds) if preds else 1.0
        ax.set_ylim(ymax * 1e-5, ymax * 2)
        ax.set_xlim(1e-10, max((p.window_s for p in preds), default=1e-3))
        if title:
            ax.set_title(mpl_text(title), loc="left")
        ax.legend(loc="lower left")
    return fig


def measured_medians(
    run: str | Path, keys: dict[str, Any], loads: Sequence[str]
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per load of the run among ``loads``: (bin times from trigger in s, 1 x bins median
    |current| over the group's events in A), the captures joined, finest first."""
    df = load_run(run)
    sel = {k: v for k, v in keys.items() if k in ("meter", "mode", "volts", "delay_s")}
    out = {}
    for load in sorted(set(loads) & set(df["load"])):
        ts: list[float] = []
        ys: list[float] = []
        t_end = 0.0
        caps = df[df["load"] == load].groupby("capture")["dt_s"].first().sort_values()
        for cap in caps.index:
            t, i, _ = group_waveforms(run, load=load, capture=cap, **sel)
            if not len(i):
                continue
            k = np.searchsorted(t, np.geomspace(max(t_end, 2 * (t[1] - t[0])), t[-1], 120))
            med = np.median(np.abs(i), axis=0)
            for a, b in zip(k[:-1], k[1:], strict=True):
                if b > a:
                    ts.append(float(t[a:b].mean()))
                    ys.append(float(med[a:b].mean()))
            t_end = float(t[-1])
        out[load] = (np.array(ts), np.array(ys)[None, :])
    return out
