"""A run against a baseline run: per group and metric, is it the same, different, or unclear?

Groups are matched on (meter, mode, capture, volts, load, delay_s), the group keys of
rig.analysis.stats without the serial: the serial is left out, since a
repaired meter is compared with the baseline run of its model, often another unit (the
serials of both sides are listed). Per group and metric (magnitudes; default peak_a, charge_c,
energy_j):

- ratio of medians (run / baseline) with a percentile-bootstrap interval (seeded);
- Mann-Whitney U rank test, two-sided (scipy.stats.mannwhitneyu);
- equivalence by two one-sided Welch t tests (TOST) on the log values: the ratio of the
  geometric means (run / baseline) lies within [1 / (1 + tolerance), 1 + tolerance], margins
  symmetric on the log scale (+-log(1 + tolerance)), so that swapping run and baseline gives
  the same verdict (10 %: 0.909 .. 1.1);
- verdict: "equivalent" when TOST rejects non-equivalence at level 1 - confidence,
  else "different" when the rank test rejects equality at that level, else "inconclusive".
  A group in one run only is "only in run" or "only in baseline".
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from rig.analysis.stats import GROUP_KEYS, bootstrap_ci, capture_roles, with_capture
from rig.store.atomic import atomic_write
from rig.store.runfolder import read_manifest
from rig.store.tables import read_parquet_table
from rigbase.errors import RunFolderError

__all__ = [
    "COMPARE_COLUMNS",
    "COMPARE_KEYS",
    "METRIC_CAPTURE_ROLE",
    "all_equivalent",
    "compare_runs",
    "compare_options",
    "compare_samples",
    "comparison_inputs",
    "comparison_path",
    "equivalence_margins",
    "no_overlap",
    "tost_log",
    "verdict_table",
    "write_comparison",
]

log = logging.getLogger(__name__)

#: Which capture each metric is compared on when a run has several (see compare_runs).
METRIC_CAPTURE_ROLE: dict[str, str] = {
    "peak_a": "peak",
    "abs_peak_a": "peak",
    "energy_j": "peak",
    "charge_c": "charge",
}
COMPARE_KEYS: tuple[str, ...] = tuple(k for k in GROUP_KEYS if k != "serial")
COMPARE_COLUMNS: tuple[str, ...] = (
    *COMPARE_KEYS,
    "metric",
    "serials_run",
    "serials_baseline",
    "n_run",
    "n_baseline",
    "median_run",
    "median_baseline",
    "ratio",
    "ratio_ci_low",
    "ratio_ci_high",
    "mw_u",
    "mw_p",
    "tost_p",
    "tolerance",
    "verdict",
)
#: Metrics the repair gate compares by default: the two the report leads with. Energy into a
#: low-ohm load follows contact bounce from event to event, so its equivalence within +-10 %
#: often cannot be shown with a few dozen events; ask for it with ``metrics``.
DEFAULT_METRICS: tuple[str, ...] = ("peak_a", "charge_c")


def equivalence_margins(tolerance: float) -> tuple[float, float]:
    """(lower, upper) margins of the geometric-mean ratio: 1 / (1 + tolerance), 1 + tolerance.

    Symmetric on the log scale (+-log(1 + tolerance)): a run 10 % above its baseline is as far
    from it as the baseline is from the run, whichever is called the baseline."""
    return 1.0 / (1.0 + tolerance), 1.0 + tolerance


def tost_log(run: np.ndarray, base: np.ndarray, tolerance: float = 0.10) -> float:
    """p-value of the two one-sided Welch t tests that the geometric-mean ratio run/base lies
    within :func:`equivalence_margins` (the larger of the two one-sided p-values).

    Values must be positive; NaN with fewer than two values on either side.
    """
    # scipy takes ~0.7 s to import; imported where used so that importing rig.analysis
    # (as `rig report` does) does not pay for it
    from scipy import stats as sps

    a, b = np.log(np.asarray(run, float)), np.log(np.asarray(base, float))
    if a.size < 2 or b.size < 2:
        return math.nan
    lo, hi = (math.log(x) for x in equivalence_margins(tolerance))
    if a.var() == 0 and b.var() == 0:  # no scatter (e.g. clipped peaks): decide by the means
        return 0.0 if lo < a.mean() - b.mean() < hi else 1.0
    p_lower = sps.ttest_ind(a - lo, b, equal_var=False, alternative="greater").pvalue
    p_upper = sps.ttest_ind(a - hi, b, equal_var=False, alternative="less").pvalue
    return float(max(p_lower, p_upper))


def _ratio_of_medians(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.median(a, axis=-1) / np.median(b, axis=-1)


def compare_samples(
    run: np.ndarray,
    base: np.ndarray,
    *,
    tolerance: float = 0.10,
    confidence: float = 0.95,
    rng: np.random.Generator,
    n_boot: int = 2000,
) -> dict[str, float | str]:
    """Ratio of medians with its bootstrap interval, rank test, TOST and verdict for two
    samples of one metric (positive values; non-finite and non-positive ones are dropped)."""
    from scipy import stats as sps  # lazily: see tost_log

    a = np.asarray(run, float)
    b = np.asarray(base, float)
    a, b = a[np.isfinite(a) & (a > 0)], b[np.isfinite(b) & (b > 0)]
    nan = math.nan
    out: dict[str, float | str] = {
        "n_run": a.size,
        "n_baseline": b.size,
        "median_run": nan,
        "median_baseline": nan,
        "ratio": nan,
        "ratio_ci_low": nan,
        "ratio_ci_high": nan,
        "mw_u": nan,
        "mw_p": nan,
        "tost_p": nan,
        "tolerance": tolerance,
        "verdict": "inconclusive",
    }
    if a.size == 0 or b.size == 0:
        return out
    out["median_run"], out["median_baseline"] = float(np.median(a)), float(np.median(b))
    out["ratio"] = out["median_run"] / out["median_baseline"]
    lo, hi = bootstrap_ci(
        [a, b], _ratio_of_medians, confidence=confidence, n_resamples=n_boot, rng=rng
    )
    out["ratio_ci_low"], out["ratio_ci_high"] = lo, hi
    mw = sps.mannwhitneyu(a, b, alternative="two-sided")
    out["mw_u"], out["mw_p"] = float(mw.statistic), float(mw.pvalue)
    out["tost_p"] = tost_log(a, b, tolerance)
    alpha = 1.0 - confidence
    if out["tost_p"] < alpha:
        out["verdict"] = "equivalent"
    elif out["mw_p"] < alpha:
        out["verdict"] = "different"
    return out


def _load_metrics(run_dir: Path, what: str = "run") -> pd.DataFrame:
    if not run_dir.is_dir():
        raise RunFolderError(f"{run_dir}: {what} folder not found")
    if not (run_dir / "manifest.json").exists():
        raise RunFolderError(f"{run_dir}: not a run folder (no manifest.json) given as {what}")
    path = run_dir / "metrics.parquet"
    if path.exists():
        return with_capture(read_parquet_table(path))
    from rig.analysis.analyze import compute_metrics

    log.info("%s is not analysed; computing its metrics in memory", run_dir)
    return compute_metrics(run_dir)


def _serials(frame: pd.DataFrame) -> str:
    if "serial" not in frame:
        return ""
    return "+".join(sorted({str(s) for s in frame["serial"].dropna()}))


def compare_runs(
    run_dir: str | Path,
    baseline_dir: str | Path,
    tolerance: float = 0.10,
    metrics: Sequence[str] = DEFAULT_METRICS,
    *,
    confidence: float = 0.95,
    seed: int = 0,
    n_boot: int = 2000,
) -> pd.DataFrame:
    """Compare a run with a baseline run, group by group (columns COMPARE_COLUMNS).

    With several scope captures, each metric is compared on the capture meant for it
    (:data:`METRIC_CAPTURE_ROLE`, roles from :func:`rig.analysis.stats.capture_roles`): |peak| and
    energy on the capture with the finest sample interval, charge on the one with the
    longest record; the other pairings measure the wrong thing (a 5 MHz record's peak of a
    nanosecond pulse) and are left out.

    tolerance: equivalence margin of the geometric-mean ratio, symmetric on the log scale
        (0.10: within 1/1.1 .. 1.1, see :func:`equivalence_margins`).
    metrics: metric columns to compare (by magnitude). seed: bootstrap generator seed.
    """
    run_dir, baseline_dir = Path(run_dir), Path(baseline_dir)
    if not 0 < tolerance < 1:
        raise ValueError(f"tolerance must lie between 0 and 1, got {tolerance!r}")
    run, base = _load_metrics(run_dir), _load_metrics(baseline_dir, "baseline")
    for name, frame, where in (
        (m, f, d) for m in metrics for f, d in ((run, run_dir), (base, baseline_dir))
    ):
        if name not in frame:
            raise RunFolderError(f"{where / 'metrics.parquet'} [{name}]: no such metric column")
    rng = np.random.default_rng(seed)
    keys = list(COMPARE_KEYS)
    for frame in (run, base):
        for k in keys:
            if k not in frame:
                frame[k] = None
    # with several captures, each metric is compared on the capture meant for it
    peak_cap, charge_cap = capture_roles(run)
    several = run["capture"].nunique(dropna=False) > 1 if "capture" in run else False

    def meant_for(capture: object, metric: str) -> bool:
        role = METRIC_CAPTURE_ROLE.get(metric)
        if not several or role is None:
            return True
        return str(capture) == (peak_cap if role == "peak" else charge_cap)

    groups_run = {k: g for k, g in run.groupby(keys, dropna=False, sort=True)}
    groups_base = {k: g for k, g in base.groupby(keys, dropna=False, sort=True)}
    rows = []
    for key in sorted(set(groups_run) | set(groups_base), key=lambda k: tuple(map(str, k))):
        gr, gb = groups_run.get(key), groups_base.get(key)
        for name in metrics:
            if not meant_for(key[keys.index("capture")], name):
                continue
            row = dict(zip(keys, key, strict=True))
            row["metric"] = name
            row["serials_run"] = _serials(gr) if gr is not None else ""
            row["serials_baseline"] = _serials(gb) if gb is not None else ""
            if gr is None or gb is None:
                n_run = _n(gr, name)
                n_base = _n(gb, name)
                row.update(
                    n_run=n_run,
                    n_baseline=n_base,
                    tolerance=tolerance,
                    verdict="only in baseline" if gr is None else "only in run",
                )
            else:
                a = np.abs(pd.to_numeric(gr[name], errors="coerce").to_numpy(float))
                b = np.abs(pd.to_numeric(gb[name], errors="coerce").to_numpy(float))
                row.update(
                    compare_samples(
                        a, b, tolerance=tolerance, confidence=confidence, rng=rng, n_boot=n_boot
                    )
                )
            rows.append(row)
    out = pd.DataFrame(rows, columns=list(COMPARE_COLUMNS))
    log.info("compared %s with %s: %s rows", run_dir, baseline_dir, len(out))
    return out


def _n(frame: pd.DataFrame | None, name: str) -> int:
    if frame is None:
        return 0
    v = pd.to_numeric(frame[name], errors="coerce").to_numpy(float)
    return int((np.isfinite(v) & (v != 0)).sum())


def _run_id(run_dir: Path) -> str:
    try:
        manifest = read_manifest(run_dir)
    except RunFolderError:
        return run_dir.name
    rid = manifest.get("run_id") or manifest.get("id")
    return str(rid) if rid else run_dir.resolve().name


def compare_options(
    tolerance: float = 0.10,
    metrics: Sequence[str] = DEFAULT_METRICS,
    *,
    confidence: float = 0.95,
    seed: int = 0,
    n_boot: int = 2000,
) -> dict[str, object]:
    """The options of :func:`compare_runs` as recorded beside compare-<id>.csv (the report
    asks for the same dictionary and reuses the file only when they match)."""
    return {
        "tolerance": tolerance,
        "metrics": list(metrics),
        "confidence": confidence,
        "seed": seed,
        "n_boot": n_boot,
    }


def comparison_inputs(run_dir: str | Path, baseline_dir: str | Path) -> dict[str, Path]:
    """The files a comparison is made from (their checksums go into its options record)."""
    run, base = Path(run_dir), Path(baseline_dir)
    return {
        "metrics.parquet": run / "metrics.parquet",
        "journal.jsonl": run / "journal.jsonl",
        "baseline/metrics.parquet": base / "metrics.parquet",
        "baseline/journal.jsonl": base / "journal.jsonl",
    }


def comparison_path(run_dir: str | Path, baseline_dir: str | Path) -> Path:
    """``<run>/compare-<baseline-run-id>.csv``."""
    return Path(run_dir) / f"compare-{_run_id(Path(baseline_dir))}.csv"


def write_comparison(
    df: pd.DataFrame,
    run_dir: str | Path,
    baseline_dir: str | Path,
    options: dict[str, object] | None = None,
) -> Path:
    """Write a comparison (from :func:`compare_runs`) as ``compare-<baseline-run-id>.csv``
    into the run folder, with the options that made it (default: :func:`compare_options`'s
    defaults) and its inputs' checksums beside it (rig.analysis.provenance); returns its path."""
    from rig.analysis.provenance import record_options

    path = comparison_path(run_dir, baseline_dir)
    # atomic: a comparison killed half-way leaves the previous file, never a torn one
    atomic_write(path, lambda p: df.to_csv(p, index=False))
    opts = dict(options if options is not None else compare_options())
    opts["baseline"] = str(Path(baseline_dir).resolve())
    record_options(path, "compare", opts, comparison_inputs(run_dir, baseline_dir))
    log.info("wrote %s", path)
    return path


