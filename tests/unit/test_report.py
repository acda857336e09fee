"""The HTML report: sections, embedded figures, no external URL, escaping, computed summaries."""

from __future__ import annotations

import base64
import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from rig.report import figures as F
from rig.report.html import _CSS
from rig.report.page import write_report
from rigbase.errors import RunFolderError
from rigbase.units import eng, eng_scale
from tests.report_fixtures import DEFAULT_METERS, FakeMeter, build_run

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C/ISO 15948), section 5.2
EVIL = "<script>alert(1)</script>"
EXPECTED_SECTIONS = [
    "tested",
    "glance",
    "verdicts",
    "caution",
    "calibration",
    "waveforms",
    "peaks",
    "trends",
    "iec-charge",
    "bounce",
    "selfdischarge",
    "predicted",
    "flagged",
    "groups",
]


class _Page(HTMLParser):
    """Collects what the tests look at: tags with attributes, section order, text, tables."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.sections: list[str] = []
        self.h2: list[str] = []
        self.text: list[str] = []
        self._in_h2 = False
        self._table_stack: list[list[list[str]]] = []
        self.tables: dict[str, list[list[str]]] = {}
        self._cell: list[str] | None = None
        self._current_section = ""

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "section":
            self._current_section = a.get("id") or ""
            self.sections.append(self._current_section)
        elif tag == "h2":
            self._in_h2 = True
            self.h2.append("")
        elif tag == "table":
            self._table_stack.append([])
            self.tables.setdefault(self._current_section, self._table_stack[-1])
        elif tag == "tr" and self._table_stack:
            self._table_stack[-1].append([])
        elif tag in ("td", "th") and self._table_stack:
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "h2":
            self._in_h2 = False
        elif tag in ("td", "th") and self._cell is not None and self._table_stack:
            self._table_stack[-1][-1].append("".join(self._cell).strip())
            self._cell = None
        elif tag == "table" and self._table_stack:
            self._table_stack.pop()

    def handle_data(self, data):
        self.text.append(data)
        if self._in_h2:
            self.h2[-1] += data
        if self._cell is not None:
            self._cell.append(data)


def _parse(html: str) -> _Page:
    p = _Page()
    p.feed(html)
    p.close()
    return p


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    root = tmp_path_factory.mktemp("runs")
    evil = FakeMeter(
        EVIL,
        "SN<b>&amp;\"'",
        "CAT II <i>600 V</i>",
        *(
            DEFAULT_METERS[1].r_fast,
            DEFAULT_METERS[1].c_fast,
            DEFAULT_METERS[1].r_slow,
            DEFAULT_METERS[1].c_mode,
            DEFAULT_METERS[1].r_leak,
        ),
    )
    run = build_run(
        root,
        np.random.default_rng(7),
        meters=(DEFAULT_METERS[0], evil),
        operator_note=f"note {EVIL} & <img src=x onerror=alert(2)>",
    )
    path = write_report(run)
    html = path.read_text(encoding="utf-8")
    return run, path, html, _parse(html)


def test_report_is_written_in_the_run_folder(report):
    run, path, _html, _page = report
    assert path == run / "report.html"
    assert sorted(p.suffix for p in (run / "figures").iterdir()).count(".png") >= 8


def test_every_section_present_in_order(report):
    *_, page = report
    assert page.sections == EXPECTED_SECTIONS
    assert all(h.strip() for h in page.h2)


def test_every_figure_embedded_and_decodable(report):
    run, _path, html, page = report
    imgs = [a for t, a in page.tags if t == "img"]
    # 3 modes of waveforms + peaks + trends + IEC charge + bounce + self-discharge
    assert len(imgs) == 8
    disk = {p.read_bytes() for p in (run / "figures").glob("*.png")}
    for a in imgs:
        src = a["src"] or ""
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        assert data in disk  # the embedded figure is the one written under figures/
        assert a.get("alt")
    for svg_file in (run / "figures").glob("*.svg"):
        ET.parse(svg_file)  # well-formed XML
    inline = re.findall(r"<svg\b.*?</svg>", html, flags=re.S)
    flagged = pd.read_parquet(run / "metrics.parquet")
    n_thumbs = int(
        (
            flagged[[c for c in flagged if c.startswith("flag_")]].any(axis=1)
            & flagged["file"].notna()
        ).sum()
    )
    assert n_thumbs >= 1 and len(inline) == n_thumbs
    for svg in inline:
        root = ET.fromstring(svg)
        assert root.tag == "svg" and root.find("polyline") is not None


def test_no_external_url_anywhere(report):
    _run, _path, html, page = report
    low = html.lower()
    assert "http://" not in low and "https://" not in low
    assert not re.search(r"""(src|href)\s*=\s*["']?//""", low)
    assert "url(" not in low and "@import" not in low
    for tag, a in page.tags:
        if "src" in a:
            assert (a["src"] or "").startswith("data:"), tag
        if "href" in a:
            assert (a["href"] or "").startswith("#"), tag
    assert not any(t in ("script", "link", "iframe", "object", "embed") for t, _ in page.tags)


