"""The self-contained HTML report of an analysed run (assembly only; figures in rig.figures).

``write_report(run_dir)`` reads the run folder (manifest.json, metrics.parquet, groups.csv,
selfdischarge.csv, compare-<baseline-id>.csv, waveforms) and writes ``report.html`` plus every
figure as PNG and SVG under ``figures/``. The HTML carries its CSS inline and its figures as
base64 PNG (thumbnails as inline SVG); it loads nothing from anywhere, so it opens from a USB
stick. A Content-Security-Policy meta tag forbids any fetch besides ``data:`` images.
Every string that comes from a file is HTML-escaped.

Sections, in order (ids in :data:`SECTIONS`): what was tested; at a glance (per mode, each
meter's median |peak| and charge at the highest common voltage and which is lower, clipped
peaks not ranked); verdicts against the limits; high-voltage caution; discharge waveforms per
mode (median and 5-95 % band, linear and log time); |peak| per event; peak and charge against
voltage with tolerance bounds and limits; charge against the IEC 61010-1 45 µC figure; contact
bounce; self-discharge; flagged events with thumbnails; the group table; and, with a baseline,
overlays of both runs and the equivalence verdicts.
"""

from __future__ import annotations

import base64
import html
import logging
import math
import re
import time
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drivers.errors import RunFolderError
from rig import __version__
from rig import figures as F
from rig.api import group_waveforms, load_run
from rig.compare import compare_runs
from rig.stats import GROUP_KEYS, with_capture
from rig.store import read_manifest
from rig.units import eng, metric_label, metric_unit
from rig.waveform import load_waveform

__all__ = ["FLAG_TEXT", "SECTIONS", "write_report"]

log = logging.getLogger(__name__)

REPORT = "report.html"
FIGURES = "figures"
IEC61010_CHARGE_C = 45e-6  # IEC 61010-1 stored-charge figure up to 15 kV (REFERENCES.md 3)
MAX_WAVE_ROWS = 4  # (voltage, load) rows per waveform figure
MAX_THUMBNAILS = 60

# (id, heading) in the order the report shows them; the baseline section only with a baseline.
SECTIONS = (
    ("tested", "What was tested"),
    ("glance", "At a glance"),
    ("verdicts", "Verdicts against the limits"),
    ("caution", "High-voltage caution"),
    ("waveforms", "Discharge waveforms"),
    ("peaks", "Peak current per event"),
    ("trends", "Peak current and charge against charge voltage"),
    ("iec-charge", "Charge against the IEC 61010-1 45 µC figure"),
    ("bounce", "Contact bounce"),
    ("selfdischarge", "Self-discharge"),
    ("flagged", "Flagged events"),
    ("groups", "Group table"),
    ("baseline", "Comparison with the baseline run"),
)
FLAG_TEXT = {
    "flag_not_captured": "not captured",
    "flag_clipped": "clipped (beyond the scope range)",
    "flag_truncated": "truncated (record ended before the tail)",
    "flag_below_noise": "below noise",
}
_GROUP_KEYS = list(GROUP_KEYS)  # defined once in rig.stats
_NEEDED = ["meter", "mode", "volts", "load", "delay_s", "abs_peak_a", "charge_c", "file"]


def esc(value: object) -> str:
    """HTML-escaped text of any value (quotes too, so it is safe in attributes)."""
    return html.escape("" if value is None else str(value), quote=True)


