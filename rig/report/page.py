"""The self-contained HTML report of an analysed run: the page and its assembly.

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

Module layout: rig.report.data loads and shapes the run folder's tables; rig.report.html holds
escaping, tables and the CSS; rig.report.glance builds "At a glance" and the verdicts;
rig.report.tables the tabular sections; rig.report.plots the figure sections (drawn by
rig.report.figures). This module orders the sections and writes the page. Every figure is a
job of a rigbase.workers pool (forked processes, one per core), drawn while the tables are
made; the page is the same with or without workers.
"""

from __future__ import annotations

import logging
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from rig import __version__
from rig.analysis.provenance import record_options
from rig.analysis.stats import capture_roles
from rig.report import figures as F

# FLAG_TEXT lives with the loading, which derives the ``flagged`` column from it; both it and
# _GROUP_KEYS (the group keys of rig.analysis.stats) stay importable from here.
from rig.report.calibration import section_calibration
from rig.report.captures import MIN_RISE_SAMPLES, measures
from rig.report.data import (
    _GROUP_KEYS,  # noqa: F401
    FLAG_TEXT,
    RunTables,
    _capture_text,
    _load_metrics,
    _peak_metric,
    _several_captures,
    _where,
    read_run_tables,
)
from rig.report.glance import _limits_table, _section_glance, _section_verdicts
from rig.report.html import _CSS, esc
from rig.report.plots import (
    _IEC_NOTE,
    _section_baseline,
    _section_bounce,
    _section_iec,
    _section_peaks,
    _section_selfdischarge,
    _section_trends,
    _section_waveforms,
)
from rig.report.predicted import section_predicted
from rig.report.tables import _section_flagged, _section_groups, _section_tested
from rig.store.atomic import atomic_write_text
from rigbase.workers import WorkerPool, joined

__all__ = ["FLAG_TEXT", "SECTIONS", "write_report"]

log = logging.getLogger(__name__)

REPORT = "report.html"
FIGURES = "figures"

# (id, heading) in the order the report shows them; the baseline section only with a baseline.
SECTIONS = (
    ("tested", "What was tested"),
    ("glance", "At a glance"),
    ("verdicts", "Verdicts against the limits"),
    ("caution", "High-voltage caution"),
    ("calibration", "Calibration and sign-off"),
    ("waveforms", "Discharge waveforms"),
    ("peaks", "Peak current per event"),
    ("trends", "Peak current and charge against charge voltage"),
    ("iec-charge", "Charge against the IEC 61010-1 45 µC figure"),
    ("bounce", "Contact bounce"),
    ("selfdischarge", "Self-discharge"),
    ("predicted", "Predicted discharge into other loads"),
    ("flagged", "Flagged events"),
    ("groups", "Group table"),
    ("baseline", "Comparison with the baseline run"),
)
_CAUTION = (
    "<div class='caution'><p><b>High voltage can injure or kill.</b> The bench behind these "
    "numbers charges a meter's input to hazardous voltages, and a meter that has measured a "
    "high voltage can keep a dangerous charge on its input. These results describe the "
    "events that were measured; they do not make any meter, bench or procedure safe.</p>"
    "<p>Defer to your local electrical codes, your lab's safety rules and licensed practice. "
    "Treat every meter input, lead and capacitor as live until you have measured it "
    "discharged, and use instruments and leads rated for the voltages you work on.</p></div>"
)


def _record_report(run: Path, path: Path, baseline_dir: str | Path | None) -> None:
    """The report's options record: the baseline and the files it was made from."""
    inputs: dict[str, str | Path] = {
        n: run / n for n in ("metrics.parquet", "groups.csv", "selfdischarge.csv")
    }
    opts: dict[str, object] = {"baseline": None}
    if baseline_dir is not None:
        from rig.analysis.compare import compare_options, comparison_path

        opts = {"baseline": str(Path(baseline_dir).resolve()), "compare": compare_options()}
        inputs["compare"] = comparison_path(run, baseline_dir)
    record_options(path, "report", opts, inputs)