def test_strings_from_files_show_as_text(report):
    run, _path, html, page = report
    text = "".join(page.text)
    assert EVIL in text  # shown to the reader as text...
    assert "<script" not in html.lower()  # ...never as markup
    assert "onerror" not in [k for _, a in page.tags for k in a]
    assert "SN<b>&amp;\"'" in text and "CAT II <i>600 V</i>" in text
    assert not [t for t, _ in page.tags if t == "i"]  # the rating's <i> stayed text


def test_what_was_tested_comes_from_the_manifest_and_the_data(report):
    run, _path, _html, page = report
    man = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    text = " ".join("".join(page.text).split())
    for ident in man["instruments"].values():
        assert ident in text
    for meter in man["sequence"]["meters"]:
        assert meter["model"] in text and meter["rating"] in text and meter["serial"] in text
    for key in ("started", "ended", "status"):
        assert man[key] in text
    assert f"rig={man['software']['rig']}" in text and man["software"]["host"] in text
    assert f"Operator note: {man['sequence']['operator_note']}" in text
    assert "short: 50 mΩ, 200 nH" in text  # load from the data (ohms) and the bench (henry)
    limits = page.tables["verdicts"]
    assert any(r[:3] == ["Meter", "Serial", "AC V"] for r in limits)
    assert "Limits of the sequence" in text


def test_at_a_glance_is_computed_from_the_events(report):
    run, _path, _html, page = report
    m = pd.read_parquet(run / "metrics.parquet")
    m = m[(m["delay_s"] == 0) & m["file"].notna()]
    rows = page.tables["glance"]
    header, body = rows[0], rows[1:]
    assert header[:3] == ["Mode", "Load", "At"]
    assert {r[0] for r in body} == set(m["mode"])
    # one row per mode and charge voltage (issue 11: not the highest voltage only)
    volts = {eng(v, "V"): v for v in m["volts"].unique()}
    assert {(r[0], r[2]) for r in body} == {
        (k, eng(v, "V")) for k, v in m.groupby(["mode", "volts"]).groups
    }
    for r in body:
        d = m[(m["mode"] == r[0]) & (m["volts"] == volts[r[2]])]
        for col, metric in (("Lower peak", "abs_peak_a"), ("Lower charge", "charge_c")):
            med = d.groupby("meter")[metric].median()
            cell = r[header.index(col)]
            if cell == "not ranked: clipped peaks":  # the fixture clips one event on purpose
                assert d.groupby("meter")["flag_clipped"].any().any()
                continue
            assert cell.startswith(med.idxmin()), (r[0], col, cell)
            ratio = med.max() / med.min()
            assert f"{ratio:.2f}× lower" in cell
        cell = r[header.index("Median |peak current|")]
        for meter, v in d.groupby("meter")["abs_peak_a"].median().items():
            assert f"{meter}: {eng(v, 'A')}" in cell


def test_at_a_glance_does_not_rank_clipped_peaks(tmp_path):
    """A clipped peak is a lower bound: the glance must not call either meter lower on it."""
    run = build_run(tmp_path, np.random.default_rng(8), modes=("AC V",), reps=3, delays=())
    m = pd.read_parquet(run / "metrics.parquet")
    m.loc[m["volts"] == m["volts"].max(), "flag_clipped"] = True
    m.to_parquet(run / "metrics.parquet")
    page = _parse(write_report(run).read_text(encoding="utf-8"))
    header, row = page.tables["glance"][0], page.tables["glance"][1]
    assert row[header.index("Lower peak")] == "not ranked: clipped peaks"
    assert row[header.index("Lower on both")].startswith("peaks clipped; lower charge:")
    assert "clipped: the true peak is higher" in row[header.index("Median |peak current|")]


