"""The report's tabular sections: what was tested, flagged events, the group table, equivalence.

"What was tested" reads the manifest (run, sequence, bench, instruments' ``*IDN?`` answers)
and the events; flagged events carry a thumbnail of their current as inline SVG; the group
table shows every row of groups.csv; the equivalence table shows compare-<baseline-id>.csv,
or computes it with rig.analysis.compare when the run has none (without writing it).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.compare import (
    compare_options,
    compare_runs,
    comparison_inputs,
    comparison_path,
)
from rig.analysis.provenance import mismatch
from rig.report import figures as F
from rig.report.captures import shown_groups
from rig.report.data import FLAG_TEXT, _capture_text, _several_captures
from rig.report.html import (
    GROUP_HEADERS,
    _dict,
    _kv,
    _plain,
    _short,
    _table,
    _verdict_cell,
    esc,
    group_cells,
)
from rig.store.waveform import load_waveform
from rigbase.units import eng, metric_label, metric_unit


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
        parts.append("<h3>Bench</h3>" + _kv(_with_units(shown)))
    # captures are listed above with their sample interval and span
    skip = {"name", "path", "meters", "operator_note", "volts", "loads", "limits"}
    skip |= {"captures", "scope_captures", "scope_grid"} if "capture" in m.columns else set()
    settings = [(k, v) for k, v in seq.items() if k not in skip]
    if "capture" in m.columns and m["capture"].nunique() > 1:
        # the captures' own timebases replace these (listed above under "Scope captures")
        per_capture = {"sample_interval_s", "points", "trigger_offset_s", "bandwidth_hz"}
        settings = [
            (k, {a: b for a, b in v.items() if a not in per_capture} if k == "scope" else v)
            for k, v in settings
            if not (k == "scope" and not isinstance(v, dict))
        ]
    if settings:
        parts.append("<h3>Sequence settings</h3>" + _kv(_with_units(settings)))
    return "".join(parts)


_SUFFIX_UNITS = (
    ("_volts", "V"),
    ("_amps", "A"),
    ("_ohms", "Ω"),
    ("_hz", "Hz"),
    ("_farads", "F"),
    ("_henry", "H"),
    ("_s", "s"),
    ("_c", "C"),
    ("_f", "F"),
)


def _unit_of(key: str) -> str:
    """The unit a key's name carries (``stored_charge_limit_c`` -> C), or ""."""
    return next((u for sfx, u in _SUFFIX_UNITS if key.endswith(sfx) or key == sfx[1:]), "")


def _with_units(items: list[tuple[str, Any]]) -> list[tuple[str, Any]]:
    """Numbers whose key names a unit as engineering text (4.5e-05 under ``..._c`` -> 45 µC),
    also one level down in tables (``sense.ohms``)."""

    def one(key: str, v: Any) -> Any:
        if isinstance(v, bool) or not isinstance(v, int | float):
            return v
        unit = _unit_of(key)
        return eng(v, unit) if unit else v

    out = []
    for k, v in items:
        if isinstance(v, dict):
            v = {kk: one(str(kk), vv) for kk, vv in v.items()}
        out.append((k, one(k.split(".")[-1], v)))
    return out


MAX_THUMBNAILS = 60


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
                wf = load_waveform(run / r.file, channels=("current",))
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
                *group_cells(r, _several_captures(m)),
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
                *GROUP_HEADERS,
                "|Peak|",
                "Charge",
                "Flags",
                "Current",
            ],
            rows,
            "flagged",
        )
    )