def _plain(value: object) -> str:
    """A manifest value as short plain text (not escaped)."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, list | tuple):
        return ", ".join(_plain(v) for v in value)
    if isinstance(value, dict):
        return ", ".join(f"{k}={_plain(v)}" for k, v in value.items())
    return "" if value is None else str(value)


def _slug(s: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", s.lower()).strip("-") or "x"


# --- loading -----------------------------------------------------------------------------------


def _load_metrics(run: Path) -> pd.DataFrame:
    path = run / "metrics.parquet"
    if not path.exists():
        raise RunFolderError(f"{path}: no metrics; analyse the run before the report")
    df = load_run(run)
    missing = [c for c in _NEEDED if c not in df.columns]
    if missing:
        raise RunFolderError(f"{path} [{', '.join(missing)}]: column missing")
    flags = [c for c in FLAG_TEXT if c in df.columns]
    df = df.copy()
    # charges are shown as magnitudes, as groups.csv summarises them (polarity is in its column)
    df["charge_c"] = pd.to_numeric(df["charge_c"], errors="coerce").abs()
    df["flagged"] = df[flags].fillna(False).astype(bool).any(axis=1) if flags else False
    return df


def _load_groups(run: Path) -> pd.DataFrame:
    path = run / "groups.csv"
    if not path.exists():
        raise RunFolderError(f"{path}: no group statistics; analyse the run before the report")
    g = pd.read_csv(path, keep_default_na=True)
    need = ["meter", "mode", "volts", "metric", "median", "verdict"]
    missing = [c for c in need if c not in g.columns]
    if missing:
        raise RunFolderError(f"{path} [{', '.join(missing)}]: column missing")
    optional = ["median_ci_low", "median_ci_high", "utl", "limit", "share_over_limit", "max"]
    for c in _GROUP_KEYS + optional:  # older or partial tables: show what is there
        if c not in g.columns:
            g[c] = np.nan
    g["verdict"] = g["verdict"].fillna("").astype(str).str.strip()
    return with_capture(g)


def _group_waveforms(run: Path, **filters: Any):
    """(t, values events x samples, rows) of the captured events matching ``filters``, or None
    when there are none or their records differ in shape (logged; the panel goes without)."""
    try:
        t, values, rows = group_waveforms(run, channel="current", **filters)
    except RunFolderError as exc:
        log.warning("report: group %s of %s left out of the waveform figure: %s", filters, run, exc)
        return None
    if len(rows) == 0:
        return None
    return np.asarray(t, float), np.atleast_2d(np.asarray(values, float)), rows


# --- sections ----------------------------------------------------------------------------------


def _table(header: Sequence[str], rows: Iterable[Sequence[str]], cls: str = "") -> str:
    """A table; cells are HTML already (callers escape text from files). Columns that are
    empty in every row are left out."""
    rows = [list(r) for r in rows]
    keep = [i for i in range(len(header)) if not rows or any(r[i] not in ("", "–") for r in rows)]
    head = "".join(f"<th>{header[i]}</th>" for i in keep)
    body = "".join("<tr>" + "".join(f"<td>{r[i]}</td>" for i in keep) + "</tr>" for r in rows)
    c = f' class="{cls}"' if cls else ""
    return f"<table{c}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _verdict_cell(v: str) -> str:
    k = v.lower()
    cls = (
        "pass"
        if k in ("pass", "passed", "ok", "equivalent")
        else ("fail" if k in ("fail", "failed", "not equivalent", "different") else "other")
    )
    return f'<span class="v {cls}">{esc(v) or "–"}</span>'


def _dict(v: object) -> dict[str, Any]:
    return v if isinstance(v, dict) else {}


def _short(value: object, limit: int = 160) -> str:
    """A manifest value as one short line: nested tables beyond one level are elided."""
    if isinstance(value, dict):
        text = ", ".join(
            f"{k}={'…' if isinstance(v, dict | list) and v else _plain(v) or '–'}"
            for k, v in value.items()
        )
    elif isinstance(value, list) and any(isinstance(v, dict) for v in value):
        text = "; ".join(_short(v, limit) for v in value)
    else:
        text = _plain(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _kv(items: Iterable[tuple[str, object]]) -> str:
    rows = [(k, _short(v)) for k, v in items if v not in (None, "", [], {})]
    return (
        "<dl class='kv'>"
        + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows)
        + "</dl>"
    )


def _meter_rows(seq: dict[str, Any], m: pd.DataFrame) -> list[list[str]]:
    """One row per meter in the data, completed with the sequence's entry (rating...)."""
    decl = seq.get("meters") or []
    if isinstance(decl, dict):
        decl = [dict(v, name=k) if isinstance(v, dict) else {"name": k} for k, v in decl.items()]
    entries = [d for d in decl if isinstance(d, dict)]

    def entry(meter: str, serial: object) -> dict[str, Any]:
        named = [d for d in entries if str(d.get("model", d.get("name"))) == meter]
        same = [d for d in named if str(d.get("serial")) == str(serial)]
        return (same or named or [{}])[0]

    rows = []
    for (meter, serial), g in m.groupby(["meter", "serial"], sort=False, dropna=False):
        d = entry(str(meter), serial)
        extra = {
            k: v for k, v in d.items() if k not in ("name", "model", "serial", "modes", "rating")
        }
        if extra.get("sim_model"):
            extra["sim_model"] = Path(str(extra["sim_model"])).name
        rows.append(
            [
                esc(meter),
                esc(serial if serial == serial else d.get("serial", "")),
                esc(_plain(d.get("rating", ""))),
                esc(", ".join(map(str, dict.fromkeys(g["mode"])))),
                esc(", ".join(eng(v, "V") for v in sorted(g["volts"].unique()))),
                esc(", ".join(map(str, dict.fromkeys(g["load"])))),
                f"{int(g['file'].notna().sum())} / {len(g)}",
                esc(_short(extra)),
            ]
        )
    return rows


def _instrument_rows(man: dict[str, Any], bench: dict[str, Any]) -> list[list[str]]:
    """Role, identity (``*IDN?`` answers in the manifest), resource, profile, control."""
    ids = _dict(man.get("instruments"))
    specs = _dict(bench.get("instruments"))
    rows = []
    for role in dict.fromkeys([*specs, *ids]):
        ident = ids.get(role, "")
        spec = _dict(specs.get(role))
        if isinstance(ident, dict):  # {"idn": ..., "resource": ...} also accepted
            spec = {**ident, **spec}
            ident = ident.get("idn") or ident.get("identity") or ""
        profile = spec.get("profile")
        rows.append(
            [
                esc(role),
                esc(_plain(ident)),
                esc(_plain(spec.get("resource") or spec.get("address") or "")),
                esc(Path(str(profile)).name if profile else ""),
                esc(_plain(spec.get("control", ""))),
            ]
        )
    return rows


def _section_tested(run: Path, man: dict[str, Any], m: pd.DataFrame) -> str:
    seq, bench = _dict(man.get("sequence")), _dict(man.get("bench"))
    sw = man.get("software")
    host = man.get("host") or _dict(sw).get("host")
    software = {k: v for k, v in _dict(sw).items() if k not in ("host", "platform")} or sw
    simulated = man.get("simulated", bool(bench.get("simulation")) if bench else None)
    info = [
        ("Run", man.get("run_id") or man.get("id") or run.name),
        ("Status", man.get("status")),
        ("Started", man.get("started")),
        ("Ended", man.get("ended")),
        ("Sequence", " · ".join(str(x) for x in (seq.get("name"), man.get("sequence_file")) if x)),
        ("Bench", " · ".join(str(x) for x in (bench.get("name"), man.get("bench_file")) if x)),
        ("Simulated bench", simulated),
        ("Host", " · ".join(str(x) for x in (host, _dict(sw).get("platform")) if x)),
        ("Software", software),
    ]
    parts = [_kv(info)]
    note = (
        man.get("operator_note") or man.get("note") or seq.get("operator_note") or seq.get("note")
    )
    if note:
        parts.append(f"<p class='note'><b>Operator note:</b> {esc(note)}</p>")
    header = ["Meter", "Serial", "Rating", "Modes", "Charge voltages", "Loads"]
    header += ["Events captured / run", "Other"]
    parts.append(_table(header, _meter_rows(seq, m)))
    loads = {str(d.get("name")): d for d in bench.get("loads", []) if isinstance(d, dict)}
    lrows = []
    for name, g in m.groupby("load", sort=False):
        d = loads.get(str(name), {})
        ohms = g["load_ohms"].iloc[0] if "load_ohms" in g else d.get("ohms")
        lrows.append(
            f"{name}: {eng(ohms, 'Ω')}" + (f", {eng(d['henry'], 'H')}" if d.get("henry") else "")
        )
    parts.append("<p><b>Loads:</b> " + esc("; ".join(lrows)) + "</p>")
    if "capture" in m.columns:
        caps = "; ".join(_capture_text(m, str(c)) for c in dict.fromkeys(m["capture"]))
        parts.append(
            "<p><b>Scope captures (each event runs once per capture):</b> " + esc(caps) + "</p>"
        )
    delays = sorted(m["delay_s"].dropna().unique())
    if len(delays) > 1:
        parts.append(
            "<p><b>Delays before discharge:</b> "
            + esc(", ".join(eng(d, "s") for d in delays))
            + "</p>"
        )
    irows = _instrument_rows(man, bench)
    if irows:
        parts.append(
            "<h3>Instruments</h3>"
            + _table(["Role", "Identity", "Resource", "Profile", "Control"], irows)
        )
    skip = {"name", "path", "instruments", "loads", "simulation", "limits"}
    shown = [(k, v) for k, v in bench.items() if k not in skip]
    shown += [(f"limits.{k}", v) for k, v in _dict(bench.get("limits")).items()]
    if shown:
        parts.append("<h3>Bench</h3>" + _kv(shown))
    skip = {"name", "path", "meters", "operator_note", "volts", "loads", "limits"}
    settings = [(k, v) for k, v in seq.items() if k not in skip]
    if settings:
        parts.append("<h3>Sequence settings</h3>" + _kv(settings))
    return "".join(parts)