def test_several_loads_get_a_figure_each_and_glance_rows(tmp_path):
    loads = (("short", 0.05), ("500R", 500.0))
    run = build_run(
        tmp_path, np.random.default_rng(9), modes=("AC V",), loads=loads, reps=3, delays=()
    )
    page = _parse(write_report(run).read_text(encoding="utf-8"))
    for name in ("peak-current", "vs-voltage", "iec-charge"):
        assert (run / "figures" / f"{name}-short.png").exists()
        assert (run / "figures" / f"{name}-500r.png").exists()
    rows = page.tables["glance"][1:]
    m = pd.read_parquet(run / "metrics.parquet")
    assert sorted(r[1] for r in rows) == sorted(["500R", "short"] * m["volts"].nunique())
    volts = {eng(v, "V"): v for v in m["volts"].unique()}
    for r in rows:
        d = m[(m["load"] == r[1]) & (m["volts"] == volts[r[2]])]
        for meter, v in d.groupby("meter")["abs_peak_a"].median().items():
            assert f"{meter}: {eng(v, 'A')}" in r[3]


def test_verdict_counts_match_groups_csv(report):
    run, _path, _html, page = report
    g = pd.read_csv(run / "groups.csv")
    v = g["verdict"].dropna()
    v = v[v != ""]
    text = " ".join("".join(page.text).split())
    counts = ", ".join(f"{n} {k}" for k, n in v.value_counts().items())
    assert f"{len(v)} group × metric checks against a limit: {counts}." in text
    assert "fail" in v.values  # the fixture has failing checks, so the table is exercised
    failing = page.tables["verdicts"]
    assert len(failing) == 1 + g["meter"].nunique()


def test_flagged_events_listed(report):
    run, _path, _html, page = report
    m = pd.read_parquet(run / "metrics.parquet")
    flagged = m[m[[c for c in m if c.startswith("flag_")]].fillna(False).any(axis=1)]
    rows = page.tables["flagged"][1:]
    assert sorted(int(r[0]) for r in rows) == sorted(flagged["event"].astype(int))
    lost = [r for r in rows if "not captured" in r[-2]]
    assert len(lost) == int(flagged["flag_not_captured"].sum())


# Which group rows the report's group table may show (issue 11): the signed peak is not
# repeated beside |peak|, and with several captures the fast metrics come from the finest
# sample interval and the charge metrics from the longest record only.
_FAST_METRICS = {"peak_a", "abs_peak_a", "rise_s", "decay_s", "fwhm_s", "pulses", "energy_j"}
_FAST_METRICS |= {"ind_hbm_volts", "t_peak_s"}
_TAIL_METRICS = {"charge_c", "tau_s", "c_equiv_f", "r_equiv_ohm", "ind_iec61010_charge_ratio"}
# the whole-discharge charge's parts and the fitted tail's terms: the long record measures them
_TAIL_METRICS |= {"charge_record_c", "charge_tail_c", "charge_u_c", "tail_terms"}
_TAIL_METRICS |= {f"term{k}_{q}" for k in (1, 2, 3) for q in ("tau_s", "charge_c")}


def _expected_group_rows(g: pd.DataFrame, fine: str | None = None, long: str | None = None):
    keep = (
        g["metric"] != "peak_a" if "abs_peak_a" in set(g["metric"]) else g["metric"] == g["metric"]
    )
    if fine is not None:
        keep &= ~((g["capture"] != fine) & g["metric"].isin(_FAST_METRICS))
        keep &= ~((g["capture"] != long) & g["metric"].isin(_TAIL_METRICS))
    return g[keep]


def test_group_table_has_every_row_it_can_measure(report):
    run, _path, _html, page = report
    g = pd.read_csv(run / "groups.csv")
    assert len(page.tables["groups"]) == 1 + len(_expected_group_rows(g))
    metrics = page.tables["groups"][0].index("Metric")
    shown = [r[metrics] for r in page.tables["groups"][1:]]
    assert "peak current" not in shown and "|peak current|" in shown  # not twice


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    """A baseline run and a "repaired" run whose currents are 1.5 times larger."""
    root = tmp_path_factory.mktemp("pair")
    rng = np.random.default_rng(11)
    base = build_run(root, rng, run_id="base-run", reps=5, delays=())
    run = build_run(root, rng, run_id="repaired-run", reps=5, delays=(), gain_scale=1.5)
    return run, base