def _trend_charge_only(m, g, loads, modes, colours, rng, out) -> str:
    """The trends section with the charge only (the peak of an unresolved pulse is left out)."""
    g = g[g["metric"].astype(str) != _peak_metric(g)]
    g = g[g["metric"].astype(str) != "peak_a"]
    return "".join(
        _section_trends(m, g, ld, len(loads) > 1, modes, colours, rng, out, peak=False)
        for ld in loads
    )


def _per_load(fn, m, g, loads, modes, colours, rng, out) -> str:
    """One section's figures, one per load (most events first)."""
    return "".join(fn(m, g, ld, len(loads) > 1, modes, colours, rng, out) for ld in loads)


def _jittered(
    m, peak_cap, charge_cap, g, loads, modes, colours, rng, out, peaks
) -> tuple[str, str]:
    """(|peak| per event, charge against 45 µC) HTML: the two figures whose points ``rng``
    jitters, drawn in one job and in this order so the points sit where a drawing of the
    sections one after the other puts them. The peaks are the events of ``peak_cap``, the
    charges those of ``charge_cap``."""
    p = ""
    if peaks:
        mp = _where(m, m["capture"] == peak_cap)
        p = _per_load(_section_peaks, mp, g, loads, modes, colours, rng, out)
    mq = _where(m, m["capture"] == charge_cap)
    return p, _per_load(_section_iec, mq, g, loads, modes, colours, rng, out)


def _bounce(m, peak_cap, modes, colours, out) -> str:
    """The contact-bounce section from the events of ``peak_cap``."""
    return _section_bounce(_where(m, m["capture"] == peak_cap), modes, colours, out)


def _selfdischarge(run, m, colours, out, charge_cap) -> str:
    """The self-discharge section from the events of ``charge_cap``."""
    mq = _where(m, m["capture"] == charge_cap)
    return _section_selfdischarge(run, mq, colours, out, charge_cap)


