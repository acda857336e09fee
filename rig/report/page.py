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
rig.report.figures). This module orders the sections and writes the page.
"""

from __future__ import annotations

import logging
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from rig import __version__
from rig.analysis.analyze import analysis_mismatch
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
    _capture_text,
    _load_groups,
    _load_metrics,
    _peak_metric,
    _several_captures,
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
from rig.store.runfolder import read_manifest
from rigbase.errors import RunFolderError
from rigbase.memory import release_freed_memory

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


def _rows(m: pd.DataFrame, sel: pd.Series) -> pd.DataFrame:
    """The rows of ``m`` where ``sel``; ``m`` itself when that is all of them (a selection is
    a copy, of a table that grows with the events)."""
    return m if bool(sel.all()) else m[sel]


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
    stale = analysis_mismatch(run) if (run / "metrics.parquet").exists() else None
    if stale:
        raise RunFolderError(
            f"{run}: {stale}; run `rig analyze {run}` (or `rig report`, which re-analyses) first"
        )
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
    body["calibration"] = section_calibration(man)
    body["waveforms"] = _section_waveforms(run, m, modes, colours, out)
    release_freed_memory()  # after each large section: its selections of the table are freed
    log.info("report %s: waveforms done after %.1f s", run.name, time.perf_counter() - t_start)

    # Peaks (and pulses) from the capture with the finest sample interval, charges from the
    # one with the longest record (decided from dt_s and record_s, see capture_roles).
    peak_cap, charge_cap = capture_roles(m)
    mp, mq = _rows(m, m["capture"] == peak_cap), _rows(m, m["capture"] == charge_cap)
    g_trend = pd.concat(
        [
            g[(g["capture"] == peak_cap) & (g["metric"] != "charge_c")],
            g[(g["capture"] == charge_cap) & (g["metric"] == "charge_c")],
        ]
    )
    frames = {"peaks": (mp, g), "trends": (m, g_trend), "iec-charge": (mq, g)}
    loads = list(m["load"].value_counts().index)  # most events first
    fast_ok = "fast" in measures(m).get(peak_cap, {"fast"})
    for key, fn in (
        ("peaks", _section_peaks),
        ("trends", _section_trends),
        ("iec-charge", _section_iec),
    ):
        if not fast_ok and key != "iec-charge":
            continue  # drawn below without the peak
        fm, fg = frames[key]
        body[key] = "".join(
            fn(fm, fg, ld, len(loads) > 1, modes, colours, rng, out) for ld in loads
        )
        release_freed_memory()
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
    if fast_ok:
        body["bounce"] = _section_bounce(mp, modes, colours, out)
    else:
        # no capture resolves the pulse: no peak or bounce figure from smoothed records
        why = (
            f"<p>Not measured: {esc(_capture_text(m, peak_cap))} does not resolve the pulse "
            "(its 10-90 % rise spans fewer than "
            f"{MIN_RISE_SAMPLES:g} samples). Add a capture with a fine sample interval to "
            "measure the peak current and the contact bounce.</p>"
        )
        body["peaks"] = body["bounce"] = why
        body["trends"] = _trend_charge_only(m, g_trend, loads, modes, colours, rng, out)
    body["selfdischarge"] = _section_selfdischarge(run, mq, colours, out, charge_cap)
    body["predicted"] = section_predicted(run, man)
    body["flagged"] = _section_flagged(run, m, colours)
    body["groups"] = _section_groups(g, m)
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
    atomic_write_text(path, doc)  # a report killed half-way leaves the previous one whole
    _record_report(run, path, baseline_dir)
    log.info("report %s written in %.1f s", path, time.perf_counter() - t_start)
    del m, mp, mq, frames  # the run's table, before the certificate reads it again
    release_freed_memory()
    return path