def test_baseline_overlays_and_equivalence_from_the_compare_file(two_runs):
    from rig.analysis.compare import compare_runs, write_comparison

    run, base = two_runs
    c = compare_runs(run, base)
    csv = write_comparison(c, run, base)
    assert csv.name == "compare-base-run.csv"
    page = _parse(write_report(run, base).read_text(encoding="utf-8"))
    assert page.sections == EXPECTED_SECTIONS + ["baseline"]
    assert (run / "figures" / "baseline-ac-v.png").exists()
    table = page.tables["baseline"]
    assert len(table) == 1 + len(c)
    verdicts = [r[table[0].index("Verdict")] for r in table[1:]]
    assert verdicts == c["verdict"].tolist()
    # currents 1.5x the baseline's: far outside a +-10 % equivalence margin
    peak = [v for v, m in zip(verdicts, c["metric"], strict=True) if m == "peak_a"]
    assert peak and all(v == "different" for v in peak)
    imgs = [a for t, a in page.tags if t == "img"]
    assert len(imgs) == 8 - 1 + 3  # no self-discharge figure; 3 baseline overlays


def test_baseline_without_compare_file_is_computed_not_written(tmp_path):
    rng = np.random.default_rng(12)
    base = build_run(tmp_path, rng, run_id="b", modes=("AC V",), reps=5, delays=())
    run = build_run(tmp_path, rng, run_id="r", modes=("AC V",), reps=5, delays=())
    text = "".join(_parse(write_report(run, base).read_text(encoding="utf-8")).text)
    assert "computed for this report" in text
    assert not list(run.glob("compare-*.csv"))


def test_missing_analysis_is_a_clear_error(tmp_path):
    run = tmp_path / "bare"
    run.mkdir()
    (run / "manifest.json").write_text("{}", encoding="utf-8")
    with pytest.raises(RunFolderError, match=r"metrics\.parquet"):
        write_report(run)


def test_sparse_manifest_is_tolerated(tmp_path):
    run = build_run(tmp_path, np.random.default_rng(3), modes=("DC V",), reps=2, delays=())
    (run / "manifest.json").write_text(json.dumps({"status": "aborted"}), encoding="utf-8")
    page = _parse(write_report(run).read_text(encoding="utf-8"))
    text = "".join(page.text)
    assert page.sections[0] == "tested" and "aborted" in text
    assert all(m.name in text for m in DEFAULT_METERS)
    assert "No delay sweep" in text


def test_metrics_missing_a_column_names_it(tmp_path):
    run = build_run(tmp_path, np.random.default_rng(4), modes=("DC V",), reps=2, delays=())
    m = pd.read_parquet(run / "metrics.parquet").drop(columns=["charge_c"])
    m.to_parquet(run / "metrics.parquet")
    with pytest.raises(RunFolderError, match=r"metrics\.parquet \[charge_c\]"):
        write_report(run)


# --- units and waveform reduction --------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "unit", "text"),
    [
        # SI prefixes: BIPM SI Brochure, 9th edition (2019), table 7
        (1.2e-8, "s", "12 ns"),
        (45e-6, "C", "45 µC"),
        (0.0123, "A", "12.3 mA"),
        (999.96e-9, "s", "1 µs"),  # rounding to 3 digits moves up one prefix
        (-3.3, "A", "-3.3 A"),
        (1500.0, "V", "1.5 kV"),
        (0.0, "A", "0 A"),
        (float("nan"), "A", "–"),
        (0.707, "", "0.707"),  # no unit: no prefix
    ],
)
def test_engineering_prefixes(value, unit, text):
    assert eng(value, unit) == text


def test_eng_scale_picks_the_axis_prefix():
    assert eng_scale(0.012) == (1e3, "m")  # BIPM SI Brochure table 7: milli = 1e-3
    assert eng_scale(3e-8) == (1e9, "n")
    assert eng(2e-6, "s", ascii=True) == "2 us"