def _peak_metric(g: pd.DataFrame) -> str:
    """The groups.csv metric of the peak's size: ``abs_peak_a`` if summarised, else ``peak_a``
    (which rig.stats summarises by magnitude)."""
    names = set(g["metric"].astype(str))
    return "abs_peak_a" if "abs_peak_a" in names or "peak_a" not in names else "peak_a"


def _capture_roles(m: pd.DataFrame) -> tuple[str, str]:
    """(capture with the finest sample interval, capture with the longest record span).

    The |peak| is read from the first (only a fine timebase resolves a nanosecond peak), the
    charge from the second (only a long record holds the millisecond tail that carries most
    of it). Decided from the ``dt_s`` and ``record_s`` columns of metrics.parquet (medians
    per capture), never from the names; without them (older runs) the first capture serves
    both."""
    caps = [str(c) for c in dict.fromkeys(m["capture"])] if "capture" in m else []
    if not caps:
        return "main", "main"
    if len(caps) == 1 or not {"dt_s", "record_s"} <= set(m.columns):
        return caps[0], caps[0]
    per = m.groupby("capture", sort=False)[["dt_s", "record_s"]].median().dropna()
    if per.empty:
        return caps[0], caps[0]
    return str(per["dt_s"].idxmin()), str(per["record_s"].idxmax())


def _capture_text(m: pd.DataFrame, capture: str) -> str:
    """``capture “peak”: 1 ns × 20000 samples = 20 µs`` from the events' dt_s and record_s."""
    sel = m[m["capture"] == capture] if "capture" in m else m
    if {"dt_s", "record_s"} <= set(sel.columns) and sel["dt_s"].notna().any():
        dt = float(sel["dt_s"].median())
        span = float(sel["record_s"].median())
        return (
            f"capture “{capture}”: {eng(dt, 's')} × {round(span / dt)} samples = {eng(span, 's')}"
        )
    return f"capture “{capture}”"


def _several_captures(df: pd.DataFrame) -> bool:
    return "capture" in df.columns and df["capture"].nunique() > 1


def _at_zero_delay(df: pd.DataFrame) -> pd.DataFrame:
    """Rows at the smallest delay of their (meter, mode, capture, volts, load) group."""
    if df.empty:
        return df
    d = df["delay_s"].fillna(0.0)
    keys = [k for k in ("meter", "mode", "capture", "volts", "load") if k in df.columns]
    dmin = d.groupby([df[k] for k in keys]).transform("min")
    return df[d == dmin]