def no_overlap(df: pd.DataFrame) -> bool:
    """True when no group of the run has a matching baseline group (nothing was compared)."""
    return not len(df) or df["verdict"].isin(["only in run", "only in baseline"]).all()


def verdict_table(df: pd.DataFrame) -> pd.DataFrame:
    """One line per re-tested group (meter, mode, voltage, load, delay present in both runs;
    the captures of a group share its line): the verdict per metric with its ratio of
    medians, and the group's overall verdict (equivalent only when every metric is)."""
    both = df[~df["verdict"].isin(["only in run", "only in baseline"])] if len(df) else df
    keys = [k for k in COMPARE_KEYS if k in df.columns and k != "capture"]
    metrics = list(dict.fromkeys(both["metric"])) if len(both) else []
    rows = []
    for key, g in both.groupby(keys, dropna=False, sort=False):
        row: dict[str, object] = dict(zip(keys, key, strict=True))
        for name in metrics:
            row[name] = ""
        for r in g.itertuples():
            ratio = f"{r.ratio:.3f}" if r.ratio == r.ratio else "-"
            row[str(r.metric)] = f"{r.verdict} ({ratio})"
        v = set(g["verdict"])
        row["verdict"] = (
            "equivalent"
            if v == {"equivalent"}
            else ("different" if "different" in v else "inconclusive")
        )
        rows.append(row)
    return pd.DataFrame(rows, columns=[*keys, *metrics, "verdict"])


def all_equivalent(df: pd.DataFrame) -> bool:
    """The repair gate: True when every group of the run was compared and found equivalent.

    Groups only in the baseline do not count against the run (a repair check may re-test a
    subset of a qualification; they are still listed); a group only in the run does, since
    nothing vouches for it. False when nothing was compared."""
    judged = df[df["verdict"] != "only in baseline"] if len(df) else df
    return bool(len(judged)) and bool((judged["verdict"] == "equivalent").all())