def test_thinning_keeps_a_one_sample_spike():
    """Min/max envelope: a one-sample peak in 10^5 samples survives reduction to 1500 points."""
    t = np.arange(-1000, 99_000) * 1e-9
    y = np.where(t >= 0, 1e-3 * np.exp(-t / 20e-6), 0.0)
    y[5000] = 2.5
    s = F.summarise_traces(t, np.vstack([y, y, y]), (t[0], t[-1]))
    assert s.lin_t.size <= 1500
    assert s.lin_mid.max() == pytest.approx(2.5)
    assert s.peak == pytest.approx(2.5)


def test_log_bins_follow_an_exponential_tail():
    """Bin means of i = I0 exp(-t/tau) stay on the curve (textbook RC discharge
    i = V/R exp(-t/RC)) within the curvature error of the widest bin."""
    dt, tau, i0 = 1e-8, 1e-4, 0.5
    t = np.arange(-200, 100_000) * dt
    y = np.where(t >= 0, i0 * np.exp(-t / tau), 0.0)
    s = F.summarise_traces(t, y[None, :], (-1e-6, 1e-5), log_bins=200)
    ok = s.log_t < 3 * tau
    expect = i0 * np.exp(-s.log_t[ok] / tau)
    assert np.allclose(s.log_mid[ok], expect, rtol=0.01)
    assert np.all(np.diff(s.log_t) > 0)


def test_log_panel_starts_one_sample_after_the_trigger():
    """t = t0 + k dt puts ~1e-22 s, not 0, at the trigger sample; the log axis must not
    start there (a real record: 2 us pre-trigger at 1 ns)."""
    t = -2e-6 + 1e-9 * np.arange(20_000)
    assert 0 < t[2000] < 1e-18  # the floating-point residue this guards against
    y = np.where(t > 0, np.exp(-t / 1e-6), 0.0)
    s = F.summarise_traces(t, y[None, :], (-1e-7, 1e-6))
    assert s.log_t[0] == pytest.approx(1e-9, rel=1e-6)
    assert "polyline" in F.sparkline_svg(t, y)


def test_palette_is_okabe_ito():
    # the Okabe-Ito colour-blind-safe palette (M. Okabe and K. Ito, "Color Universal Design",
    # 2002, revised 2008): the eight published colours
    assert set(F.OKABE_ITO.values()) == {
        "#000000",
        "#E69F00",
        "#56B4E9",
        "#009E73",
        "#F0E442",
        "#0072B2",
        "#D55E00",
        "#CC79A7",
    }
    cm = F.colour_map(["a", "b", "a", "c"])
    assert list(cm) == ["a", "b", "c"] and len(set(cm.values())) == 3


