"""Figures of the events across groups: distributions, trends, stored charge, bounce, self-discharge.

Each builder takes the metrics rows (one per event) or the per-group statistics of a run as
DataFrames and returns a Figure in the house style: every event as a jittered point per mode,
voltage and meter (:func:`fig_strip`); medians, tolerance bounds and limits against the charge
voltage (:func:`fig_vs_voltage`); the charge per event against the IEC 61010-1 stored-charge
figure (:func:`fig_iec_charge`); the share of events with 1, 2, 3... current pulses
(:func:`fig_pulses`); and the charge left after a delay with its fitted exponential
(:func:`fig_selfdischarge`). Meters keep one colour throughout (``colours``).
"""

from __future__ import annotations

from collections.abc import Sequence

import matplotlib.lines
import matplotlib.patches
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from rig.report.figures.style import (
    GREY,
    REF,
    eng_ticks,
    house_style,
    mpl_text,
    new_figure,
    scaled,
)
from rigbase.units import axis_label, eng

__all__ = [
    "fig_iec_charge",
    "fig_pulses",
    "fig_selfdischarge",
    "fig_strip",
    "fig_vs_voltage",
]


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
        fig = new_figure(min(3.0 + 3.0 * len(modes), 13), 4.4)
        axes = fig.subplots(1, len(modes), squeeze=False, sharey=True)[0]
        factor, yunit = scaled(df[value].to_numpy(float), unit)
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
                        medianprops={"color": REF, "linewidth": 2.4},
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
        vals = df[value].to_numpy(float)
        # a run without one captured event has only NaN here (a scope that never triggered)
        top = float(np.nanmax(vals)) * factor if np.isfinite(vals).any() else 1.0
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
                color=GREY,
                label="flagged event",
            )
        )
        handles.append(matplotlib.lines.Line2D([], [], color=REF, linewidth=2.4, label="median"))
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
        fig = new_figure(min(3.0 + 3.0 * len(modes), 13), 0.9 + 3.0 * len(metrics))
        axes = fig.subplots(len(metrics), len(modes), squeeze=False, sharey="row")
        vmax = float(groups["volts"].max()) if not groups.empty else 1.0
        vmin = float(groups["volts"].min()) if not groups.empty else 0.0
        dodge = 0.012 * max(vmax - vmin, vmax)
        for r, (metric, quantity, unit) in enumerate(metrics):
            gm = groups[groups["metric"] == metric]
            vals = gm[["median", "utl", "limit", "median_ci_high"]].to_numpy(float)
            factor, yunit = scaled(vals, unit)
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
                        color=REF,
                        linestyle="-.",
                        linewidth=1.4,
                        marker="_",
                        markersize=14,
                    )
                top = np.nanmax(vals) * factor if np.isfinite(vals).any() else 1.0
                ax.set_ylim(0, 1.08 * top)
                # from 0 V, so that a run at one voltage gets a readable axis (not 570-630 V)
                ax.set_xlim(0, 1.12 * vmax)
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
                color=GREY,
                linestyle="--",
                marker="^",
                markerfacecolor="white",
                label="upper tolerance bound (utl)",
            )
        )
        handles.append(Line2D([], [], color=REF, linestyle="-.", label="limit"))
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
        fig = new_figure(11.0, 1.3 + 0.42 * max(len(keys), 2))
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
            colour = colours.get(meter, GREY)
            ax.scatter(y[ok], yy[ok], s=16, color=colour, alpha=0.75, linewidths=0, zorder=3)
            if ok.any():
                med, mx = float(np.median(y[ok])), float(np.max(y[ok]))
                ax.plot([med, med], [i - 0.3, i + 0.3], color=REF, linewidth=2.2, zorder=4)
                ax.annotate(
                    f"max {eng(mx, 'C')} = {100 * mx / limit_c:.0f} % of {eng(limit_c, 'C')}",
                    (1.01, i),
                    xycoords=("axes fraction", "data"),
                    ha="left",
                    va="center",
                    fontsize=9,
                    color=GREY,
                )
        ax.axvline(limit_c, color=REF, linestyle="-.", linewidth=1.4)
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
        eng_ticks(ax, "x", "C")
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
        fig = new_figure(min(3.0 + 3.0 * len(modes), 13), 3.8)
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
    curve is drawn through the points it was fitted to. The curve is solid over the measured
    delays and dashed beyond the longest one (an extrapolation). Horizontal lines mark the
    thresholds the file names (safe residual, hazardous-live voltage, 45 uC); a marker with an
    error bar shows where the fit crosses each, up to its upper confidence bound.
    """
    modes = list(dict.fromkeys(fits["mode"]))
    with house_style():
        fig = new_figure(min(3.0 + 5.0 * len(modes), 13), 4.8)
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
                colour = colours.get(f["meter"], GREY)
                x, y = d["delay_s"].to_numpy(float), d["charge_c"].to_numpy(float)
                ok = y > 0
                ax.scatter(
                    x[ok],
                    y[ok],
                    s=18,
                    color=colour,
                    alpha=0.8,
                    linewidths=0,
                    zorder=3,
                    label=mpl_text(f"{f['meter']}: measured"),
                )
                tau = float(f["tau_s"])
                marks = _sd_thresholds(f)
                if ok.any() and tau > 0 and np.isfinite(tau):
                    e = np.exp(-x[ok] / tau)
                    q0 = float((y[ok] * e).sum() / (e * e).sum())
                    xmax = float(x.max())
                    far = max([xmax] + [m[2] for m in marks if np.isfinite(m[2])])
                    xs = np.linspace(0, xmax, 100)
                    ci = ""
                    if np.isfinite(f.get("tau_ci_low", np.nan)):
                        ci = f" ({eng(f['tau_ci_low'], 's')}–{eng(f['tau_ci_high'], 's')})"
                    ax.plot(
                        xs,
                        q0 * np.exp(-xs / tau),
                        color=colour,
                        label=mpl_text(f"fit τ = {eng(tau, 's')}{ci}"),
                    )
                    if far > xmax:
                        xe = np.linspace(xmax, 1.05 * far, 100)
                        ax.plot(
                            xe,
                            q0 * np.exp(-xe / tau),
                            color=colour,
                            linestyle="--",
                            label="fit, extrapolated beyond the longest delay",
                        )
                for name, level, t_fit, t_hi, style in marks:
                    ax.axhline(level, color=REF, linestyle=style, linewidth=0.9)
                    ax.annotate(
                        mpl_text(f"{name} {eng(level, 'C')}"),
                        (0, level),
                        xytext=(4, 3),
                        textcoords="offset points",
                        fontsize=8.5,
                        color=REF,
                    )
                    if np.isfinite(t_fit) and t_fit > 0:
                        err = [[0.0], [t_hi - t_fit if np.isfinite(t_hi) else 0.0]]
                        ax.errorbar(
                            [t_fit],
                            [level],
                            xerr=err,
                            fmt="D",
                            color=colour,
                            markersize=5,
                            capsize=3,
                            zorder=4,
                        )
            ax.set_yscale("log")
            eng_ticks(ax, "y", "C")
            ax.set_xlabel("Delay between charge and discharge (s)")
            ax.set_ylabel("Charge delivered (C, log)")
            ax.set_title(
                mpl_text(f"{mode}: diamonds mark the crossings (bar: to the upper 95 % bound)"),
                loc="left",
            )
            ax.legend(loc="center right", fontsize=8.5)
        fig.suptitle("Self-discharge: charge left after a delay", fontweight="bold", fontsize=12.5)
    return fig


def _sd_thresholds(f: pd.Series) -> list[tuple[str, float, float, float, str]]:
    """(label, charge C, delay s, upper delay s, line style) of each threshold a fit row names."""
    out = []
    for name, charge, t_fit, t_hi, style in (
        (
            f"safe ({eng(f.get('safe_volts', np.nan), 'V')})",
            "safe_charge_c",
            "delay_to_safe_s",
            "delay_to_safe_upper_s",
            "-.",
        ),
        (
            f"hazardous live ({eng(f.get('hazard_volts', np.nan), 'V')})",
            "hazard_charge_c",
            "delay_to_hazard_s",
            "delay_to_hazard_upper_s",
            ":",
        ),
        ("IEC 61010-1", None, "delay_to_45uc_s", "delay_to_45uc_upper_s", (0, (5, 1))),
    ):
        level = 45e-6 if charge is None else float(f.get(charge, np.nan))
        if charge is not None and not np.isfinite(f.get(charge, np.nan)):
            continue
        if charge is None and t_fit not in f:
            continue
        out.append((name, level, float(f.get(t_fit, np.nan)), float(f.get(t_hi, np.nan)), style))
    return out
