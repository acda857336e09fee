"""The dataset across runs: catalog, idempotent build, and the same answers from every engine.

References: statsmodels (a general-purpose statistics library) for the one-way ANOVA sums of
squares (``anova_lm``) and the REML variance components of the random-intercept model
(``MixedLM``), which equal the ANOVA estimates for balanced data; DuckDB and Dask as
independent engines for the group statistics; the per-run analysis (rig.analysis.analyze,
groups.csv) for the same events; the I-MR limits by hand from NIST/SEMATECH e-Handbook
6.3.2.2 (x-bar +/- 2.66 MR-bar, MR UCL 3.267 MR-bar; from memory).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from rig.dataset import (
    CHART_NAME,
    build_dataset,
    events_dir,
    group_summary,
    individuals_chart,
    list_runs,
    load_events,
    one_way_random_effects,
    read_runs_table,
    variance_split,
)
from tests.dataset_fixtures import write_metrics_run

T0 = datetime(2026, 11, 2, 8, 0, tzinfo=UTC)
UNITS = (  # model, serial, unit offset (A)
    ("Candidate A", "A-0001", 0.0),
    ("Candidate A", "A-0002", 0.8),
    ("Candidate A", "A-0003", -0.5),
    ("Candidate B", "B-0001", 3.0),
    ("Candidate B", "B-0002", 2.2),
)


@pytest.fixture
def results(tmp_path):
    """Two runs per unit a week apart, plus one run not yet analysed."""
    rng = np.random.default_rng(14)
    root = tmp_path / "results"
    for week in range(2):
        for model, serial, off in UNITS:
            write_metrics_run(
                root,
                f"2026110{2 + week}-0800-{serial}",
                rng,
                model=model,
                serial=serial,
                started=T0 + timedelta(days=7 * week, hours=len(serial)),
                unit_offset=off,
            )
    pending = write_metrics_run(
        root, "20261120-0800-A-0001", rng, serial="A-0001", started=T0 + timedelta(days=18)
    )
    (pending / "metrics.parquet").unlink()
    return root


def test_catalog_lists_every_run_with_status_meter_counts_and_dates(results):
    cat = list_runs(results)
    assert len(cat) == 11 and list(cat["run_id"]) == sorted(cat["run_id"])
    row = cat.iloc[0]
    assert row["status"] == "complete" and row["models"] == "Candidate A"
    assert row["n_planned"] == row["n_events"] == 160 and row["n_captured"] == 159
    assert row["started"].startswith("2026-11-02") and row["ended"]
    assert cat["analysed"].sum() == 10


def test_build_is_idempotent_and_every_table_says_where_its_rows_came_from(results, tmp_path):
    import pyarrow.parquet as pq

    ds = tmp_path / "ds"
    runs = list(list_runs(results)["path"])
    first = build_dataset(ds, runs)
    assert len(first.added) == 10 and list(first.skipped.values()) == [
        "not analysed (run `rig analyze` first)"
    ]
    files = {p.name: p.read_bytes() for p in events_dir(ds).iterdir()}
    again = build_dataset(ds, runs + runs[:3])  # adding a run twice adds nothing
    assert not again.added and not again.replaced and len(again.unchanged) == 13
    assert {p.name: p.read_bytes() for p in events_dir(ds).iterdir()} == files
    assert len(read_runs_table(ds)) == 10
    table = pq.read_table(sorted(events_dir(ds).iterdir())[0])  # one file read on its own
    assert {"run_id", "model", "serial", "time"} <= set(table.column_names)
    assert str(table.schema.field("time").type) == "timestamp[us, tz=UTC]"
    # a re-analysed run replaces its file, nothing else changes
    write_metrics_run(results / "x", "r", np.random.default_rng(0), started=T0)
    rerun = results / runs[0].split("/")[-1]
    (results / "x" / "r" / "metrics.parquet").replace(rerun / "metrics.parquet")
    third = build_dataset(ds, runs)
    assert third.replaced == [rerun.name] and len(third.unchanged) == 9


def test_duckdb_reads_the_dataset_as_it_is(results, tmp_path):
    import duckdb

    ds = tmp_path / "ds"
    build_dataset(ds, list(list_runs(results)["path"]))
    with duckdb.connect() as con:
        n, runs, models = con.execute(
            f"SELECT count(*), count(DISTINCT run_id), count(DISTINCT model) "
            f"FROM read_parquet('{events_dir(ds)}/*.parquet')"
        ).fetchone()
    assert (n, runs, models) == (1600, 10, 2)


def test_pandas_duckdb_and_dask_give_the_same_group_statistics(results, tmp_path):
    ds = tmp_path / "ds"
    build_dataset(ds, list(list_runs(results)["path"]))
    for by in (["model", "mode", "capture", "volts"], ["model", "serial", "capture"]):
        ref = group_summary(ds, "peak_a", by, engine="pandas")
        duck = group_summary(ds, "peak_a", by, engine="duckdb")
        pd.testing.assert_frame_equal(duck, ref, check_exact=False, rtol=1e-12, atol=0)
    by = ["model", "mode", "capture", "volts"]
    ref = group_summary(ds, "charge_c", by, {"capture": "charge"}, engine="pandas")
    dask = group_summary(ds, "charge_c", by, {"capture": "charge"}, engine="dask")
    assert len(ref) == 8 and ref["n"].sum() > 300
    pd.testing.assert_frame_equal(dask, ref, check_exact=False, rtol=1e-12, atol=0)


def test_dataset_summary_equals_the_per_run_analysis_for_the_same_events(tmp_path):
    from rig.analysis.analyze import analyze_run
    from tests.unit.test_analysis import make_run

    runs = []
    for k, serial in enumerate(("SN-0001", "SN-0002")):
        run = make_run(tmp_path, f"r{k}", rng=np.random.default_rng(k), serial=serial, drop={2})
        analyze_run(run)
        runs.append(run)
    ds = tmp_path / "ds"
    build_dataset(ds, runs)
    keys = ["serial", "mode", "capture", "volts", "load", "delay_s"]
    for metric in ("peak_a", "charge_c", "tau_s", "energy_j"):
        got = group_summary(ds, metric, keys, engine="duckdb")
        groups = pd.concat([pd.read_csv(r / "groups.csv") for r in runs])
        want = groups[groups["metric"] == metric].sort_values(keys).reset_index(drop=True)
        assert len(got) == len(want) == 4
        for col in ("mean", "std", "median", "max"):
            np.testing.assert_allclose(got[col], want[col], rtol=1e-9, err_msg=f"{metric} {col}")


def test_variance_split_matches_statsmodels_anova_and_reml(results, tmp_path):
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    ds = tmp_path / "ds"
    build_dataset(ds, list(list_runs(results)["path"]))
    where = {"model": "Candidate A", "mode": "AC V", "capture": "peak", "volts": 1000.0}
    ev = load_events(ds, where=where)
    split = variance_split(ev, "abs_peak_a")
    assert len(split) == 1
    row = split.iloc[0]
    data = ev[~ev["flag_not_captured"]][["serial", "abs_peak_a"]].dropna()
    data = data.rename(columns={"abs_peak_a": "y"})
    table = anova_lm(smf.ols("y ~ C(serial)", data).fit())  # statsmodels: one-way ANOVA
    assert row["ms_between"] == pytest.approx(table["mean_sq"].iloc[0], rel=1e-10)
    assert row["ms_within"] == pytest.approx(table["mean_sq"].iloc[1], rel=1e-10)
    assert row["p"] == pytest.approx(table["PR(>F)"].iloc[0], rel=1e-8)
    # balanced data: ANOVA estimates = REML variance components (statsmodels MixedLM)
    bal = data.groupby("serial").head(30)
    assert bal.groupby("serial").size().nunique() == 1
    ref = one_way_random_effects([g["y"].to_numpy() for _, g in bal.groupby("serial")])
    fit = smf.mixedlm("y ~ 1", bal, groups=bal["serial"]).fit(reml=True)
    assert ref["var_between"] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-4)
    assert ref["var_within"] == pytest.approx(float(fit.scale), rel=1e-4)
    # the invented units differ by about 0.65 A against 0.4 A of event noise
    assert 0.5 < row["share_between"] < 1.0


def test_unequal_units_use_n0_and_a_negative_estimate_is_zero():
    a, b = np.array([1.0, 2.0, 3.0]), np.array([2.0, 3.0, 4.0, 5.0, 6.0])
    got = one_way_random_effects([a, b])
    n0 = (8 - (9 + 25) / 8) / 1  # Searle et al. 1992, 3.5: n0 = (N - sum n_i^2 / N)/(a - 1)
    assert got["n0"] == pytest.approx(n0)
    grand = 26 / 8
    ms_b = 3 * (2 - grand) ** 2 + 5 * (4 - grand) ** 2
    ms_w = (2 + 10) / 6
    assert got["ms_between"] == pytest.approx(ms_b) and got["ms_within"] == pytest.approx(ms_w)
    assert got["var_between"] == pytest.approx((ms_b - ms_w) / n0)
    same = one_way_random_effects([np.array([0.0, 2.0]), np.array([0.1, 1.9])])
    assert same["var_between"] == 0.0 and same["share_between"] == 0.0


def test_individuals_chart_limits_come_from_the_baseline_runs_only():
    vals = [10.0, 10.4, 9.8, 10.2, 10.1, 13.0]  # the last run drifted
    ev = pd.DataFrame(
        {
            "serial": "A-1",
            "run_id": [f"r{k}" for k in range(6)],
            "time": [T0 + timedelta(days=k) for k in range(6)],
            "event": 0,
            "abs_peak_a": vals,
            "flag_not_captured": False,
        }
    )
    chart = individuals_chart(ev, "abs_peak_a", ["r0", "r1", "r2", "r3"], by=["serial"])
    base = np.array(vals[:4])
    mrbar = np.abs(np.diff(base)).mean()  # (0.4 + 0.6 + 0.4) / 3
    assert chart["center"].iloc[0] == pytest.approx(base.mean())
    assert chart["ucl"].iloc[0] == pytest.approx(base.mean() + 2.66 * mrbar, rel=1e-3)
    assert chart["lcl"].iloc[0] == pytest.approx(base.mean() - 2.66 * mrbar, rel=1e-3)
    assert chart["mr_ucl"].iloc[0] == pytest.approx(3.267 * mrbar)
    assert list(chart["out"]) == [False] * 5 + [True]
    assert list(chart["baseline"]) == [True] * 4 + [False] * 2
    assert "6.3.2.2" in CHART_NAME


def test_query_errors_name_the_problem(tmp_path):
    from rigbase.errors import RigError

    with pytest.raises(RigError, match="no runs in this dataset"):
        group_summary(tmp_path, "abs_peak_a", engine="duckdb")
    with pytest.raises(RigError, match="nonsense"):
        group_summary(tmp_path, "nonsense")


def test_catalog_and_query_commands(results, tmp_path, capsys):
    from rig.cli import main

    ds = tmp_path / "ds"
    assert main(["catalog", str(results), "--dataset", str(ds)]) == 0
    text = capsys.readouterr().out
    assert "10 added" in text and "1 skipped" in text and "Candidate B" in text
    assert main(["catalog", str(results), "--dataset", str(ds)]) == 0
    assert "0 added, 0 replaced, 10 unchanged" in capsys.readouterr().out
    out_csv = tmp_path / "q.csv"
    args = ["query", str(ds), "--per", "unit", "--where", "capture=peak", "--csv", str(out_csv)]
    assert main([*args, "--engine", "duckdb"]) == 0
    got = pd.read_csv(out_csv)
    assert set(got["serial"]) == {s for _, s, _ in UNITS} and (got["capture"] == "peak").all()
    assert main(["query", str(ds), "--variance", "--where", "volts=1000"]) == 0
    assert "share_between" in capsys.readouterr().out
    first_week = [f"20261102-0800-{s}" for _, s, _ in UNITS]
    trend = ["query", str(ds), "--trend", "--where", "capture=peak", "--level", "event"]
    assert main([*trend, *sum((["--baseline", r] for r in first_week), [])]) == 0
    assert "6.3.2.2" in capsys.readouterr().out
    assert main(["query", str(ds), "--where", "volts=high"]) == 2  # bad input: exit 2
    assert "volts" in capsys.readouterr().err


def test_metrics_on_dask_equal_the_single_process_analysis(tmp_path):
    import shutil

    from rig.analysis.analyze import analyze_run
    from rig.dataset import analyze_runs
    from tests.unit.test_analysis import make_run

    runs = [
        make_run(tmp_path / "a", f"r{k}", rng=np.random.default_rng(k), serial=f"SN-{k}")
        for k in range(3)
    ]
    single = tmp_path / "single"
    for run in runs:
        shutil.copytree(run, single / run.name)
        analyze_run(single / run.name)
    written = analyze_runs(runs)
    assert written == [r / "metrics.parquet" for r in runs]
    for run in runs:
        got = pd.read_parquet(run / "metrics.parquet")
        want = pd.read_parquet(single / run.name / "metrics.parquet")
        pd.testing.assert_frame_equal(got, want)
        assert (run / "groups.csv").read_text() == (single / run.name / "groups.csv").read_text()