def _wcag_contrast(fg: str, bg: str) -> float:
    """Contrast ratio (L1 + 0.05) / (L2 + 0.05) of two sRGB colours ``#rrggbb``, with the
    relative luminance L = 0.2126 R + 0.7152 G + 0.0722 B of linearised channels
    (c / 12.92 up to 0.03928, else ((c + 0.055) / 1.055) ^ 2.4): WCAG 2.1, definitions of
    "contrast ratio" and "relative luminance". (WCAG 2.2 writes 0.04045 for 0.03928; no 8-bit
    value lies between the two, so both give the same ratios here.)"""

    def luminance(colour: str) -> float:
        rgb = [int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
        lin = [c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
        return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]

    hi, lo = sorted((luminance(fg), luminance(bg)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def test_report_colours_keep_wcag_aa_contrast():
    """Every text colour of the stylesheet on each background it is used on keeps at least
    4.5:1: WCAG 2.1, 1.4.3 Contrast (Minimum), level AA for normal text."""
    # the formula itself: black on white is the maximum 21:1 (WCAG 2.1 definition); #767676
    # is the lightest grey that passes on white (4.54:1) and #777777 just fails (4.48:1)
    # (common practice, values from memory)
    assert _wcag_contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert _wcag_contrast("#767676", "#ffffff") == pytest.approx(4.54, abs=0.01)
    assert _wcag_contrast("#777777", "#ffffff") < 4.5
    root = re.search(r":root\{([^}]*)\}", _CSS)
    assert root is not None
    colours = dict(re.findall(r"--([a-z-]+):(#[0-9a-f]{6})", root.group(1)))
    # every colour of the page is named in :root, so the pairs below cover them all
    assert len(re.findall(r"#[0-9a-fA-F]{3,6}\b", _CSS)) == len(colours)
    pairs = [  # (text, background) as the stylesheet and the page's classes combine them
        ("ink", "paper"),  # body text
        ("ink", "head"),  # table headers
        ("ink", "caution-bg"),  # the caution box
        ("mute", "paper"),  # .n notes, captions, navigation
        ("mute", "head"),  # notes inside a header cell
        ("mute", "caution-bg"),  # notes inside the caution box
        ("mute", "other-bg"),  # verdicts other than pass/fail
        ("pass", "pass-bg"),  # pass verdicts
        ("paper", "fail"),  # fail verdicts
        ("fail", "paper"),  # .warn
        ("fail", "caution-bg"),  # .warn inside the caution box
    ]
    low = {
        (fg, bg): round(_wcag_contrast(colours[fg], colours[bg]), 2)
        for fg, bg in pairs
        if _wcag_contrast(colours[fg], colours[bg]) < 4.5
    }
    assert not low, f"below WCAG 2.1 AA (4.5:1): {low}"


def test_dollar_in_names_does_not_break_matplotlib(tmp_path):
    cm = F.colour_map(["$x$ meter", "m2"])
    df = pd.DataFrame(
        {
            "mode": ["A"] * 4,
            "volts": [1.0] * 4,
            "meter": ["$x$ meter", "m2"] * 2,
            "abs_peak_a": [1.0, 2.0, 1.5, 2.5],
            "flagged": [False] * 4,
        }
    )
    fig = F.fig_strip(df, "abs_peak_a", "A", "Peak", ["A"], cm, np.random.default_rng(0), "$t")
    r = F.render(fig, "strip", tmp_path)
    assert r.png.startswith(PNG_SIGNATURE) and Path(r.svg_path).exists()


def test_report_on_the_analysis_modules_output(tmp_path):
    """The report reads what rig.analysis.analyze writes (peak summarised as ``peak_a`` by rig.analysis.stats,
    verdicts including "insufficient"), not only the fixture's own tables."""
    from rig.analysis.analyze import analyze_run

    run = build_run(tmp_path, np.random.default_rng(5), reps=6)
    analyze_run(run)
    g = pd.read_csv(run / "groups.csv")
    page = _parse(write_report(run).read_text(encoding="utf-8"))
    assert page.sections == EXPECTED_SECTIONS
    v = g["verdict"].dropna()
    v = v[v != ""]
    text = " ".join("".join(page.text).split())
    assert f"{len(v)} group × metric checks against a limit:" in text
    body = page.tables["glance"][1:]
    assert len(body) == 6, body  # 3 modes x 2 voltages
    header = page.tables["glance"][0]
    # the fixture samples every 5 ns a pulse whose 10-90 % rise is about 5 ns: one sample, so
    # the peak is not resolved and the glance says so instead of ranking on it
    peak = header.index(next(h for h in header if h.startswith("Median |peak")))
    assert all(r[peak] == "not resolved" for r in body), body
    assert "Lower peak" not in header  # the column would only hold dashes
    assert all("lower" in r[header.index("Lower charge")] for r in body), body
    shown = _expected_group_rows(g)
    shown = shown[~shown["metric"].isin(_FAST_METRICS)]  # not resolved: see above
    assert len(page.tables["groups"]) == 1 + len(shown)


# Two scope captures named so that neither the name nor the file order gives away the role:
# "a-long" (first in the file, 50 ns x 8000 = 400 us, holds the 33 us tail of the fixture's
# slow path) and "z-fast" (1 ns x 4000 = 4 us: resolves the ns spike, misses the tail).
CAPTURES = (("a-long", 50e-9, 8000, -20e-6), ("z-fast", 1e-9, 4000, -1e-6))


@pytest.fixture(scope="module")
def captured_run(tmp_path_factory):
    from rig.analysis.analyze import analyze_run

    root = tmp_path_factory.mktemp("captures")
    run = build_run(
        root,
        np.random.default_rng(21),
        modes=("AC V", "DC V"),
        reps=6,
        delays=(),
        captures=CAPTURES,
    )
    analyze_run(run)  # the report reads rig.analysis.analyze output: dt_s, record_s, capture groups
    page = _parse(write_report(run).read_text(encoding="utf-8"))
    return run, page


def test_at_a_glance_peak_from_the_finest_capture_charge_from_the_longest(captured_run):
    run, page = captured_run
    m = pd.read_parquet(run / "metrics.parquet")
    assert set(m["capture"]) == {"a-long", "z-fast"}
    # dt_s and record_s come from the stored waveforms (rig.analysis.analyze), not from the names
    spans = m.groupby("capture")[["dt_s", "record_s"]].median()
    assert spans.loc["z-fast", "dt_s"] == pytest.approx(1e-9)
    assert spans.loc["a-long", "record_s"] == pytest.approx(400e-6)
    header, body = page.tables["glance"][0], page.tables["glance"][1:]
    peak_col = next(h for h in header if h.startswith("Median |peak current|"))
    charge_col = next(h for h in header if h.startswith("Median charge"))
    assert peak_col.endswith("capture z-fast") and charge_col.endswith("capture a-long")
    assert {r[0] for r in body} == {"AC V", "DC V"}
    volts = {eng(v, "V"): v for v in m["volts"].unique()}
    for r in body:
        d = m[(m["mode"] == r[0]) & (m["volts"] == volts[r[2]]) & m["file"].notna()]
        for col, metric, fine, other in (
            (peak_col, "abs_peak_a", "z-fast", "a-long"),
            (charge_col, "charge_c", "a-long", "z-fast"),
        ):
            want = d[d["capture"] == fine].groupby("meter")[metric].median().abs()
            wrong = d[d["capture"] == other].groupby("meter")[metric].median().abs()
            cell = r[header.index(col)]
            unit = "A" if metric == "abs_peak_a" else "C"
            for meter, v in want.items():
                assert f"{meter}: {eng(v, unit)}" in cell, (r[0], col, cell)
                if abs(wrong[meter] / v - 1) > 0.01:  # picking the other capture fails here
                    assert f"{meter}: {eng(wrong[meter], unit)}" not in cell
            if metric == "abs_peak_a" or r[0] == "AC V":
                # finer sampling sees more of the ns peak; in AC V the 33 us tail runs past
                # the 4 us record (in DC V its 1 us tail fits both records)
                assert (want > 1.05 * wrong).all(), (r[0], metric, want, wrong)
    text = " ".join("".join(page.text).split())
    assert "|Peak current| from capture “z-fast”: 1 ns × 4000 samples = 4 µs" in text


def test_captures_get_a_waveform_figure_each_and_a_group_column(captured_run):
    run, page = captured_run
    figs = {p.name for p in (run / "figures").glob("waveforms-*.png")}
    assert figs == {f"waveforms-{m}-{c}.png" for m in ("ac-v", "dc-v") for c in CAPTURES_SLUGS}
    g = pd.read_csv(run / "groups.csv")
    table = page.tables["groups"]
    col = table[0].index("Capture")
    assert table[0][col - 1] == "Mode"  # right after the mode, as in groups.csv
    assert {r[col] for r in table[1:]} == {"a-long", "z-fast"} == set(g["capture"])
    assert len(table) == 1 + len(_expected_group_rows(g, "z-fast", "a-long"))
    # no charge from the 4 us record, no peak from the 50 ns one, and the table says why
    metric = table[0].index("Metric")
    assert not [r for r in table[1:] if r[col] == "z-fast" and r[metric] == "charge"]
    assert not [r for r in table[1:] if r[col] == "a-long" and r[metric] == "|peak current|"]
    text = " ".join("".join(page.text).split())
    assert "charge and tail of capture “z-fast” (its 4 µs record ends before the tail" in text
    # the 45 uC figure uses the long record; the peak strip the fine one
    assert "From capture “a-long”: 50 ns × 8000 samples = 400 µs (the longest record" in text
    assert "From capture “z-fast”: 1 ns × 4000 samples = 4 µs (the finest" in text


CAPTURES_SLUGS = ("a-long", "z-fast")


def test_old_run_without_capture_reads_as_main(report):
    run, _path, _html, page = report
    assert "capture" not in pd.read_parquet(run / "metrics.parquet").columns
    table = page.tables["groups"]
    assert "Capture" not in table[0]  # one capture ("main"): no column of identical cells
    assert all("capture" not in h for h in page.tables["glance"][0])