def _section_glance(m: pd.DataFrame, g: pd.DataFrame) -> str:
    """Per mode and load: each meter's medians at the highest common voltage; which is lower."""
    mz = _at_zero_delay(m[m["file"].notna()])
    gz = _at_zero_delay(g)
    meters = list(dict.fromkeys(mz["meter"]))
    peak_metric = _peak_metric(g)
    # |peak| from the finest capture, charge from the longest (see _capture_roles)
    peak_cap, charge_cap = _capture_roles(mz)
    source = {"abs_peak_a": peak_cap, "charge_c": charge_cap}
    rows = []
    summary: dict[tuple[str, bool], list[str]] = {}
    for (mode, load), d_all in mz.groupby(["mode", "load"], sort=False):
        d = d_all[d_all["capture"] == peak_cap]  # the peak's events (clip notes)
        per = d_all.groupby("meter")["volts"].apply(set)
        common = set.intersection(*per.tolist()) if len(per) else set()
        if not common:
            continue
        v = max(common)
        cells = {}
        for metric, unit in (("abs_peak_a", "A"), ("charge_c", "C")):
            stats = {}
            dm = d_all[d_all["capture"] == source[metric]]
            for meter in meters:
                x = dm[(dm["meter"] == meter) & (dm["volts"] == v)][metric].dropna()
                if x.empty:
                    continue
                sel = gz[
                    (gz["meter"] == meter)
                    & (gz["mode"] == mode)
                    & (gz["capture"] == source[metric])
                    & (gz["volts"] == v)
                    & (gz["load"] == load)
                    & (gz["metric"] == (peak_metric if metric == "abs_peak_a" else metric))
                ]
                lo = (
                    float(sel["median_ci_low"].iloc[0])
                    if "median_ci_low" in sel and len(sel)
                    else np.nan
                )
                hi = (
                    float(sel["median_ci_high"].iloc[0])
                    if "median_ci_high" in sel and len(sel)
                    else np.nan
                )
                stats[meter] = (float(x.median()), lo, hi, x.size)
            cells[metric] = (stats, unit)
        row = [esc(mode), esc(load), f"<span class='nw'>{esc(eng(v, 'V'))}</span>"]
        winners = []
        for metric in ("abs_peak_a", "charge_c"):
            stats, unit = cells[metric]
            row.append(
                "<br>".join(
                    f"<span class='nw'>{esc(k)}: {esc(eng(s[0], unit))} <span class='n'>(n={s[3]})"
                    f"</span></span>{_clip_note(d, k, v) if metric == 'abs_peak_a' else ''}"
                    for k, s in stats.items()
                )
            )
            w, text = _lower(stats)
            if metric == "abs_peak_a" and any(_clip_note(d, k, v) for k in stats):
                w = ("?", False)  # a clipped peak is a lower bound: no ranking on peaks
                text = "<span class='warn'>not ranked: clipped peaks</span>"
            winners.append(w)
            row.append(text)
        if len(stats) < 2:
            verdict = "single meter: no comparison"
        elif winners[0][0] == "?":
            lower_q = winners[1][0]
            verdict = f"peaks clipped; lower charge: <b>{esc(lower_q)}</b>" if lower_q else "–"
            summary.setdefault(("?" + lower_q, winners[1][1]), []).append(f"{mode} ({load})")
        elif winners[0][0] and winners[0][0] == winners[1][0]:
            clear = winners[0][1] and winners[1][1]
            how = "clearly" if clear else "not clearly (CIs overlap)"
            verdict = f"<b>{esc(winners[0][0])}</b>, {how}"
            summary.setdefault((winners[0][0], clear), []).append(f"{mode} ({load})")
        else:
            verdict = "mixed: neither is lower on both"
            summary.setdefault(("", False), []).append(f"{mode} ({load})")
        row.append(verdict)
        rows.append(row)
    if not rows:
        return "<p>No mode was tested at a voltage common to all meters.</p>"
    said = []
    for (meter, clear), where in summary.items():
        modes = esc(", ".join(where))
        if meter.startswith("?"):
            said.append(
                f"peaks clipped in {modes} (widen the scope's current range to rank them), so "
                "only the charge ranks the meters there"
                + (f": <b>{esc(meter[1:])}</b> delivers less" if meter[1:] else "")
            )
        elif not meter:
            said.append(f"no meter is lower on both in {modes}")
        else:
            how = "clearly lower" if clear else "lower, within the uncertainty,"
            said.append(f"<b>{esc(meter)}</b> is {how} on both peak current and charge in {modes}")
    lead = f"<p class='lead'>In short: {'; '.join(said)}.</p>" if said else ""
    intro = (
        "<p>Per mode: each meter's median |peak current| and median charge at the highest "
        "charge voltage tested by every meter (shortest delay). The lower meter dumps less "
        "into the next circuit its probes touch. “Clear” means the 95 % confidence "
        "intervals of the medians do not overlap.</p>"
    )
    several = _several_captures(mz)
    if several:
        intro += (
            f"<p>|Peak current| from {esc(_capture_text(mz, peak_cap))} (the finest sample "
            f"interval); charge from {esc(_capture_text(mz, charge_cap))} (the longest "
            "record, which holds the slow tail that carries most of the charge).</p>"
        )
    tag = {k: f" · capture {esc(c)}" if several else "" for k, c in source.items()}
    return (
        lead
        + intro
        + _table(
            [
                "Mode",
                "Load",
                "At",
                f"Median |peak current|{tag['abs_peak_a']}",
                "Lower peak",
                f"Median charge{tag['charge_c']}",
                "Lower charge",
                "Lower on both",
            ],
            rows,
            "glance",
        )
    )


def _clip_note(d: pd.DataFrame, meter: str, volts: float) -> str:
    """A warning when clipped events enter a median peak (the scope range cut the peak)."""
    if "flag_clipped" not in d.columns:
        return ""
    sel = d[(d["meter"] == meter) & (d["volts"] == volts)]
    k = int(sel["flag_clipped"].fillna(False).astype(bool).sum())
    if not k:
        return ""
    return f"<br><span class='warn'>{k} of {len(sel)} clipped: the true peak is higher</span>"


def _lower(stats: dict[str, tuple[float, float, float, int]]) -> tuple[tuple[str, bool], str]:
    """((meter with the lowest median, CIs separate), HTML text with the ratio)."""
    if len(stats) < 2:
        return ("", False), "–"
    order = sorted(stats, key=lambda k: stats[k][0])
    best, second = order[0], order[1]
    b, s = stats[best], stats[second]
    ratio = s[0] / b[0] if b[0] > 0 else math.inf
    clear = all(np.isfinite([b[2], stats[k][1]]).all() and b[2] < stats[k][1] for k in order[1:])
    tag = "clear" if clear else "CIs overlap"
    return (best, clear), f"<b>{esc(best)}</b> ({ratio:.2f}× lower; {tag})"


def _limits_table(man: dict[str, Any]) -> str:
    """The limits of the run's sequence, as the analysis applied them."""
    lims = _dict(man.get("sequence")).get("limits") or []
    rows = []
    for lim in lims if isinstance(lims, list) else []:
        if not isinstance(lim, dict):
            continue
        metric = str(lim.get("metric", ""))
        rows.append(
            [
                esc(metric_label(metric)),
                esc(eng(lim.get("max"), metric_unit(metric))),
                esc(lim.get("statistic") or "utl"),
                esc(_plain(lim.get("modes")) or "all"),
                esc(", ".join(eng(v, "V") for v in lim.get("volts") or []) or "all"),
                esc(_plain(lim.get("loads")) or "all"),
                esc(_plain(lim.get("captures")) or "all"),
            ]
        )
    if not rows:
        return ""
    return "<h3>Limits of the sequence</h3>" + _table(
        ["Metric", "Limit", "Statistic checked", "Modes", "Voltages", "Loads", "Captures"], rows
    )


