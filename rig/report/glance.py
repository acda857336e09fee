"""The report's judgements: "At a glance" (which meter is lower) and the verdicts against limits.

"At a glance" compares, per mode and load, each meter's median |peak| and charge at the
highest voltage every meter was tested at, ranking only when the 95 % confidence intervals
of the medians separate, and never on clipped peaks. The verdicts summarise groups.csv's
``verdict`` column per meter and mode, list the checks that did not pass, and show the
sequence's limits as the analysis applied them.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.stats import capture_roles
from rig.report.captures import MIN_RISE_SAMPLES, measures
from rig.report.data import (
    _at_zero_delay,
    _capture_text,
    _peak_metric,
    _several_captures,
)
from rig.report.html import GROUP_HEADERS, _dict, _plain, _table, _verdict_cell, esc, group_cells
from rigbase.units import eng, metric_label, metric_unit


def _section_glance(m: pd.DataFrame, g: pd.DataFrame) -> str:
    """Per mode, load and charge voltage: each meter's medians, which is lower, and the
    verdicts of the checks at that voltage; led by a sentence a buyer can act on."""
    mz = _at_zero_delay(m[m["file"].notna()])
    gz = _at_zero_delay(g)
    meters = list(dict.fromkeys(mz["meter"]))
    peak_metric = _peak_metric(g)
    # |peak| from the finest capture, charge from the longest (see capture_roles), and the
    # peak only from a capture that resolves the pulse (rig.report.captures)
    peak_cap, charge_cap = capture_roles(mz)
    peak_ok = "fast" in measures(mz).get(peak_cap, {"fast"})
    source = {"abs_peak_a": peak_cap, "charge_c": charge_cap}
    rows = []
    winners_all: list[list[tuple[str, bool]]] = []
    summary: dict[tuple[str, bool], list[str]] = {}
    for (mode, load), d_all in mz.groupby(["mode", "load"], sort=False):
        d = d_all[d_all["capture"] == peak_cap]  # the peak's events (clip notes)
        per = d_all.groupby("meter")["volts"].apply(set)
        common = set.intersection(*per.tolist()) if len(per) else set()
        for v in sorted(common):
            row, winners, n_stats = _glance_row(
                d_all, d, gz, meters, mode, load, v, source, peak_metric, peak_ok
            )
            winners_all.append(winners)
            if n_stats < 2:
                verdict = "single meter: no comparison"
            elif winners[0][0] == "?":
                lower_q = winners[1][0]
                verdict = f"peaks clipped; lower charge: <b>{esc(lower_q)}</b>" if lower_q else "–"
                summary.setdefault(("?" + lower_q, winners[1][1]), []).append(
                    f"{mode} ({load}, {eng(v, 'V')})"
                )
            elif winners[0][0] and winners[0][0] == winners[1][0]:
                clear = winners[0][1] and winners[1][1]
                how = "clearly" if clear else "not clearly (CIs overlap)"
                verdict = f"<b>{esc(winners[0][0])}</b>, {how}"
                summary.setdefault((winners[0][0], clear), []).append(
                    f"{mode} ({load}, {eng(v, 'V')})"
                )
            else:
                verdict = "neither"
                summary.setdefault(("", False), []).append(f"{mode} ({load}, {eng(v, 'V')})")
            row.append(verdict)
            row.append(_verdict_list(gz, meters, mode, load, v))
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
    lower = {
        "peak": {w[0][0] for w in winners_all},
        "charge": {w[1][0] for w in winners_all},
    }
    if (
        winners_all
        and len(summary) == 1
        and ("", False) in summary
        and all(len(v) == 1 and not ({"", "?"} & v) for v in lower.values())
    ):
        (p_w,), (q_w,) = lower["peak"], lower["charge"]
        said = [
            f"<b>{esc(p_w)}</b> has the lower peak current and <b>{esc(q_w)}</b> the lower "
            "charge in every mode and at every voltage: neither is lower on both"
        ]
    buyer = _buyer_sentence(gz, meters)
    lead = f"<div class='buyer'><p class='lead'>{buyer}</p></div>" if buyer else ""
    lead += f"<p>In short: {'; '.join(said)}.</p>" if said else ""
    intro = (
        "<p>Per mode and charge voltage: each meter's median |peak current| and median charge "
        "(shortest delay), which is lower, and the verdicts of the sequence's limits at that "
        "voltage. The lower meter dumps less into the next circuit its probes touch. “Clear” "
        "means the 95 % confidence intervals of the medians do not overlap.</p>"
    )
    several = _several_captures(mz)
    if several:
        intro += (
            f"<p>|Peak current| from {esc(_capture_text(mz, peak_cap))} (the finest sample "
            f"interval); charge from {esc(_capture_text(mz, charge_cap))} (the longest "
            "record, which holds the slow tail that carries most of the charge).</p>"
        )
    if not peak_ok:
        intro += (
            f"<p class='n'>No peak current: {esc(_capture_text(mz, peak_cap))} does not "
            "resolve the pulse (its 10-90 % rise spans fewer than "
            f"{MIN_RISE_SAMPLES:g} samples); add a fast capture to measure it.</p>"
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
                "Verdicts at this voltage",
            ],
            rows,
            "glance",
        )
    )


def _glance_row(d_all, d, gz, meters, mode, load, v, source, peak_metric, peak_ok):
    """(cells up to "Lower charge", winners per metric, meters with numbers) of one row."""
    row = [esc(mode), esc(load), f"<span class='nw'>{esc(eng(v, 'V'))}</span>"]
    winners = []
    n_stats = 0
    for metric, unit in (("abs_peak_a", "A"), ("charge_c", "C")):
        if metric == "abs_peak_a" and not peak_ok:
            row += ["<span class='n'>not resolved</span>", "–"]
            winners.append(("", False))
            continue
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
            lo = float(sel["median_ci_low"].iloc[0]) if len(sel) else np.nan
            hi = float(sel["median_ci_high"].iloc[0]) if len(sel) else np.nan
            stats[meter] = (float(x.median()), lo, hi, x.size)
        n_stats = max(n_stats, len(stats))
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
    return row, winners, n_stats


def _checks(gz: pd.DataFrame, meter: str, v: float | None = None, upto: bool = False):
    """The group x metric checks (rows with a verdict) of one meter, at one voltage or up to it."""
    sel = gz[(gz["meter"] == meter) & (gz["verdict"] != "")]
    if v is not None:
        sel = sel[sel["volts"] <= v] if upto else sel[sel["volts"] == v]
    return sel


def _failed(sel: pd.DataFrame) -> pd.DataFrame:
    return sel[~sel["verdict"].str.lower().isin(["pass", "passed", "ok"])]


def _verdict_list(gz: pd.DataFrame, meters: list[str], mode: str, load: str, v: float) -> str:
    """Per meter: pass, or the worst verdict with the metrics that did not pass."""
    out = []
    for meter in meters:
        sel = _checks(gz, meter, v)
        sel = sel[(sel["mode"] == mode) & (sel["load"] == load)]
        if sel.empty:
            continue
        bad = _failed(sel)
        if bad.empty:
            out.append(f"{esc(meter)}: {_verdict_cell('pass')}")
            continue
        worst = "fail" if (bad["verdict"].str.lower() == "fail").any() else bad["verdict"].iloc[0]
        what = ", ".join(dict.fromkeys(metric_label(x) for x in bad["metric"].astype(str)))
        out.append(f"{esc(meter)}: {_verdict_cell(worst)} <span class='n'>{esc(what)}</span>")
    return "<br>".join(out) or "<span class='n'>no limits</span>"


def _buyer_sentence(gz: pd.DataFrame, meters: list[str]) -> str:
    """One sentence per decision: up to which charge voltage each meter passes every check."""
    if gz.empty or not (gz["verdict"] != "").any():
        return ""
    volts = sorted(gz.loc[gz["verdict"] != "", "volts"].dropna().unique())
    parts = []
    for v in volts:
        ok = [
            k
            for k in meters
            if len(_checks(gz, k, v, True)) and _failed(_checks(gz, k, v, True)).empty
        ]
        fails = {
            k: _failed(_checks(gz, k, v)) for k in meters if k not in ok and len(_checks(gz, k, v))
        }
        why = "; ".join(
            f"{esc(k)} fails "
            + esc(
                ", ".join(
                    dict.fromkeys(f"{metric_label(r.metric)} in {r.mode}" for r in f.itertuples())
                )
            )
            for k, f in fails.items()
            if not f.empty
        )
        v_text = esc(eng(v, "V"))
        if ok and not fails:
            who = " and ".join(f"<b>{esc(k)}</b>" for k in ok)
            parts.append(f"Up to {v_text}, {who} pass{'es' if len(ok) == 1 else ''} every check")
        elif ok:
            who = " and ".join(f"<b>{esc(k)}</b>" for k in ok)
            parts.append(
                f"For work up to {v_text}, choose {who}: "
                f"{'it passes' if len(ok) == 1 else 'they pass'} every check in every mode "
                f"tested ({why})"
            )
        else:
            parts.append(f"At {v_text}, no meter passes every check ({why})")
    return ". ".join(parts) + ". <span class='n'>(Checks: the sequence's limits, see below.)</span>"


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
                    *group_cells(r, _several_captures(v)),
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
                    *GROUP_HEADERS,
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
