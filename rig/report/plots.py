"""The report's figure sections, each drawn by rig.report.figures and embedded as PNG.

Waveforms, |peak| per event, trends against voltage, charge against the IEC 61010-1 figure,
contact bounce, self-discharge and the baseline overlays. Each builder writes its figure as
PNG and SVG under ``figures/`` and returns the HTML with the PNG embedded; the waveform and
baseline sections, whose figures read every record, hand each figure to a
:class:`rigbase.workers.WorkerPool` and return their parts in order. Peaks and pulses
come from the capture with the finest sample interval, charges from the one with the longest
record (rig.report.page picks the frames).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from rig.analysis.bands import caption_note, method_note
from rig.analysis.stats import capture_roles, with_capture
from rig.report import figures as F
from rig.report.captures import measures
from rig.report.data import (
    _at_zero_delay,
    _capture_text,
    _peak_metric,
    _where,
)
from rig.report.html import _img, _slug, _table, esc
from rig.report.tables import _compare_table
from rig.report.wavebands import group_bands, open_group
from rig.store.runfolder import read_manifest
from rigbase.units import eng
from rigbase.workers import Job, Shared, WorkerPool

IEC61010_CHARGE_C = 45e-6  # IEC 61010-1 stored-charge figure (charged up to 15 kV), C


MAX_WAVE_ROWS = 4  # (voltage, load) rows per waveform figure


_WAVE_COLUMNS = ("status", "file", "meter", "mode", "capture", "volts", "load", "delay_s")


def _narrow(m: pd.DataFrame) -> pd.DataFrame:
    return m[[c for c in _WAVE_COLUMNS if c in m.columns]]


def _wave_rows(
    run: Path,
    m: pd.DataFrame,
    mode: str,
    colours: dict[str, str],
    other: tuple[Path, pd.DataFrame] | None = None,
    capture: str | None = None,
    other_capture: str | None = None,
):
    """Panels for one mode and capture (records of one capture share their timebase): one
    row per (voltage, load), highest voltages first. ``other_capture``: the baseline's
    capture to overlay (default: the same name)."""
    # only the columns that pick the records: every selection below copies what it keeps
    m = _narrow(m)
    other = (other[0], _narrow(other[1])) if other is not None else None
    d = m[(m["mode"] == mode) & m["file"].notna()]
    if capture is not None:
        d = _where(d, d["capture"] == capture)
    d = _at_zero_delay(d)
    other_capture = other_capture if other_capture is not None else capture
    combos = sorted(d.groupby(["volts", "load"]).groups, key=lambda k: (-k[0], str(k[1])))
    if other is not None:
        od = other[1][(other[1]["mode"] == mode) & other[1]["file"].notna()]
        if other_capture is not None:
            od = od[od["capture"] == other_capture]
        od = _at_zero_delay(od)
        have = set(od.groupby(["volts", "load"]).groups)
        combos = [c for c in combos if c in have][:1]
    rows = []
    for volts, load in sorted(combos[:MAX_WAVE_ROWS], key=lambda k: (str(k[1]), k[0])):
        # each group streamed (rig.report.wavebands): never more than a few records in memory
        opened = []
        for meter in colours:
            sel = d[(d["meter"] == meter) & (d["volts"] == volts) & (d["load"] == load)]
            if sel.empty:
                continue
            filt = {
                "meter": meter,
                "mode": mode,
                "volts": volts,
                "load": load,
                "delay_s": sel["delay_s"].iloc[0],
            }
            got = open_group(run, m, **filt, **({"capture": capture} if capture else {}))
            if got is not None:
                opened.append((meter, "", got))
            if other is not None:
                cap_b = {"capture": other_capture} if other_capture else {}
                got_b = open_group(other[0], other[1], **filt, **cap_b)
                if got_b is not None:
                    opened.append((meter, " (baseline)", got_b))
        if not opened:
            continue
        window = (min(g.window[0] for *_, g in opened), max(g.window[1] for *_, g in opened))
        series = []
        for meter, tag, group in opened:
            bands = group_bands(group, window)
            if bands is not None:
                style = "--" if tag else "-"
                series.append(F.Series(bands, f"{meter}{tag}", colours[meter], style))
        if series:
            rows.append((f"{eng(volts, 'V')}, load {load}", series, window))
    return rows


def _section_waveforms(
    run: Path,
    m: Shared[pd.DataFrame],
    modes: list[str],
    colours,
    out: Path,
    pool: WorkerPool,
) -> list[str | Job[str]]:
    """The waveforms section as parts in order: text, and one job per (mode, capture) figure
    given to ``pool`` (each reads its groups' records and draws; join with
    :func:`rigbase.workers.joined`). ``m``: the run's table, shared with ``pool``."""
    parts: list[str | Job[str]] = [
        "<p>Median current of each meter with the band holding 5 % to 95 % of the "
        "events at each instant. Left: linear time around the nanosecond peak. Right: "
        "logarithmic time and current, so the millisecond tail shows as well. "
        f"{esc(method_note())}</p>"
    ]
    captures = [str(c) for c in dict.fromkeys(m.value["capture"])]
    several = len(captures) > 1
    if several:
        parts.append(
            "<p>One figure per scope capture: a capture with a fine sample interval resolves "
            "the peak but ends before the tail; a long capture records the tail (and so the "
            "charge) but smooths the peak.</p>"
        )
    for mode in modes:
        head = f"<h3>{esc(mode)}</h3>"
        for capture in captures:
            parts.append(
                pool.submit(
                    _waveform_part,
                    run,
                    m,
                    mode,
                    capture,
                    several,
                    head,
                    colours,
                    out,
                )
            )
            head = ""
    return parts