def _section_verdicts(g: pd.DataFrame) -> str:
    v = g[g["verdict"] != ""]
    if v.empty:
        return "<p>No limits were set: groups.csv carries no verdict.</p>"
    counts = v["verdict"].value_counts()
    summary = ", ".join(f"{n} {esc(k)}" for k, n in counts.items())
    parts = [f"<p class='lead'>{len(v)} group × metric checks against a limit: {summary}.</p>"]
    modes = list(dict.fromkeys(v["mode"]))
    rows = []
    for (meter, serial), d in v.groupby(["meter", "serial"], sort=False, dropna=False):
        cells = [esc(meter), esc(serial if serial == serial else "")]
        for mode in modes:
            dm = d[d["mode"] == mode]
            if dm.empty:
                cells.append("–")
                continue
            bad = dm[~dm["verdict"].str.lower().isin(["pass", "passed", "ok"])]
            if bad.empty:
                cells.append(_verdict_cell("pass") + f" <span class='n'>({len(dm)} checks)</span>")
            else:
                what = "; ".join(
                    f"{metric_label(r.metric)} at {eng(r.volts, 'V')}"
                    + (f", capture {r.capture}" if _several_captures(v) else "")
                    + (
                        f", delay {eng(r.delay_s, 's')}"
                        if r.delay_s == r.delay_s and r.delay_s
                        else ""
                    )
                    for r in bad.itertuples()
                )
                worst = (
                    "fail"
                    if (bad["verdict"].str.lower() == "fail").any()
                    else bad["verdict"].iloc[0]
                )
                cells.append(
                    _verdict_cell(worst)
                    + f" <span class='n'>({len(bad)} of {len(dm)} checks)</span>"
                    + f"<br><small>{esc(what)}</small>"
                )
        rows.append(cells)
    parts.append(_table(["Meter", "Serial"] + [esc(x) for x in modes], rows, "verdicts"))
    bad = v[~v["verdict"].str.lower().isin(["pass", "passed", "ok"])]
    if not bad.empty:
        brow = []
        for r in bad.itertuples():
            u = metric_unit(r.metric)
            brow.append(
                [
                    esc(r.meter),
                    esc(r.mode),
                    esc(r.capture) if _several_captures(v) else "",
                    esc(eng(r.volts, "V")),
                    esc(r.load),
                    esc(eng(r.delay_s, "s")),
                    esc(metric_label(r.metric)),
                    esc(eng(getattr(r, "utl", np.nan), u)),
                    esc(eng(getattr(r, "max", np.nan), u)),
                    esc(eng(getattr(r, "limit", np.nan), u)),
                    esc(
                        f"{100 * r.share_over_limit:.0f} %"
                        if getattr(r, "share_over_limit", None) == getattr(r, "share_over_limit", 0)
                        else "–"
                    ),
                    _verdict_cell(r.verdict),
                ]
            )
        parts.append(
            "<h3>Checks that did not pass</h3>"
            + _table(
                [
                    "Meter",
                    "Mode",
                    "Capture",
                    "Voltage",
                    "Load",
                    "Delay",
                    "Metric",
                    "Upper tolerance bound",
                    "Max",
                    "Limit",
                    "Events over limit",
                    "Verdict",
                ],
                brow,
            )
        )
    parts.append(
        "<p class='n'>A check passes when the statistic its limit names (the upper tolerance "
        "bound unless the sequence chose another) is at or below the limit; “insufficient” "
        "means too few captured events for a verdict.</p>"
    )
    return "".join(parts)


_CAUTION = (
    "<div class='caution'><p><b>High voltage can injure or kill.</b> The bench behind these "
    "numbers charges a meter's input to hazardous voltages, and a meter that has measured a "
    "high voltage can keep a dangerous charge on its input. These results describe the "
    "events that were measured; they do not make any meter, bench or procedure safe.</p>"
    "<p>Defer to your local electrical codes, your lab's safety rules and licensed practice. "
    "Treat every meter input, lead and capacitor as live until you have measured it "
    "discharged, and use instruments and leads rated for the voltages you work on.</p></div>"
)


def _img(fig: F.RenderedFigure, alt: str, caption: str) -> str:
    data = base64.b64encode(fig.png).decode("ascii")
    return (
        f"<figure><img alt='{esc(alt)}' src='data:image/png;base64,{data}'>"
        f"<figcaption>{caption} <span class='n'>(files: figures/{esc(fig.png_path.name)}, "
        f"figures/{esc(fig.svg_path.name)})</span></figcaption></figure>"
    )


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
    d = m[(m["mode"] == mode) & m["file"].notna()]
    if capture is not None:
        d = d[d["capture"] == capture]
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
        loaded = []
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
            got = _group_waveforms(run, **filt, **({"capture": capture} if capture else {}))
            if got is not None:
                loaded.append((meter, "", got))
            if other is not None:
                cap_b = {"capture": other_capture} if other_capture else {}
                got_b = _group_waveforms(other[0], **filt, **cap_b)
                if got_b is not None:
                    loaded.append((meter, " (baseline)", got_b))
        if not loaded:
            continue
        windows = [F.linear_window(t, v) for _, _, (t, v, _r) in loaded]
        window = (min(w[0] for w in windows), max(w[1] for w in windows))
        series = [
            F.Series(
                F.summarise_traces(t, v, window),
                f"{meter}{tag}",
                colours[meter],
                "--" if tag else "-",
            )
            for meter, tag, (t, v, _r) in loaded
        ]
        rows.append((f"{eng(volts, 'V')}, load {load}", series, window))
    return rows


