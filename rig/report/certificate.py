"""A printable certificate of a run: one or two A4 pages per unit tested, as PDF.

``write_certificate(run_dir)`` writes ``certificate.pdf`` (matplotlib's PDF backend, text kept
as text so it can be searched and extracted): per unit (meter model and serial) the run, the
operator and the calibrations the run recorded (or "not recorded"), the instruments, the
verdicts against the sequence's limits, the key figures (median |peak current| from the
capture that resolves it, median charge from the longest record, the IEC 61010-1 45 uC
figure), the comparison with a baseline run when one is given (a repair check), the
self-discharge crossings when the run swept the delay, the high-voltage cautions and a
sign-off block. The numbers come from the same tables as report.html.
"""

from __future__ import annotations

import textwrap
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd
from matplotlib.figure import Figure

from rig import __version__
from rig.analysis.provenance import record_options
from rig.analysis.stats import capture_roles
from rig.report.captures import measures
from rig.report.data import RunTables, _at_zero_delay, _peak_metric, read_run_tables
from rig.report.html import _dict, _plain
from rigbase.units import eng, metric_label, metric_unit

if TYPE_CHECKING:
    from matplotlib.backends.backend_pdf import PdfPages

__all__ = ["CERTIFICATE", "write_certificate"]

CERTIFICATE = "certificate.pdf"
A4 = (8.27, 11.69)  # inches
MAX_PAGES_PER_UNIT = 2
_LINE = 0.0145  # line height, fraction of the page
_FOOT_LINES = 20  # cautions and sign-off
_CAUTIONS = (
    "HIGH VOLTAGE CAN INJURE OR KILL. The bench behind these figures charges a meter's input "
    "to hazardous voltages, and a meter that has measured a high voltage can keep a dangerous "
    "charge on its input. These results describe the events measured; they do not make any "
    "meter, bench or procedure safe. Defer to local electrical codes, the lab's safety rules "
    "and licensed practice; treat every input, lead and capacitor as live until measured "
    "discharged; use instruments and leads rated for the voltages applied."
)


class _Pages:
    """A4 pages filled top to bottom; a unit gets at most MAX_PAGES_PER_UNIT of them."""

    def __init__(self, pdf: PdfPages, title: str, unit: str) -> None:
        self.pdf, self.title, self.unit = pdf, title, unit
        self.count = 0
        self.truncated = False
        self.fig: Figure | None = None
        self.reserve = 0  # lines kept free at the foot of the last page (cautions, sign-off)
        self._new()

    def _new(self) -> None:
        if self.fig is not None:
            self._close()
        self.count += 1
        self.fig = Figure(figsize=A4)
        self.fig.text(0.06, 0.965, self.title, fontsize=13, fontweight="bold")
        self.fig.text(0.06, 0.948, self.unit, fontsize=9.5)
        self.y = 0.92

    def _close(self) -> None:
        assert self.fig is not None
        self.fig.text(
            0.06,
            0.02,
            f"discharge-rig {__version__} · page {self.count} of this unit · "
            "figures from report.html's tables",
            fontsize=7,
            color="#555555",
        )
        self.pdf.savefig(self.fig)
        self.fig = None

    def room(self, lines: int) -> bool:
        """Start a new page if ``lines`` do not fit; False when the unit has no page left."""
        keep = self.reserve if self.count >= MAX_PAGES_PER_UNIT else 0
        if self.y - (lines + keep) * _LINE >= 0.05:
            return True
        if self.count >= MAX_PAGES_PER_UNIT:
            self.truncated = True
            return False
        self._new()
        return True

    def heading(self, text: str) -> None:
        if self.room(3):
            self.y -= 0.6 * _LINE
            assert self.fig is not None
            self.fig.text(0.06, self.y, text, fontsize=10.5, fontweight="bold")
            self.y -= 1.25 * _LINE

    def para(self, text: str, size: float = 8.5, width: int = 110, **kw: Any) -> None:
        for line in textwrap.wrap(text, width) or [""]:
            if not self.room(1):
                return
            assert self.fig is not None
            self.fig.text(0.06, self.y, line, fontsize=size, **kw)
            self.y -= _LINE

    def table(self, header: list[str], rows: list[list[str]], xs: list[float]) -> None:
        if not self.room(2):
            return
        for i, row in enumerate([header, *rows]):
            if not self.room(1):
                self.para(f"... {len(rows) - i + 1} more rows: see report.html", size=7.5)
                return
            assert self.fig is not None
            for x, cell in zip(xs, row, strict=False):
                self.fig.text(
                    x, self.y, cell, fontsize=7.8, fontweight="bold" if i == 0 else "normal"
                )
            self.y -= _LINE * 0.95

    def finish(self) -> None:
        if self.fig is not None:
            self._close()


def _recorded(man: dict[str, Any], *keys: str) -> Any:
    """The first of ``keys`` at the manifest's top, or in its bench or sequence tables."""
    for where in (man, _dict(man.get("bench")), _dict(man.get("sequence"))):
        for k in keys:
            if where.get(k) not in (None, "", [], {}):
                return where[k]
    return None