def _section_groups(g: pd.DataFrame, m: pd.DataFrame | None = None) -> str:
    """groups.csv as a table, without the rows its capture cannot measure (see
    rig.report.captures) and without repeating the peak as signed and absolute."""
    note = ""
    if m is not None:
        g, note = shown_groups(g, m)
    one_delay = g["delay_s"].nunique(dropna=False) <= 1
    one_capture = g["capture"].nunique(dropna=False) <= 1
    rows = []
    for r in g.itertuples():
        u = metric_unit(str(r.metric))

        def e(name: str, r=r, u=u) -> str:
            return esc(eng(getattr(r, name, np.nan), u))

        conf = getattr(r, "utl_confidence", np.nan)
        cov = getattr(r, "utl_coverage", np.nan)
        share = getattr(r, "share_over_limit", np.nan)
        serial = r.serial if r.serial == r.serial else ""
        rows.append(
            [
                esc(r.meter) + (f"<br><span class='n'>{esc(serial)}</span>" if serial else ""),
                esc(r.mode),
                "" if one_capture else esc(r.capture),
                esc(eng(r.volts, "V")),
                esc(r.load),
                "" if one_delay else esc(eng(r.delay_s, "s")),
                esc(metric_label(str(r.metric))),
                f"{esc(getattr(r, 'n_captured', ''))} / {esc(getattr(r, 'n_planned', ''))}",
                f"{e('mean')}<br><span class='n'>± {e('std')}</span>",
                f"{e('median')}<br><span class='n'>{e('median_ci_low')} – "
                f"{e('median_ci_high')}</span>",
                f"{e('p95')}<br><span class='n'>{e('p99')}</span>",
                e("max"),
                e("utl")
                + (
                    f"<br><span class='n'>({conf:.0%}/{cov:.0%})</span>"
                    if conf == conf and cov == cov
                    else ""
                ),
                e("limit"),
                esc(f"{share:.0%}" if share == share else "–"),
                _verdict_cell(str(r.verdict)),
            ]
        )
    return (
        "<p>Every group × metric of groups.csv that its capture can measure. Mean ± standard "
        "deviation; median with its 95 % confidence interval below; p95 with p99 below; utl: "
        "one-sided normal upper tolerance bound (confidence / coverage below).</p>"
        + (f"<p class='n'>{esc(note)}</p>" if note else "")
        + "<div class='wide'>"
        + _table(
            [
                *GROUP_HEADERS,
                "Metric",
                "n",
                "Mean",
                "Median",
                "p95 / p99",
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


# Known columns of compare-<id>.csv (rig.analysis.compare.COMPARE_COLUMNS) in the order shown, with
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


def _compare_kwargs(opts: dict[str, Any]) -> dict[str, Any]:
    """compare_options() back as keyword arguments of compare_runs."""
    return {**opts, "metrics": tuple(opts["metrics"])}


def _compare_table(run: Path, base: Path, base_man: dict[str, Any]) -> str:
    """The equivalence verdicts: compare-<baseline-id>.csv if the run has it, else computed now
    with rig.analysis.compare.compare_runs (not written: the report only writes its own files)."""
    opts = compare_options()
    path = comparison_path(run, base)
    want = {**opts, "baseline": str(base.resolve())}
    why = mismatch(path, want, comparison_inputs(run, base))
    c = pd.read_csv(path) if why is None else compare_runs(run, base, **_compare_kwargs(opts))
    recomputed = (
        ""
        if why is None or not path.exists()
        else f"<p class='warn'>Not taken from disk: {esc(why)}; this report recomputed the "
        "comparison with the default options (peak current and charge, ±10 %).</p>"
    )
    if c.empty:
        return "<p>The comparison holds no group.</p>"
    cols = [k for k in _COMPARE_SHOWN if k in c.columns]
    cols += [k for k in c.columns if k not in _COMPARE_SHOWN and k not in _COMPARE_HIDDEN]
    rows = [
        [_compare_cell(k, r, metric_unit(str(r.get("metric", "")))) for k in cols]
        for _, r in c.iterrows()
    ]
    source = (
        path.name if why is None else "rig.analysis.compare.compare_runs (computed for this report)"
    )
    counts = (
        ", ".join(f"{n} {esc(k)}" for k, n in c["verdict"].fillna("–").value_counts().items())
        if "verdict" in c.columns
        else ""
    )
    return (
        recomputed + f"<p class='lead'>{len(c)} group × metric comparisons: {counts}.</p>"
        f"<p class='n'>From {esc(source)}. Ratio: median of this run over the baseline's, with "
        "its confidence interval. Equivalent: the two one-sided t tests (TOST) on the log "
        "values place the ratio of the geometric means within 1/(1 + tolerance) .. "
        "1 + tolerance (symmetric on the log scale).</p><div class='wide'>"
        + _table([esc(_COMPARE_SHOWN.get(k, k)) for k in cols], rows, "groups")
        + "</div>"
    )