def _section_waveforms(run: Path, m: pd.DataFrame, modes: list[str], colours, out: Path):
    parts = [
        "<p>Median current of each meter with the band holding 5 % to 95 % of the "
        "events at each instant. Left: linear time around the nanosecond peak. Right: "
        "logarithmic time and current, so the millisecond tail shows as well.</p>"
    ]
    captures = [str(c) for c in dict.fromkeys(m["capture"])]
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
            rows = _wave_rows(run, m, mode, colours, capture=capture)
            what = f"{mode} · capture {capture}" if several else mode
            if not rows:
                parts.append(f"{head}<p>{esc(what)}: no captured waveform.</p>")
                head = ""
                continue
            fig = F.fig_waveforms(rows, f"Discharge current · {what}")
            sfx = f"-{_slug(capture)}" if several else ""
            r = F.render(fig, f"waveforms-{_slug(mode)}{sfx}", out)
            caption = f"Discharge current in mode {esc(mode)}" + (
                f", {esc(_capture_text(m, capture))}." if several else "."
            )
            parts.append(head + _img(r, f"Discharge waveforms, {what}", caption))
            head = ""
    return "".join(parts)


def _section_flagged(run: Path, m: pd.DataFrame, colours: dict[str, str]) -> str:
    f = m[m["flagged"]]
    if f.empty:
        return "<p>No event was flagged.</p>"
    rows = []
    for i, r in enumerate(f.itertuples()):
        why = [FLAG_TEXT[c] for c in FLAG_TEXT if c in m.columns and bool(getattr(r, c) or False)]
        thumb = "<span class='n'>no waveform</span>"
        if isinstance(r.file, str) and i < MAX_THUMBNAILS:
            try:
                wf = load_waveform(run / r.file)
                thumb = F.sparkline_svg(
                    wf.time(), wf.values("current"), colours.get(r.meter, "#000")
                )
            except (OSError, ValueError) as exc:
                thumb = f"<span class='n'>unreadable: {esc(exc)}</span>"
        elif i >= MAX_THUMBNAILS:
            thumb = "<span class='n'>(thumbnail limit reached)</span>"
        rows.append(
            [
                esc(getattr(r, "event", "")),
                esc(r.meter),
                esc(r.mode),
                esc(r.capture) if _several_captures(m) else "",
                esc(eng(r.volts, "V")),
                esc(r.load),
                esc(eng(r.delay_s, "s")),
                esc(eng(r.abs_peak_a, "A")),
                esc(eng(r.charge_c, "C")),
                esc("; ".join(why)),
                thumb,
            ]
        )
    return (
        f"<p>{len(f)} of {len(m)} events carry a flag. Thumbnails: current after the "
        "trigger on a logarithmic time axis.</p>"
        + _table(
            [
                "Event",
                "Meter",
                "Mode",
                "Capture",
                "Voltage",
                "Load",
                "Delay",
                "|Peak|",
                "Charge",
                "Flags",
                "Current",
            ],
            rows,
            "flagged",
        )
    )


def _section_groups(g: pd.DataFrame) -> str:
    rows = []
    for r in g.itertuples():
        u = metric_unit(str(r.metric))

        def e(name: str, r=r, u=u) -> str:
            return esc(eng(getattr(r, name, np.nan), u))

        conf = getattr(r, "utl_confidence", np.nan)
        cov = getattr(r, "utl_coverage", np.nan)
        share = getattr(r, "share_over_limit", np.nan)
        rows.append(
            [
                esc(r.meter),
                esc(r.serial if r.serial == r.serial else ""),
                esc(r.mode),
                esc(r.capture),
                esc(eng(r.volts, "V")),
                esc(r.load),
                esc(eng(r.delay_s, "s")),
                esc(metric_label(str(r.metric))),
                f"{esc(getattr(r, 'n_captured', ''))} / {esc(getattr(r, 'n_planned', ''))}",
                e("mean"),
                e("std"),
                e("median"),
                f"{e('median_ci_low')} – {e('median_ci_high')}",
                e("p95"),
                e("p99"),
                e("max"),
                e("utl")
                + (
                    f" <span class='n'>({conf:.0%}/{cov:.0%})</span>"
                    if conf == conf and cov == cov
                    else ""
                ),
                e("limit"),
                esc(f"{share:.0%}" if share == share else "–"),
                _verdict_cell(str(r.verdict)),
            ]
        )
    return (
        "<p>Every group × metric of groups.csv. utl: one-sided normal upper tolerance bound "
        "(confidence / coverage in brackets).</p><div class='wide'>"
        + _table(
            [
                "Meter",
                "Serial",
                "Mode",
                "Capture",
                "Voltage",
                "Load",
                "Delay",
                "Metric",
                "n",
                "Mean",
                "Std",
                "Median",
                "Median 95 % CI",
                "p95",
                "p99",
                "Max",
                "utl",
                "Limit",
                "Over limit",
                "Verdict",
            ],
            rows,
            "groups",
        )
        + "</div>"
    )


# Known columns of compare-<id>.csv (rig.compare.COMPARE_COLUMNS) in the order shown, with
# their headings; any other column follows under its own name.
_COMPARE_SHOWN = {
    "meter": "Meter",
    "mode": "Mode",
    "capture": "Capture",
    "volts": "Voltage",
    "load": "Load",
    "delay_s": "Delay",
    "metric": "Metric",
    "verdict": "Verdict",
    "ratio": "Ratio run / baseline",
    "median_run": "Median run",
    "median_baseline": "Median baseline",
    "n_run": "n run",
    "n_baseline": "n baseline",
    "mw_p": "Rank test p",
    "tost_p": "TOST p",
    "tolerance": "Tolerance",
    "serials_run": "Serials run",
    "serials_baseline": "Serials baseline",
}
_COMPARE_HIDDEN = {"ratio_ci_low", "ratio_ci_high", "mw_u"}


def _compare_cell(col: str, r: pd.Series, unit: str) -> str:
    val = r[col]
    missing = val is None or (isinstance(val, float) and math.isnan(val))
    if col == "verdict":
        return _verdict_cell("" if missing else str(val))
    if missing:
        return "–"
    if col == "metric":
        return esc(metric_label(str(val)))
    if col == "volts":
        return esc(eng(val, "V"))
    if col == "delay_s":
        return esc(eng(val, "s"))
    if col in ("median_run", "median_baseline"):
        return esc(eng(val, unit))
    if col == "ratio":
        lo, hi = r.get("ratio_ci_low", np.nan), r.get("ratio_ci_high", np.nan)
        ci = f" ({lo:.3f} – {hi:.3f})" if np.isfinite([lo, hi]).all() else ""
        return esc(f"{val:.3f}{ci}")
    if col == "tolerance" and isinstance(val, float):
        return esc(f"±{100 * val:.0f} %")
    if isinstance(val, float):
        return esc(f"{val:.3g}")
    return esc(val)