def _waveform_part(
    run: Path,
    m: pd.DataFrame,
    mode: str,
    capture: str,
    several: bool,
    head: str,
    colours: dict[str, str],
    out: Path,
) -> str:
    """One (mode, capture) figure of the waveforms section as HTML, after ``head``."""
    rows = _wave_rows(run, m, mode, colours, capture=capture)
    what = f"{mode} · capture {capture}" if several else mode
    if not rows:
        return f"{head}<p>{esc(what)}: no captured waveform.</p>"
    fast = "fast" in measures(m).get(capture, {"fast"})
    fig = F.fig_waveforms(
        rows,
        f"Discharge current · {what}",
        "peak (linear time)" if fast else "start, peak not resolved (linear time)",
        "tail (log time)" if fast else "whole record: the tail (log time)",
    )
    sfx = f"-{_slug(capture)}" if several else ""
    r = F.render(fig, f"waveforms-{_slug(mode)}{sfx}", out)
    caption = f"Discharge current in mode {esc(mode)}" + (
        f", {esc(_capture_text(m, capture))}. " if several else ". "
    )
    caption += esc(caption_note())
    return head + _img(r, f"Discharge waveforms, {what}", caption)


def _load_title(load: object, several: bool) -> tuple[str, str]:
    """(heading HTML, figure-name suffix) of one load when the run has several."""
    return (f"<h3>Load {esc(load)}</h3>", f"-{_slug(str(load))}") if several else ("", "")


def _section_peaks(m, g, load, several, modes, colours, rng, out) -> str:
    head, sfx = _load_title(load, several)
    ml = _at_zero_delay(m)
    ml = _where(ml, ml["load"] == load)
    fig = F.fig_strip(
        ml,
        "abs_peak_a",
        "A",
        "|Peak current|",
        modes,
        colours,
        rng,
        f"|Peak current| per event · load {load}",
    )
    note = (
        "<p>Every event is a point (hollow: flagged). Boxes: quartiles; whiskers: 5 % to "
        "95 %; black bar: median.</p>"
    )
    return (
        head
        + note
        + _img(
            F.render(fig, f"peak-current{sfx}", out),
            "Peak current per event",
            "|Peak current| per event by mode, voltage and meter.",
        )
    )


def _section_trends(m, g, load, several, modes, colours, rng, out, peak: bool = True) -> str:
    head, sfx = _load_title(load, several)
    gl = _at_zero_delay(g[g["load"].astype(str) == str(load)])
    metrics = [(_peak_metric(g), "|Peak current|", "A")] if peak else []
    metrics.append(("charge_c", "Charge", "C"))
    fig = F.fig_vs_voltage(gl, metrics, modes, colours, f"Against charge voltage · load {load}")
    return head + _img(
        F.render(fig, f"vs-voltage{sfx}", out),
        "Peak current and charge against voltage",
        "Median with its 95 % confidence interval, upper tolerance bound (dashed) "
        "and limit (dash-dot) where groups.csv sets one.",
    )