def _operator_lines(operator: Any) -> list[str]:
    """The operator block the run recorded (name, sign-off line, accepted lapses) as lines."""
    if not operator:
        return ["Operator: not recorded"]
    if not isinstance(operator, dict):
        return [f"Operator: {'; '.join(_lines(operator))}"]
    out = [f"Operator: {_plain(operator.get('name')) or 'not recorded'}"]
    if operator.get("sign_off"):
        out.append(f"Sign-off line recorded at the start: {_plain(operator['sign_off'])}")
    if operator.get("overdue_accepted"):
        out.append(
            "Overdue calibrations accepted: " + ", ".join(map(str, operator["overdue_accepted"]))
        )
    return out


def _lines(value: Any) -> list[str]:
    """A recorded value (text, table or list of tables) as readable lines."""
    if isinstance(value, list):
        return [line for v in value for line in _lines(v)]
    if isinstance(value, dict):
        return ["; ".join(f"{k}: {_plain(v)}" for k, v in value.items())]
    return [_plain(value)]


def _verdict_rows(g: pd.DataFrame) -> list[list[str]]:
    v = g[g["verdict"] != ""]
    rows = []
    for r in v.itertuples():
        u = metric_unit(str(r.metric))
        stat = r.utl if r.utl == r.utl else r.median
        rows.append(
            [
                str(r.mode),
                eng(r.volts, "V"),
                str(r.load),
                metric_label(str(r.metric)),
                eng(stat, u),
                eng(r.limit, u),
                str(r.verdict).upper(),
            ]
        )
    return rows


def _figure_rows(m: pd.DataFrame, g: pd.DataFrame) -> list[list[str]]:
    """Per mode, voltage and load: median |peak| (finest capture, if it resolves the pulse)
    and median charge (longest record) with their 95 % confidence intervals."""
    peak_cap, charge_cap = capture_roles(m)
    peak_ok = "fast" in measures(m).get(peak_cap, {"fast"})
    pm = _peak_metric(g)
    rows = []
    gz = _at_zero_delay(g)
    for (mode, volts, load), _d in _at_zero_delay(m).groupby(["mode", "volts", "load"], sort=False):
        cells = [str(mode), eng(volts, "V"), str(load)]
        for metric, cap, unit in ((pm, peak_cap, "A"), ("charge_c", charge_cap, "C")):
            sel = gz[
                (gz["mode"] == mode)
                & (gz["volts"] == volts)
                & (gz["load"] == load)
                & (gz["capture"] == cap)
                & (gz["metric"] == metric)
            ]
            if (metric == pm and not peak_ok) or sel.empty:
                cells.append("not measured")
                continue
            r = sel.iloc[0]
            cells.append(
                f"{eng(r['median'], unit)} ({eng(r['median_ci_low'], unit)} - "
                f"{eng(r['median_ci_high'], unit)})"
            )
            if metric == "charge_c":
                cells.append("above" if r["median"] > 45e-6 else "below")
        rows.append(cells)
    return rows


def _compare_rows(run: Path, baseline: Path, meter: str) -> list[list[str]]:
    from rig.analysis.compare import compare_runs, verdict_table

    t = verdict_table(compare_runs(run, baseline))
    if t.empty:
        return []
    t = t[t["meter"] == meter]
    metrics = [c for c in t.columns if c not in ("meter", "mode", "volts", "load", "delay_s")]
    return [
        [str(r["mode"]), eng(r["volts"], "V"), str(r["load"])]
        + [f"{metric_label(c) if c != 'verdict' else 'group'}: {r[c]}" for c in metrics if r[c]]
        for _, r in t.iterrows()
    ]