def _compare_table(run: Path, base: Path, base_man: dict[str, Any]) -> str:
    """The equivalence verdicts: compare-<baseline-id>.csv if the run has it, else computed now
    with rig.compare.compare_runs (not written: the report only writes its own files)."""
    ids = [str(base_man.get("run_id") or base_man.get("id") or ""), base.name]
    path = next(
        (run / f"compare-{i}.csv" for i in ids if i and (run / f"compare-{i}.csv").exists()), None
    )
    c = pd.read_csv(path) if path is not None else compare_runs(run, base)
    if c.empty:
        return "<p>The comparison holds no group.</p>"
    cols = [k for k in _COMPARE_SHOWN if k in c.columns]
    cols += [k for k in c.columns if k not in _COMPARE_SHOWN and k not in _COMPARE_HIDDEN]
    rows = [
        [_compare_cell(k, r, metric_unit(str(r.get("metric", "")))) for k in cols]
        for _, r in c.iterrows()
    ]
    source = (
        path.name if path is not None else "rig.compare.compare_runs (computed for this report)"
    )
    counts = (
        ", ".join(f"{n} {esc(k)}" for k, n in c["verdict"].fillna("–").value_counts().items())
        if "verdict" in c.columns
        else ""
    )
    return (
        f"<p class='lead'>{len(c)} group × metric comparisons: {counts}.</p>"
        f"<p class='n'>From {esc(source)}. Ratio: median of this run over the baseline's, with "
        "its confidence interval. Equivalent: the two one-sided tests (TOST) place the ratio "
        "within the tolerance.</p><div class='wide'>"
        + _table([esc(_COMPARE_SHOWN.get(k, k)) for k in cols], rows, "groups")
        + "</div>"
    )


# --- assembly ----------------------------------------------------------------------------------

_CSS = """
:root{--ink:#1d1d1f;--mute:#5f6368;--rule:#d9d9de;--pass:#00704a;--fail:#b23b00;--bg:#fafafa}
body{font:15px/1.45 "DejaVu Sans",system-ui,sans-serif;color:var(--ink);margin:0;background:#fff}
main{max-width:1120px;margin:0 auto;padding:16px 24px 48px}
h1{font-size:1.6em;margin:.4em 0 .1em}h2{font-size:1.25em;margin:1.6em 0 .4em;
border-bottom:2px solid var(--ink);padding-bottom:3px}h3{font-size:1.05em;margin:1.1em 0 .3em}
table{border-collapse:collapse;margin:.5em 0 1em;font-size:.88em}
th,td{border-bottom:1px solid var(--rule);padding:4px 8px;text-align:left;vertical-align:top}
th{background:#f0f0f3;font-weight:600}
.wide{overflow-x:auto}table.groups td,table.flagged td,.nw{white-space:nowrap}.n{color:var(--mute);font-size:.9em}
.v{font-weight:700;padding:1px 6px;border-radius:3px;white-space:nowrap}
.v.pass{color:var(--pass);background:#e3f4ec}.v.fail{color:#fff;background:var(--fail)}
.v.other{color:var(--mute);background:#eee}.warn{color:var(--fail);font-size:.88em}
.caution{border-left:6px solid var(--fail);background:#fff5ef;padding:4px 14px}
dl.kv{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:.4em 0}
dl.kv dt{font-weight:600}dl.kv dd{margin:0}
figure{margin:.6em 0 1.4em}figure img{max-width:100%;height:auto;border:1px solid var(--rule)}
figcaption{font-size:.88em;color:var(--mute)}.lead{font-size:1.05em}
nav{font-size:.9em;color:var(--mute)}nav a{color:inherit}
svg.spark{display:block;background:var(--bg)}
"""


def _load_title(load: object, several: bool) -> tuple[str, str]:
    """(heading HTML, figure-name suffix) of one load when the run has several."""
    return (f"<h3>Load {esc(load)}</h3>", f"-{_slug(str(load))}") if several else ("", "")


def _section_peaks(m, g, load, several, modes, colours, rng, out) -> str:
    head, sfx = _load_title(load, several)
    ml = _at_zero_delay(m)
    ml = ml[ml["load"] == load]
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


def _section_trends(m, g, load, several, modes, colours, rng, out) -> str:
    head, sfx = _load_title(load, several)
    gl = _at_zero_delay(g[g["load"].astype(str) == str(load)])
    metrics = [(_peak_metric(g), "|Peak current|", "A"), ("charge_c", "Charge", "C")]
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
    ml = ml[ml["load"] == load]
    vmax = ml.groupby(["meter", "mode"])["volts"].transform("max")
    fig = F.fig_iec_charge(ml[ml["volts"] == vmax], colours, rng, IEC61010_CHARGE_C)
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
    rows = [
        [
            esc(r.meter),
            esc(r.mode),
            esc(eng(r.volts, "V")),
            esc(r.load),
            esc(f"{eng(r.tau_s, 's')} ({eng(r.tau_ci_low, 's')} – {eng(r.tau_ci_high, 's')})"),
            esc(eng(r.safe_charge_c, "C")),
            esc(eng(r.delay_to_safe_s, "s")),
            esc(r.n_delays),
        ]
        for r in sd.itertuples()
    ]
    header = ["Meter", "Mode", "Voltage", "Load", "τ (95 % CI)", "Safe charge", "Delay to safe"]
    return _img(
        F.render(fig, "selfdischarge", out),
        "Self-discharge",
        "Charge delivered after each delay, with the fitted exponential (τ from "
        "selfdischarge.csv).",
    ) + _table(header + ["Delays"], rows)