def _section_iec(m, g, load, several, modes, colours, rng, out) -> str:
    head, sfx = _load_title(load, several)
    ml = _at_zero_delay(m)
    ml = _where(ml, ml["load"] == load)
    vmax = ml.groupby(["meter", "mode"])["volts"].transform("max")
    fig = F.fig_iec_charge(_where(ml, ml["volts"] == vmax), colours, rng, IEC61010_CHARGE_C)
    return head + (
        _img(
            F.render(fig, f"iec-charge{sfx}", out),
            "Charge against 45 µC",
            "Charge per event, logarithmic axis.",
        )
    )


_IEC_NOTE = (
    "<p>IEC 61010-1 treats a stored charge up to 45 µC (for voltages up to 15 kV) as not "
    "hazardous; the points are the charge each event delivered at the highest voltage of each "
    "group. Defer to the standard's current text.</p>"
)


def _section_bounce(m, modes, colours, out) -> str:
    if "pulses" not in m.columns or not m["pulses"].notna().any():
        return "<p>metrics.parquet holds no pulse counts.</p>"
    fig = F.fig_pulses(_at_zero_delay(m), modes, colours)
    return _img(
        F.render(fig, "bounce", out),
        "Pulses per event",
        "Separate current pulses per discharge (contact bounce), all loads and "
        "voltages at the shortest delay.",
    )


def _section_selfdischarge(
    run: Path, m: pd.DataFrame, colours, out, capture: str | None = None
) -> str:
    """The delay sweep's fits; ``m`` holds the events of ``capture`` (the longest record,
    whose charge the fit needs), and only that capture's fits are shown."""
    path = run / "selfdischarge.csv"
    sd = pd.read_csv(path) if path.exists() else pd.DataFrame()
    if not sd.empty and capture is not None:
        sd = with_capture(sd)
        sd = sd[sd["capture"].astype(str) == capture]
    if sd.empty:
        return "<p>No delay sweep in this run (no selfdischarge.csv).</p>"
    fig = F.fig_selfdischarge(m, sd, colours)
    rows = []
    for r in sd.itertuples():
        rows.append(
            [
                esc(r.meter),
                esc(r.mode),
                esc(eng(r.volts, "V")),
                esc(r.load),
                esc(f"{eng(r.tau_s, 's')} ({eng(r.tau_ci_low, 's')} – {eng(r.tau_ci_high, 's')})"),
                _sd_cross(r, "safe_charge_c", "delay_to_safe_s", "delay_to_safe_upper_s"),
                _sd_cross(r, "hazard_charge_c", "delay_to_hazard_s", "delay_to_hazard_upper_s"),
                _sd_cross(r, None, "delay_to_45uc_s", "delay_to_45uc_upper_s"),
                esc(f"{r.n_delays}, up to {eng(getattr(r, 'max_delay_s', float('nan')), 's')}"),
            ]
        )
    r0 = sd.iloc[0]
    safe_v = r0.get("safe_volts", float("nan"))
    hz_v = r0.get("hazard_volts", float("nan"))
    named = (
        f"<p><b>Safe</b> here means the input's charge is below what would hold it at the "
        f"bench's safe residual voltage of <b>{esc(eng(safe_v, 'V'))}</b> (bench file, "
        "<code>limits.safe_residual_volts</code>), that is the equivalent capacitance at delay 0 "
        f"× {esc(eng(safe_v, 'V'))}. The table also gives the delay to fall below the "
        f"hazardous-live voltage ({esc(eng(hz_v, 'V'))} d.c.) and below the 45 µC "
        "stored-charge figure of IEC 61010-1. Each delay is the fit's value, then, in "
        "brackets, the one-sided 95 % upper confidence bound of the fitted line: wait at "
        "least that long. <i>Extrapolated</i>: beyond the longest delay measured, drawn "
        "dashed in the figure; extend the sweep to measure it.</p>"
        if "safe_volts" in sd.columns
        else "<p>Safe: below the charge that would hold the input at the safe residual "
        "voltage (selfdischarge.csv from an older version names no more).</p>"
    )
    header = [
        "Meter",
        "Mode",
        "Voltage",
        "Load",
        "τ (95 % CI)",
        f"Delay to safe ({esc(eng(safe_v, 'V'))})",
        f"Delay to below {esc(eng(hz_v, 'V'))}",
        "Delay to below 45 µC",
        "Delays measured",
    ]
    return (
        named
        + _img(
            F.render(fig, "selfdischarge", out),
            "Self-discharge",
            "Charge delivered after each delay, with the fitted exponential (τ from "
            "selfdischarge.csv): solid over the measured delays, dashed where extrapolated.",
        )
        + _table(header, rows)
    )