def write_certificate(
    run_dir: str | Path, baseline_dir: str | Path | None = None, tables: RunTables | None = None
) -> Path:
    """Write ``<run_dir>/certificate.pdf``; returns its path (see the module docstring).
    ``tables``: the run's tables already read (:func:`rig.report.data.read_run_tables`, which
    reads them by default and refuses a run not analysed or analysed from other events)."""
    # the PDF backend (with fontTools) takes ~0.15 s to import: only when a certificate is made
    from matplotlib.backends.backend_pdf import PdfPages

    run = Path(run_dir)
    if tables is None:
        tables = read_run_tables(run)
    man, m, g = tables.manifest, tables.metrics, tables.groups
    seq = _dict(man.get("sequence"))
    kind = "Repair check" if baseline_dir is not None else "Qualification"
    operator = _recorded(man, "operator", "operator_name")
    calibrations = _recorded(man, "calibrations", "calibration")
    if isinstance(calibrations, dict):  # a bench table without records
        calibrations = [r for r in calibrations.get("records", []) if r] or None
    sd_path = run / "selfdischarge.csv"
    sd = pd.read_csv(sd_path) if sd_path.exists() else pd.DataFrame()
    decl = {
        (str(d.get("model")), str(d.get("serial"))): d
        for d in seq.get("meters") or []
        if isinstance(d, dict)
    }
    path = run / CERTIFICATE
    with PdfPages(
        path, metadata={"Title": f"{kind} certificate {man.get('run_id', run.name)}"}
    ) as pdf:
        for (meter, serial), mu in m.groupby(["meter", "serial"], sort=False, dropna=False):
            serial_text = serial if serial == serial else "not recorded"
            gu = g[(g["meter"] == meter) & (g["serial"].astype(str) == str(serial))]
            if gu.empty:
                gu = g[g["meter"] == meter]
            d = decl.get((str(meter), str(serial)), {})
            p = _Pages(
                pdf,
                f"{kind} certificate: discharge of the meter input",
                f"Unit: {meter}, serial {serial_text}"
                + (f", rated {d['rating']}" if d.get("rating") else ""),
            )
            verdicts = gu.loc[gu["verdict"] != "", "verdict"].str.lower()
            overall = (
                "NO LIMITS SET"
                if verdicts.empty
                else ("PASS" if verdicts.isin(["pass", "passed", "ok"]).all() else "FAIL")
            )
            p.reserve = _FOOT_LINES
            p.para(f"Result against the sequence's limits: {overall}", size=11, fontweight="bold")
            p.heading("Run")
            p.para(
                f"Run {man.get('run_id', run.name)}; started {man.get('started', '?')}, ended "
                f"{man.get('ended', '?')}; status {man.get('status', '?')}; sequence "
                f"“{seq.get('name', '?')}”; bench “{_dict(man.get('bench')).get('name', '?')}”"
                + (" (SIMULATED bench: no instrument was used)" if man.get("simulated") else "")
                + f"; modes {', '.join(map(str, dict.fromkeys(mu['mode'])))}; "
                f"{int(mu['file'].notna().sum())} of {len(mu)} events captured."
            )
            for line in _operator_lines(operator):
                p.para(line)
            p.para("Calibrations: " + ("" if calibrations else "not recorded"))
            for line in _lines(calibrations) if calibrations else []:
                p.para("  " + line, size=8)
            ids = _dict(man.get("instruments"))
            if ids:
                p.para("Instruments: " + "; ".join(f"{k}: {_plain(v)}" for k, v in ids.items()))
            p.heading("Verdicts against the limits (statistic: upper tolerance bound)")
            vrows = _verdict_rows(gu)
            if vrows:
                p.table(
                    ["Mode", "Voltage", "Load", "Metric", "Statistic", "Limit", "Verdict"],
                    vrows,
                    [0.06, 0.16, 0.26, 0.36, 0.54, 0.68, 0.80],
                )
            else:
                p.para("The sequence set no limits: no verdict.")
            p.heading("Key figures (median with its 95 % confidence interval)")
            p.table(
                ["Mode", "Voltage", "Load", "|Peak current|", "Charge", "vs 45 µC"],
                _figure_rows(mu, gu),
                [0.06, 0.16, 0.26, 0.36, 0.58, 0.82],
            )
            if baseline_dir is not None:
                p.heading("Against the baseline run (equivalence within ±10 %)")
                p.para(f"Baseline: {Path(baseline_dir).name}", size=8)
                crow = _compare_rows(run, Path(baseline_dir), str(meter))
                same = crow and all(r[-1] == "group: equivalent" for r in crow)
                p.para(
                    "Equivalent to the baseline in every re-tested group"
                    if same
                    else "NOT equivalent to the baseline in every re-tested group",
                    size=10,
                    fontweight="bold",
                )
                for r in crow:
                    p.para(" · ".join(r), size=8)
                if not crow:
                    p.para("No group of this unit matches a baseline group.")
            su = sd[sd["meter"] == meter] if not sd.empty else sd
            if not su.empty and "delay_to_safe_upper_s" in su:
                p.heading("Self-discharge (open input)")
                for r in su.itertuples():
                    p.para(
                        f"{r.mode} at {eng(r.volts, 'V')}: below {eng(r.safe_volts, 'V')} after "
                        f"{eng(r.delay_to_safe_s, 's')} (upper 95 % bound "
                        f"{eng(r.delay_to_safe_upper_s, 's')}); below "
                        f"{eng(r.hazard_volts, 'V')} after {eng(r.delay_to_hazard_s, 's')}; "
                        f"below 45 µC after {eng(r.delay_to_45uc_s, 's')}"
                        + (
                            "; extrapolated beyond the longest delay measured"
                            if r.delay_to_safe_upper_s > r.max_delay_s
                            else ""
                        )
                    )
            p.reserve = 0
            p.heading("High-voltage cautions")
            p.para(_CAUTIONS, size=8)
            p.heading("Sign-off")
            p.para(f"Certificate issued {_stamp()} from the run folder {run.name}.", size=8)
            for line in (
                "Tested by (name): ______________________   Signature: ______________   Date: ________",
                "",
                "Reviewed by (name): ____________________   Signature: ______________   Date: ________",
                "",
                "Decision:  [ ] accepted   [ ] rejected   [ ] re-test     Remarks: ____________________",
            ):
                p.para(line, size=9, family="DejaVu Sans Mono")
            p.finish()
    record_options(
        path,
        "certificate",
        {"baseline": str(Path(baseline_dir).resolve()) if baseline_dir else None},
        {n: run / n for n in ("metrics.parquet", "groups.csv", "selfdischarge.csv")},
    )
    return path


def _stamp() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