def write_report(
    run_dir: str | Path,
    baseline_dir: str | Path | None = None,
    rng: np.random.Generator | None = None,
) -> Path:
    """Write ``<run_dir>/report.html`` and ``<run_dir>/figures/*.png|svg``; returns the HTML path.

    ``baseline_dir`` adds overlays against that run and its equivalence verdicts.
    ``rng`` only places the jitter of strip plots (seeded by default, so reports are stable).
    Raises RunFolderError when the run has no manifest or has not been analysed.
    """
    t_start = time.perf_counter()
    run = Path(run_dir)
    rng = rng if rng is not None else np.random.default_rng(0)
    man = read_manifest(run)
    m = _load_metrics(run)
    g = _load_groups(run)
    out = run / FIGURES
    meters = list(dict.fromkeys(m["meter"]))
    colours = F.colour_map(meters)
    modes = list(dict.fromkeys(m["mode"]))
    body: dict[str, str] = {}
    body["tested"] = _section_tested(run, man, m)
    body["glance"] = _section_glance(m, g)
    body["verdicts"] = _section_verdicts(g) + _limits_table(man)
    body["caution"] = _CAUTION
    body["waveforms"] = _section_waveforms(run, m, modes, colours, out)
    log.info("report %s: waveforms done after %.1f s", run.name, time.perf_counter() - t_start)

    # Peaks (and pulses) from the capture with the finest sample interval, charges from the
    # one with the longest record (decided from dt_s and record_s, see _capture_roles).
    peak_cap, charge_cap = _capture_roles(m)
    mp, mq = m[m["capture"] == peak_cap], m[m["capture"] == charge_cap]
    g_trend = pd.concat(
        [
            g[(g["capture"] == peak_cap) & (g["metric"] != "charge_c")],
            g[(g["capture"] == charge_cap) & (g["metric"] == "charge_c")],
        ]
    )
    frames = {"peaks": (mp, g), "trends": (m, g_trend), "iec-charge": (mq, g)}
    loads = list(m["load"].value_counts().index)  # most events first
    for key, fn in (
        ("peaks", _section_peaks),
        ("trends", _section_trends),
        ("iec-charge", _section_iec),
    ):
        fm, fg = frames[key]
        body[key] = "".join(
            fn(fm, fg, ld, len(loads) > 1, modes, colours, rng, out) for ld in loads
        )
    body["iec-charge"] = _IEC_NOTE + body["iec-charge"]
    if _several_captures(m):
        p_text, q_text = esc(_capture_text(m, peak_cap)), esc(_capture_text(m, charge_cap))
        body["peaks"] = (
            f"<p class='n'>From {p_text} (the finest sample interval).</p>" + (body["peaks"])
        )
        body["trends"] = (
            f"<p class='n'>|Peak current| from {p_text}; charge from {q_text}.</p>" + body["trends"]
        )
        body["iec-charge"] = (
            f"<p class='n'>From {q_text} (the longest record: the tail holds most of the "
            "charge).</p>" + body["iec-charge"]
        )
    body["bounce"] = _section_bounce(mp, modes, colours, out)
    body["selfdischarge"] = _section_selfdischarge(run, mq, colours, out, charge_cap)
    body["flagged"] = _section_flagged(run, m, colours)
    body["groups"] = _section_groups(g)
    if baseline_dir is not None:
        body["baseline"] = _section_baseline(run, m, Path(baseline_dir), modes, colours, out)

    title = f"Discharge test report · {man.get('run_id') or run.name}"
    nav = " · ".join(f"<a href='#{sid}'>{esc(h)}</a>" for sid, h in SECTIONS if sid in body)
    sections = "".join(
        f"<section id='{sid}'><h2>{esc(h)}</h2>{body[sid]}</section>"
        for sid, h in SECTIONS
        if sid in body
    )
    stamp = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    doc = (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>"
        "<meta http-equiv='Content-Security-Policy' content=\"default-src 'none'; "
        "img-src data:; style-src 'unsafe-inline'\">"
        f"<title>{esc(title)}</title><style>{_CSS}</style></head><body><main>"
        f"<h1>{esc(title)}</h1><nav>{nav}</nav>{sections}"
        f"<footer class='n'><p>Written by discharge-rig {esc(__version__)} on {stamp}.</p>"
        "</footer>"
        "</main></body></html>"
    )
    path = run / REPORT
    path.write_text(doc, encoding="utf-8")
    log.info("report %s written in %.1f s", path, time.perf_counter() - t_start)
    return path


def _section_baseline(
    run: Path, m: pd.DataFrame, base: Path, modes: list[str], colours, out
) -> str:
    base_man = read_manifest(base)
    bm = _load_metrics(base)
    parts = [
        f"<p>Baseline run: <b>{esc(base_man.get('run_id') or base.name)}</b>"
        f" ({esc(base_man.get('started') or '')}). Solid: this run; dashed: the "
        "baseline.</p>"
    ]
    # captures are paired by role (finest sample interval, longest record), not by name
    pairs = dict(zip(_capture_roles(m), _capture_roles(bm), strict=True))
    for mode in modes:
        for capture, base_capture in pairs.items():
            rows = _wave_rows(
                run, m, mode, colours, other=(base, bm), capture=capture, other_capture=base_capture
            )
            if not rows:
                continue
            what = f"{mode} · capture {capture}" if len(pairs) > 1 else mode
            fig = F.fig_waveforms(rows, f"This run against the baseline · {what}")
            sfx = f"-{_slug(capture)}" if len(pairs) > 1 else ""
            r = F.render(fig, f"baseline-{_slug(mode)}{sfx}", out)
            parts.append(
                _img(
                    r,
                    f"Baseline overlay, {what}",
                    f"Mode {esc(mode)}, capture {esc(capture)}: this run (solid) and the "
                    f"baseline's capture {esc(base_capture)} (dashed).",
                )
            )
    parts.append("<h3>Equivalence</h3>" + _compare_table(run, base, base_man))
    return "".join(parts)