def _sections(
    run: Path,
    man: dict,
    m: pd.DataFrame,
    g: pd.DataFrame,
    baseline_dir: str | Path | None,
    rng: np.random.Generator,
    pool: WorkerPool,
) -> dict[str, str]:
    """The HTML of every section by id (the page orders them as :data:`SECTIONS`). Every
    figure is a job of ``pool``, the slowest (the waveforms, which read every record) first;
    the tables are made here meanwhile. The jobs are given the run's table as a share of
    ``pool`` (inherited by the workers, not pickled to each, when shared before they fork)."""
    out = run / FIGURES
    ms = pool.share(m)
    # the baseline's table is read before the first job forks the workers, so they inherit it
    base = Path(baseline_dir) if baseline_dir is not None else None
    bms = pool.share(_load_metrics(base)) if base is not None else None
    meters = list(dict.fromkeys(m["meter"]))
    colours = F.colour_map(meters)
    modes = list(dict.fromkeys(m["mode"]))
    waves = _section_waveforms(run, ms, modes, colours, out, pool)
    overlays = None
    if base is not None and bms is not None:
        overlays = _section_baseline(run, ms, base, bms, modes, colours, out, pool)

    # Peaks (and pulses) from the capture with the finest sample interval, charges from the
    # one with the longest record (decided from dt_s and record_s, see capture_roles); the
    # jobs select their capture's events themselves, in their worker.
    peak_cap, charge_cap = capture_roles(m)
    g_trend = pd.concat(
        [
            g[(g["capture"] == peak_cap) & (g["metric"] != "charge_c")],
            g[(g["capture"] == charge_cap) & (g["metric"] == "charge_c")],
        ]
    )
    loads = list(m["load"].value_counts().index)  # most events first
    fast_ok = "fast" in measures(m).get(peak_cap, {"fast"})
    trends = (
        pool.submit(_per_load, _section_trends, ms, g_trend, loads, modes, colours, rng, out)
        if fast_ok  # else the charge only: no capture resolves the pulse
        else pool.submit(_trend_charge_only, ms, g_trend, loads, modes, colours, rng, out)
    )
    jittered = pool.submit(
        _jittered, ms, peak_cap, charge_cap, g, loads, modes, colours, rng, out, fast_ok
    )
    bounce = pool.submit(_bounce, ms, peak_cap, modes, colours, out) if fast_ok else None
    selfdischarge = pool.submit(_selfdischarge, run, ms, colours, out, charge_cap)

    body: dict[str, str] = {}
    body["tested"] = _section_tested(run, man, m)
    body["glance"] = _section_glance(m, g)
    body["verdicts"] = _section_verdicts(g) + _limits_table(man)
    body["caution"] = _CAUTION
    body["calibration"] = section_calibration(man)
    body["predicted"] = section_predicted(run, man)
    body["flagged"] = _section_flagged(run, m, colours)
    body["groups"] = _section_groups(g, m)

    body["peaks"], body["iec-charge"] = jittered.result()
    body["trends"] = trends.result()
    body["iec-charge"] = _IEC_NOTE + body["iec-charge"]
    if _several_captures(m) and fast_ok:
        p_text = esc(_capture_text(m, peak_cap))
        body["peaks"] = (
            f"<p class='n'>From {p_text} (the finest sample interval).</p>" + (body["peaks"])
        )
        body["trends"] = (
            f"<p class='n'>|Peak current| from {p_text}; charge from "
            f"{esc(_capture_text(m, charge_cap))}.</p>" + body["trends"]
        )
    if _several_captures(m):
        q_text = esc(_capture_text(m, charge_cap))
        body["iec-charge"] = (
            f"<p class='n'>From {q_text} (the longest record: the tail holds most of the "
            "charge).</p>" + body["iec-charge"]
        )
    if bounce is not None:
        body["bounce"] = bounce.result()
    else:
        # no capture resolves the pulse: no peak or bounce figure from smoothed records
        why = (
            f"<p>Not measured: {esc(_capture_text(m, peak_cap))} does not resolve the pulse "
            "(its 10-90 % rise spans fewer than "
            f"{MIN_RISE_SAMPLES:g} samples). Add a capture with a fine sample interval to "
            "measure the peak current and the contact bounce.</p>"
        )
        body["peaks"] = body["bounce"] = why
    body["selfdischarge"] = selfdischarge.result()
    body["waveforms"] = joined(waves)
    if overlays is not None:
        body["baseline"] = joined(overlays)
    return body


def write_report(
    run_dir: str | Path,
    baseline_dir: str | Path | None = None,
    rng: np.random.Generator | None = None,
    workers: int | None = None,
    pool: WorkerPool | None = None,
    tables: RunTables | None = None,
) -> Path:
    """Write ``<run_dir>/report.html`` and ``<run_dir>/figures/*.png|svg``; returns the HTML path.

    ``baseline_dir`` adds overlays against that run and its equivalence verdicts.
    ``rng`` only places the jitter of strip plots (seeded by default, so reports are stable).
    ``workers``: processes drawing the figures while this one makes the tables (default: one
    per core, see rigbase.workers; 1 draws everything here), or ``pool``: workers already
    made (rig.report.documents shares them with the certificate). ``tables``: the run's
    tables already read (:func:`rig.report.data.read_run_tables`; read here by default). The
    page is the same whatever the workers.
    Raises RunFolderError when the run has no manifest or has not been analysed.
    """
    t_start = time.perf_counter()
    run = Path(run_dir)
    rng = rng if rng is not None else np.random.default_rng(0)
    if tables is None:
        tables = read_run_tables(run)
    man, m, g = tables.manifest, tables.metrics, tables.groups
    if pool is not None:
        body = _sections(run, man, m, g, baseline_dir, rng, pool)
    else:
        with WorkerPool(workers) as own:
            body = _sections(run, man, m, g, baseline_dir, rng, own)
    log.info("report %s: sections done after %.1f s", run.name, time.perf_counter() - t_start)

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
    atomic_write_text(path, doc)  # a report killed half-way leaves the previous one whole
    _record_report(run, path, baseline_dir)
    log.info("report %s written in %.1f s", path, time.perf_counter() - t_start)
    return path