def _sd_cross(r, charge: str | None, fit: str, upper: str) -> str:
    """One crossing cell: threshold charge, fitted delay (upper bound), extrapolated or not."""
    t = getattr(r, fit, float("nan"))
    if t != t:
        return "–"
    hi = getattr(r, upper, float("nan"))
    q = 45e-6 if charge is None else getattr(r, charge, float("nan"))
    text = f"{eng(t, 's')}" + (f" (≤ {eng(hi, 's')})" if hi == hi else "")
    extra = ""
    longest = getattr(r, "max_delay_s", float("nan"))
    if longest == longest and max(t, hi if hi == hi else t) > longest:
        extra = " <span class='warn'>extrapolated</span>"
    return f"<span class='nw'>{esc(text)}</span>{extra}<br><span class='n'>at {esc(eng(q, 'C'))}</span>"


def _section_baseline(
    run: Path,
    m: Shared[pd.DataFrame],
    base: Path,
    bm: Shared[pd.DataFrame],
    modes: list[str],
    colours,
    out,
    pool: WorkerPool,
) -> list[str | Job[str]]:
    """The baseline section as parts in order: text, one job per (mode, capture) overlay
    given to ``pool``, and the equivalence table (join with
    :func:`rigbase.workers.joined`). ``m``, ``bm``: this run's and the baseline's tables
    (:func:`rig.report.data._load_metrics`), shared with ``pool``."""
    base_man = read_manifest(base)
    parts: list[str | Job[str]] = [
        f"<p>Baseline run: <b>{esc(base_man.get('run_id') or base.name)}</b>"
        f" ({esc(base_man.get('started') or '')}). Solid: this run; dashed: the "
        "baseline.</p>"
    ]
    # captures are paired by role (finest sample interval, longest record), not by name
    pairs = dict(zip(capture_roles(m.value), capture_roles(bm.value), strict=True))
    for mode in modes:
        for capture, base_capture in pairs.items():
            what = f"{mode} · capture {capture}" if len(pairs) > 1 else mode
            sfx = f"-{_slug(capture)}" if len(pairs) > 1 else ""
            parts.append(
                pool.submit(
                    _baseline_part,
                    run,
                    m,
                    base,
                    bm,
                    mode,
                    capture,
                    base_capture,
                    what,
                    sfx,
                    colours,
                    out,
                )
            )
    parts.append("<h3>Equivalence</h3>" + _compare_table(run, base, base_man))
    return parts


def _baseline_part(
    run: Path,
    m: pd.DataFrame,
    base: Path,
    bm: pd.DataFrame,
    mode: str,
    capture: str,
    base_capture: str,
    what: str,
    sfx: str,
    colours: dict[str, str],
    out: Path,
) -> str:
    """One (mode, capture) overlay of this run and the baseline as HTML ("" when the two
    runs share no group of it)."""
    rows = _wave_rows(
        run, m, mode, colours, other=(base, bm), capture=capture, other_capture=base_capture
    )
    if not rows:
        return ""
    fig = F.fig_waveforms(rows, f"This run against the baseline · {what}")
    r = F.render(fig, f"baseline-{_slug(mode)}{sfx}", out)
    return _img(
        r,
        f"Baseline overlay, {what}",
        f"Mode {esc(mode)}, capture {esc(capture)}: this run (solid) and the "
        f"baseline's capture {esc(base_capture)} (dashed). {esc(caption_note())}",
    )
