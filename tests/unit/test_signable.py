"""Issue 11 without the simulated bench: options records, stale files, the compare verdict
table and its margins, self-discharge crossings, labels of single-voltage figures.

Outside references: scipy.stats.linregress and scipy.stats.t (the least-squares line and the
one-sided band of its mean response, against rig.analysis.selfdischarge); scipy.stats.ttest_ind
(Welch's t test, for the equivalence margins).
"""

from __future__ import annotations

import html
import json
import math
import re

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from rig.analysis.analyze import analyze_run
from rig.analysis.compare import compare_runs, compare_samples, tost_log, write_comparison
from rig.cli import main
from rig.report.page import write_report
from rigbase.errors import RunFolderError
from rigbase.units import eng
from tests.report_fixtures import DEFAULT_METERS, FakeMeter, build_run


def _flat(page: str) -> str:
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", page)).split())


# --- equivalence margins (issue 10 item 8) -------------------------------------------------


def test_margins_are_symmetric_on_the_log_scale():
    from rig.analysis.compare import equivalence_margins

    lo, hi = equivalence_margins(0.10)
    assert hi == pytest.approx(1.1) and lo == pytest.approx(1 / 1.1)
    assert math.log(hi) == pytest.approx(-math.log(lo))


def _pair(ratio: float, n: int = 400, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Two tight log-normal samples whose geometric means stand at ``ratio`` exactly."""
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((2, n)) * 0.002
    z -= z.mean(axis=1, keepdims=True)
    return np.exp(math.log(ratio) + z[0]), np.exp(z[1])


@pytest.mark.parametrize(
    ("ratio", "equivalent"),
    [
        (1.095, True),  # just inside 1.1
        (1.105, False),  # just outside 1.1
        (1 / 1.095, True),  # just inside 1/1.1 = 0.909
        (0.905, False),  # outside 1/1.1, but inside the old, asymmetric 0.9: failed before
    ],
)
def test_equivalence_just_inside_and_just_outside_the_margin(ratio, equivalent):
    run, base = _pair(ratio)
    p = tost_log(run, base, 0.10)
    assert (p < 0.05) is equivalent, (ratio, p)
    # swapping run and baseline gives the same answer (symmetric margins)
    assert (tost_log(base, run, 0.10) < 0.05) is equivalent
    # the same p-value from scipy's Welch test directly (the larger one-sided p)
    a, b = np.log(run), np.log(base)
    d = math.log(1.1)
    p_ref = max(
        sps.ttest_ind(a + d, b, equal_var=False, alternative="greater").pvalue,
        sps.ttest_ind(a - d, b, equal_var=False, alternative="less").pvalue,
    )
    assert p == pytest.approx(p_ref, rel=1e-9, abs=1e-300)
    out = compare_samples(run, base, rng=np.random.default_rng(0), n_boot=200)
    assert (out["verdict"] == "equivalent") is equivalent


def test_compare_help_names_the_ratio_the_test_uses(capsys):
    with pytest.raises(SystemExit):
        main(["compare", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "geometric-mean ratio" in text and "1/1.1 .. 1.1" in text
    assert "ratio of medians (default" not in text


# --- rig compare's output ------------------------------------------------------------------


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    """A qualification-like baseline (two modes) and a re-test of one of them."""
    root = tmp_path_factory.mktemp("pair")
    rng = np.random.default_rng(31)
    base = build_run(root, rng, run_id="base", modes=("AC V", "DC V"), reps=6, delays=())
    run = build_run(root, rng, run_id="retest", modes=("AC V",), reps=6, delays=())
    return run, base


def test_compare_prints_a_short_verdict_table_first(pair, capsys):
    run, base = pair
    code = main(["compare", str(run), "--baseline", str(base)])
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].startswith("equivalence: geometric-mean ratio run / baseline within 0.909")
    table = pd.read_csv(next(run.glob("compare-*.csv")))
    both = table[~table["verdict"].isin(["only in run", "only in baseline"])]
    groups = both.groupby(["meter", "mode", "volts", "load", "delay_s"]).ngroups
    header = lines[1]
    assert "verdict" in header and "median_run" not in header and "mw_p" not in header
    body = lines[2 : 2 + groups]
    assert len(body) == groups and all(len(x) < 160 for x in body)
    assert "not re-tested" in out and "only in baseline" not in out  # counted, not listed
    assert code in (0, 1)
    main(["compare", str(run), "--baseline", str(base), "--wide"])
    assert "median_run" in capsys.readouterr().out


def test_compare_says_plainly_when_no_group_overlaps(tmp_path, capsys):
    rng = np.random.default_rng(32)
    base = build_run(tmp_path, rng, run_id="b", modes=("AC V",), reps=5, delays=())
    other = (
        FakeMeter("Other", "OT-1", "CAT II 300 V (fictitious)", 90.0, 1e-10, 500.0, {"AC V": 1e-9}),
    )
    run = build_run(tmp_path, rng, run_id="o", meters=other, modes=("AC V",), reps=5, delays=())
    assert main(["compare", str(run), "--baseline", str(base)]) == 1
    out = capsys.readouterr().out
    assert "no group of" in out and "nothing was compared" in out


def test_missing_baseline_folder_is_a_one_line_error(pair, tmp_path, capsys):
    run, _base = pair
    missing = tmp_path / "no-such-run"
    assert main(["compare", str(run), "--baseline", str(missing)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"rig: error: {missing}: baseline folder not found"]


# --- options recorded beside derived files -------------------------------------------------


@pytest.fixture
def analysed(tmp_path):
    run = build_run(tmp_path, np.random.default_rng(33), modes=("AC V",), reps=6, delays=())
    analyze_run(run, confidence=0.9, coverage=0.95)
    return run


def test_analysis_records_its_options_and_inputs(analysed):
    from rig.analysis.provenance import mismatch, read_options

    rec = read_options(analysed / "groups.csv")
    assert rec is not None and rec.kind == "groups"
    assert rec.options["confidence"] == 0.9 and rec.options["coverage"] == 0.95
    assert set(rec.inputs) == {"metrics.parquet", "manifest.json"}
    assert mismatch(analysed / "groups.csv", {"confidence": 0.9}, {}) is None
    assert "confidence=0.9 (asked 0.95)" in mismatch(
        analysed / "groups.csv", {"confidence": 0.95}, {}
    )


def test_report_refuses_groups_older_than_the_metrics_and_rig_report_reanalyses(analysed, capsys):
    from rig.analysis.provenance import read_options

    m = pd.read_parquet(analysed / "metrics.parquet")
    m.loc[m.index[0], "charge_c"] *= 2  # the metrics change after groups.csv was written
    m.to_parquet(analysed / "metrics.parquet")
    with pytest.raises(RunFolderError, match=r"groups\.csv is older than metrics\.parquet"):
        write_report(analysed)
    # rig report analyses again, with the options groups.csv was made with
    assert main(["report", str(analysed)]) == 0
    assert "analysing again" in capsys.readouterr().out
    assert read_options(analysed / "groups.csv").options["confidence"] == 0.9
    assert (analysed / "report.html").exists()
    assert read_options(analysed / "report.html").kind == "report"
    assert read_options(analysed / "certificate.pdf").kind == "certificate"


def test_report_does_not_show_a_comparison_made_with_other_options(pair, capsys):
    """After `rig compare --metric energy_j --metric tau_s`, the report's equivalence section
    must not present those rows as the default comparison (it did)."""
    from rig.analysis.compare import compare_options
    from rig.analysis.provenance import sidecar_path

    run, base = pair
    assert main(["compare", str(run), "--baseline", str(base), "--metric", "energy_j",
                 "--metric", "tau_s"]) in (0, 1)  # fmt: skip
    capsys.readouterr()
    csv = next(run.glob("compare-*.csv"))
    assert json.loads(sidecar_path(csv).read_text())["options"]["metrics"] == ["energy_j", "tau_s"]
    page_html = write_report(run, base).read_text(encoding="utf-8")
    section = page_html.split("<section id='baseline'>")[1]
    text = _flat(section)
    assert "Not taken from disk" in text and "metrics=['energy_j', 'tau_s']" in text
    assert "energy" not in text.split("Equivalence")[1].split("Not taken")[0]
    want = compare_runs(run, base)
    assert f"{len(want)} group × metric comparisons" in text
    # with the default options on disk, the file is used as it is
    write_comparison(want, run, base, compare_options())
    text = _flat(write_report(run, base).read_text(encoding="utf-8"))
    assert "Not taken from disk" not in text and f"From {csv.name}" in text


# --- self-discharge ------------------------------------------------------------------------


def _band_crossing(d, q, level, conf=0.95):
    """Brute force from scipy.stats.linregress and the textbook one-sided band of the mean
    response, yhat + t(conf, n-2) s sqrt(1/n + (x - xbar)^2 / Sxx): first grid delay where the
    band is at or below log(level)."""
    fit = sps.linregress(d, np.log(q))
    n = d.size
    resid = np.log(q) - (fit.intercept + fit.slope * d)
    s = math.sqrt((resid**2).sum() / (n - 2))
    sxx = ((d - d.mean()) ** 2).sum()
    grid = np.linspace(0, 50, 500_001)
    band = (
        fit.intercept
        + fit.slope * grid
        + sps.t.ppf(conf, n - 2) * s * np.sqrt(1 / n + (grid - d.mean()) ** 2 / sxx)
    )
    best = (math.log(level) - fit.intercept) / fit.slope
    return best, grid[np.argmax(band <= math.log(level))]


def test_delay_to_reach_matches_scipy_regression_band():
    from rig.analysis.selfdischarge import delay_to_reach

    rng = np.random.default_rng(34)
    d = np.repeat([0.0, 0.5, 1.0, 2.0, 4.0], 4)
    q = 50e-6 * np.exp(-d / 1.3) * np.exp(rng.normal(0, 0.05, d.size))
    for level in (45e-6, 5e-6, 1e-7):  # inside, near the end, far beyond the sweep
        best, hi = delay_to_reach(d, q, level)
        ref_best, ref_hi = _band_crossing(d, q, level)
        assert best == pytest.approx(ref_best, rel=1e-9)
        assert hi == pytest.approx(ref_hi, abs=2e-4)  # the grid step
        assert hi > best
    assert delay_to_reach(d, q, 1.0) == (0.0, 0.0)  # already below at delay 0


def test_self_discharge_section_names_threshold_bound_and_extrapolation(tmp_path):
    # a meter whose input leaks slowly: its delay to safe lies beyond the longest delay
    slow = (FakeMeter("Slow leak", "SL-1", "CAT III 600 V (fictitious)", 120.0, 2e-10, 1e3,
                      {"AC V": 33e-9}, 400e6),)  # fmt: skip
    run = build_run(tmp_path, np.random.default_rng(35), meters=slow, modes=("AC V",), reps=5)
    analyze_run(run)
    sd = pd.read_csv(run / "selfdischarge.csv")
    assert {"safe_volts", "delay_to_safe_upper_s", "delay_to_hazard_s", "delay_to_45uc_s"} <= set(
        sd.columns
    )
    r = sd.iloc[0]
    assert r["delay_to_safe_upper_s"] >= r["delay_to_safe_s"] > r["max_delay_s"]
    page_html = write_report(run).read_text(encoding="utf-8")
    text = _flat(page_html.split("<section id='selfdischarge'>")[1].split("</section>")[0])
    safe = r["safe_volts"]
    assert f"safe residual voltage of {safe:g} V" in text
    assert "extrapolated" in text and "upper confidence bound" in text
    assert "hazardous-live voltage (60 V d.c.)" in text and "45 µC" in text
    svg = (run / "figures" / "selfdischarge.svg").read_text(encoding="utf-8")
    assert "extrapolated beyond the longest delay" in svg
    assert "stroke-dasharray" in svg  # the extrapolated part is dashed


# --- figures of a run at one voltage -------------------------------------------------------


def test_single_voltage_axis_starts_at_zero(tmp_path):
    from rig.report.figures import fig_vs_voltage

    run = build_run(
        tmp_path, np.random.default_rng(36), modes=("AC V",), volts=(600.0,), reps=5, delays=()
    )
    g = pd.read_csv(run / "groups.csv")
    colours = {m.name: c for m, c in zip(DEFAULT_METERS, ("#0072b2", "#d55e00"), strict=True)}
    fig = fig_vs_voltage(g, [("charge_c", "Charge", "C")], ["AC V"], colours, "t")
    lo, hi = fig.axes[0].get_xlim()
    assert lo == 0 and 600 < hi < 800  # not 570 .. 630 V


def test_no_peak_quoted_from_a_capture_that_does_not_resolve_it(tmp_path):
    """A run recorded with one slow capture only (as the self-discharge sweep is): its 50 ns
    samples cannot resolve the fixture's few-nanosecond pulse, so neither the glance nor the
    peak sections quote a peak current from it (the glance quoted 815 mA for a 26.6 A peak)."""
    run = build_run(
        tmp_path,
        np.random.default_rng(37),
        modes=("AC V",),
        reps=5,
        delays=(),
        captures=(("slow", 50e-9, 8000, -20e-6),),
    )
    analyze_run(run)
    m = pd.read_parquet(run / "metrics.parquet")
    assert (m["rise_s"].median() / m["dt_s"].median()) < 3  # the rule's premise, from the data
    page_html = write_report(run).read_text(encoding="utf-8")
    glance = page_html.split("<section id='glance'>")[1].split("</section>")[0]
    text = _flat(glance)
    assert "not resolved" in text and "does not resolve the pulse" in text
    for meter, peak in m.groupby("meter")["abs_peak_a"].median().items():
        assert f"{meter}: {eng(peak, 'A')}" not in text
    peaks = _flat(page_html.split("<section id='peaks'>")[1].split("</section>")[0])
    assert peaks.startswith("Peak current per event Not measured")
    assert not (run / "figures" / "peak-current.png").exists()


def test_repair_check_certificate_carries_the_equivalence_verdict(pair):
    """pdftotext (poppler-utils) reads the certificate of a re-test against its baseline."""
    import shutil
    import subprocess

    from rig.analysis.compare import verdict_table
    from rig.report.certificate import write_certificate

    exe = shutil.which("pdftotext")
    if exe is None:
        pytest.skip("pdftotext not installed (Debian package poppler-utils)")
    run, base = pair
    text = subprocess.run(
        [exe, "-layout", str(write_certificate(run, base)), "-"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    assert "Repair check certificate" in text and f"Baseline: {base.name}" in text
    table = verdict_table(compare_runs(run, base))
    same = (table["verdict"] == "equivalent").all()
    assert ("NOT equivalent" not in text) is bool(same)
    assert text.count("group: ") == len(table)
