"""Per-group statistics of event metrics, normal tolerance bounds and verdicts against limits.

A group is one (meter, serial, mode, capture, volts, load, delay_s): every event is recorded
once per scope capture (a fast one for the peak, a long one for the charge), and the
metrics of different captures are never pooled. Rows without a capture (runs recorded
before captures existed) belong to the capture "main". For each group and metric the
long-format table ``groups.csv`` (DEVELOPERS.md) holds the counts, mean, standard deviation,
median with a confidence interval, 95th and 99th percentiles, maximum, the one-sided normal
upper tolerance bound (UTL), and, for every limit that applies to the group, the share of
events over the limit and a verdict. The median's interval is a seeded percentile bootstrap
up to MEDIAN_CI_BOOTSTRAP_MAX values and the distribution-free order-statistic interval
beyond (column ``median_ci_method``); the percentiles are exact (numpy) at any n, which
needs only the group's n values in memory.

Signed metrics (``peak_a``, ``charge_c``) are summarised by magnitude: a limit on the peak
current or the charge is a limit on its size, whatever the polarity.

Tolerance factor (NIST/SEMATECH e-Handbook of Statistical Methods, 7.2.6.3): with N values,
mean m and standard deviation s, at least a fraction ``coverage`` of the population lies below
m + k1 s with confidence ``confidence``, where exactly
k1 = nct.ppf(confidence, N - 1, z_p sqrt(N)) / sqrt(N) (noncentral t), z_p = Phi^-1(coverage).
The approximate form is kept for comparison with published tables.

Verdicts: a limit {metric, max, statistic, modes, volts, loads, captures} passes when the chosen
statistic (utl by default, or max, p99, p95, median, mean) is at or below ``max``; with fewer
than ``min_events`` finite values the verdict is "insufficient". Rows without a limit have
no verdict (empty in the CSV).
"""

from __future__ import annotations

import functools
import logging
import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.store.schema import (  # re-exported: other modules import them here
    DEFAULT_CAPTURE,
    GROUP_KEYS,
)
from rigbase.errors import FileFormatError

__all__ = [
    "DEFAULT_CAPTURE",
    "DEFAULT_METRICS",
    "GROUP_KEYS",
    "GROUPS_COLUMNS",
    "STATISTICS",
    "MEDIAN_CI_BOOTSTRAP_MAX",
    "bootstrap_ci",
    "capture_roles",
    "group_stats",
    "limits_from_manifest",
    "median_ci_order_statistic",
    "median_ci_ranks",
    "tolerance_factor",
    "tolerance_factor_approx",
    "upper_tolerance_bound",
    "with_capture",
]

log = logging.getLogger(__name__)

GROUPS_COLUMNS: tuple[str, ...] = (
    "meter",
    "serial",
    "mode",
    "capture",
    "volts",
    "load",
    "delay_s",
    "metric",
    "n_planned",
    "n_captured",
    "mean",
    "std",
    "median",
    "median_ci_low",
    "median_ci_high",
    "p95",
    "p99",
    "max",
    "utl",
    "utl_confidence",
    "utl_coverage",
    "limit",
    "share_over_limit",
    "verdict",
    "median_ci_method",  # added later: columns are only ever appended
)
DEFAULT_METRICS: tuple[str, ...] = (
    "peak_a",
    "charge_c",
    "charge_record_c",
    "charge_tail_c",
    "charge_u_c",
    "energy_j",
    "rise_s",
    "decay_s",
    "tau_s",
    "fwhm_s",
    "pulses",
    "c_equiv_f",
    "r_equiv_ohm",
    "term1_tau_s",
    "term1_charge_c",
    "ind_hbm_volts",
    "ind_iec61010_charge_ratio",
)
SIGNED = frozenset({"peak_a", "charge_c", "charge_record_c", "charge_tail_c"})


def _expected_polarity(grp: pd.DataFrame, captured: pd.Series, v: np.ndarray) -> float:
    """+1 or -1: the sign most of the group's captured events discharge with (their
    ``polarity`` column, or without one the signs of the values ``v``; +1 if none)."""
    if "polarity" not in grp:
        return -1.0 if np.sum(np.sign(v)) < 0 else 1.0
    pol = pd.to_numeric(grp.loc[captured, "polarity"], errors="coerce").to_numpy(float)
    pol = pol[np.isfinite(pol) & (pol != 0)]
    return -1.0 if pol.size and np.sum(pol) < 0 else 1.0


STATISTICS = ("utl", "max", "p99", "p95", "median", "mean")
MIN_EVENTS = 5

#: Groups of more values than this get the order-statistic interval of the median
#: (:func:`median_ci_order_statistic`, no resampling, O(n)); up to it, the seeded percentile
#: bootstrap (:func:`bootstrap_ci`). Measured here: 2000 resamples of the median take
#: 0.05 s at n = 1000 and 0.6 s at n = 5000 per metric, with about 17 metrics per group.
MEDIAN_CI_BOOTSTRAP_MAX = 1000
MEDIAN_CI_METHODS = ("bootstrap", "order statistic")


@functools.lru_cache(maxsize=4096)
def tolerance_factor(n: int, coverage: float = 0.99, confidence: float = 0.95) -> float:
    """Exact one-sided normal tolerance factor k1 (noncentral t); NaN for n < 2. Cached: a
    run's groups mostly share n, and each noncentral-t quantile is an iterative solve."""
    # scipy.stats takes ~0.7 s to import; imported where used so `rig report` (which needs
    # none of it) does not pay for it
    from scipy import stats as sps

    if n < 2:
        return math.nan
    zp = sps.norm.ppf(coverage)
    return float(sps.nct.ppf(confidence, n - 1, zp * math.sqrt(n)) / math.sqrt(n))


def tolerance_factor_approx(n: int, coverage: float = 0.99, confidence: float = 0.95) -> float:
    """Approximate one-sided factor k1 = (z_p + sqrt(z_p^2 - a b)) / a (NIST 7.2.6.3)."""
    from scipy import stats as sps  # lazily: see tolerance_factor

    if n < 2:
        return math.nan
    zp, zg = sps.norm.ppf(coverage), sps.norm.ppf(confidence)
    a = 1.0 - zg**2 / (2.0 * (n - 1))
    b = zp**2 - zg**2 / n
    return float((zp + math.sqrt(zp**2 - a * b)) / a)


def upper_tolerance_bound(
    values: np.ndarray, coverage: float = 0.99, confidence: float = 0.95
) -> float:
    """mean + k1 x std (ddof 1) of the finite values, same unit as the values."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return math.nan
    return float(v.mean() + tolerance_factor(v.size, coverage, confidence) * v.std(ddof=1))


def bootstrap_ci(
    samples: Sequence[np.ndarray],
    statistic: Any,
    *,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    rng: np.random.Generator,
    block_elements: int = 4_000_000,
) -> tuple[float, float]:
    """Percentile bootstrap interval of ``statistic(*samples)``.

    Each sample is resampled with replacement independently; ``statistic`` takes arrays of
    shape (resamples, n_i) and reduces along axis -1. The resamples are drawn in blocks of at
    most ``block_elements`` indices (all samples together), so memory stays near
    ``block_elements`` x 16 bytes whatever n is (2000 x 50,000 at once took 1.6 GB). Every
    resample is still a full resample and the statistic is computed exactly on it; when all
    draws fit one block (n <= 2000 at 2000 resamples) they and the interval are the same as
    drawing everything at once.
    """
    arrays = [np.asarray(s, dtype=float) for s in samples]
    if any(a.size == 0 for a in arrays):
        return math.nan, math.nan
    rows = max(1, min(n_resamples, block_elements // sum(a.size for a in arrays)))
    dist = np.empty(n_resamples)
    for start in range(0, n_resamples, rows):
        k = min(rows, n_resamples - start)
        res = [a[rng.integers(0, a.size, size=(k, a.size))] for a in arrays]
        dist[start : start + k] = np.asarray(statistic(*res), dtype=float)
    alpha = 1.0 - confidence
    lo, hi = np.quantile(dist, [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(lo), float(hi)


def _median(x: np.ndarray) -> np.ndarray:
    return np.median(x, axis=-1)


def median_ci_ranks(n: int, confidence: float = 0.95) -> tuple[int, int] | None:
    """1-based ranks (r, s) of the order statistics X(r) <= X(s) that bound the median of
    n values with at least ``confidence``, or None when n is too small for any (n <= 5 at 95 %).

    Distribution-free interval of a quantile (W. J. Conover, Practical Nonparametric
    Statistics, 3rd ed., 1999, §3.2, from memory): the number Y of values below the
    population median is Binomial(n, 1/2), and [X(r), X(s)] covers the median with
    probability P(r <= Y <= s - 1) = 1 - 2 P(Y <= r - 1) for a continuous distribution (at
    least that with ties). r is the largest rank with P(Y <= r - 1) <= (1 - confidence) / 2,
    s = n + 1 - r (the binomial(n, 1/2) is symmetric)."""
    from scipy import stats as sps  # lazily: see tolerance_factor

    if n < 1:
        return None
    tail = (1.0 - confidence) / 2.0
    k = int(sps.binom.ppf(tail, n, 0.5))  # smallest k with P(Y <= k) >= tail
    if sps.binom.cdf(k, n, 0.5) > tail:
        k -= 1
    r = k + 1
    if r < 1:
        return None
    return r, n + 1 - r


def median_ci_order_statistic(values: np.ndarray, confidence: float = 0.95) -> tuple[float, float]:
    """The order-statistic interval of the median (:func:`median_ci_ranks`) of the finite
    values, same unit; NaN when there are too few. Two selections, O(n), no resampling."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    ranks = median_ci_ranks(v.size, confidence)
    if ranks is None:
        return math.nan, math.nan
    r, s = ranks
    part = np.partition(v, (r - 1, s - 1))
    return float(part[r - 1]), float(part[s - 1])


def with_capture(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with a ``capture`` column: missing or empty captures become "main" (runs
    recorded before captures existed had one capture). Returns a copy when it changes."""
    if "capture" not in frame.columns:
        frame = frame.copy()
        frame["capture"] = DEFAULT_CAPTURE
    elif frame["capture"].isna().any():
        frame = frame.copy()
        frame["capture"] = frame["capture"].astype(object).fillna(DEFAULT_CAPTURE)
    return frame


def limits_from_manifest(manifest: Mapping[str, Any], source: str | Path = "manifest.json"):
    """The limits of the run's resolved sequence (``manifest["sequence"]["limits"]``, else a
    top-level ``limits``), validated: a list of dicts with ``metric``, ``max``, ``statistic``
    (default utl) and optional ``modes``, ``volts``, ``loads``, ``captures`` lists (None: all)."""
    seq = manifest.get("sequence")
    raw = seq.get("limits") if isinstance(seq, Mapping) else None
    if raw is None:
        raw = manifest.get("limits")
    if raw is None:
        return []
    if not isinstance(raw, list):
        raise FileFormatError(source, "limits", "must be a list of tables")
    out = []
    for i, lim in enumerate(raw):
        key = f"limits[{i}]"
        if not isinstance(lim, Mapping):
            raise FileFormatError(source, key, "must be a table")
        if not isinstance(lim.get("metric"), str):
            raise FileFormatError(source, f"{key}.metric", "missing or not a string")
        try:
            value = float(lim["max"])
        except (KeyError, TypeError, ValueError):
            raise FileFormatError(source, f"{key}.max", "missing or not a number") from None
        stat = lim.get("statistic", "utl")
        if stat not in STATISTICS:
            raise FileFormatError(
                source, f"{key}.statistic", f"{stat!r} is not one of {', '.join(STATISTICS)}"
            )
        entry = {"metric": lim["metric"], "max": value, "statistic": stat}
        for sel in ("modes", "volts", "loads", "captures"):
            v = lim.get(sel)
            if v is not None and not isinstance(v, list):
                raise FileFormatError(source, f"{key}.{sel}", "must be a list")
            entry[sel] = v or None
        out.append(entry)
    return out


def _applies(
    limit: Mapping[str, Any], mode: Any, volts: Any, load: Any, capture: Any = DEFAULT_CAPTURE
) -> bool:
    if limit.get("modes") and mode not in limit["modes"]:
        return False
    if limit.get("captures") and capture not in limit["captures"]:
        return False
    if limit.get("loads") and load not in limit["loads"]:
        return False
    if limit.get("volts"):
        if volts is None:
            return False
        return any(math.isclose(float(volts), float(v), rel_tol=1e-9) for v in limit["volts"])
    return True


def _key(row: Mapping[str, Any]) -> tuple:
    return tuple(
        (row.get(k) or DEFAULT_CAPTURE) if k == "capture" else row.get(k) for k in GROUP_KEYS
    )


def _keys(metrics: pd.DataFrame) -> Iterator[tuple]:
    """:func:`_key` of every row of ``metrics``, one row at a time (not a dict per row of
    the whole table at once)."""
    cols = [metrics[k].tolist() if k in metrics.columns else None for k in GROUP_KEYS]
    for i in range(len(metrics)):
        yield _key({k: c[i] for k, c in zip(GROUP_KEYS, cols, strict=True) if c is not None})


def _summary(
    v: np.ndarray, confidence: float, coverage: float, rng: np.random.Generator, n_boot: int
) -> dict[str, Any]:
    nan = math.nan
    if v.size == 0:
        return dict(
            mean=nan,
            std=nan,
            median=nan,
            median_ci_low=nan,
            median_ci_high=nan,
            p95=nan,
            p99=nan,
            max=nan,
            utl=nan,
            median_ci_method=None,
        )
    if v.size > MEDIAN_CI_BOOTSTRAP_MAX:
        lo, hi = median_ci_order_statistic(v, confidence)
        method = MEDIAN_CI_METHODS[1]
    else:
        lo, hi = bootstrap_ci([v], _median, confidence=confidence, n_resamples=n_boot, rng=rng)
        method = MEDIAN_CI_METHODS[0]
    return {
        "mean": float(v.mean()),
        "std": float(v.std(ddof=1)) if v.size > 1 else nan,
        "median": float(np.median(v)),
        "median_ci_low": lo,
        "median_ci_high": hi,
        "p95": float(np.percentile(v, 95)),
        "p99": float(np.percentile(v, 99)),
        "max": float(v.max()),
        "utl": upper_tolerance_bound(v, coverage, confidence),
        "median_ci_method": method,
    }


def group_stats(
    metrics: pd.DataFrame,
    plan: Iterable[Mapping[str, Any]] | None,
    limits: Sequence[Mapping[str, Any]] = (),
    *,
    confidence: float = 0.95,
    coverage: float = 0.99,
    metric_names: Sequence[str] = DEFAULT_METRICS,
    rng: np.random.Generator,
    n_boot: int = 2000,
    min_events: int = MIN_EVENTS,
) -> pd.DataFrame:
    """The long-format group table (columns GROUPS_COLUMNS) of an analysed run.

    metrics: journal plus metric columns (rig.analysis.analyze.compute_metrics).
    plan: planned events (dicts with the group keys); None counts the journal's rows.
    limits: as returned by limits_from_manifest. A metric named only by a limit is added.
    rng: generator for the bootstrap (pass a seeded one for reproducible intervals).
    """
    names = list(metric_names) + [
        lim["metric"] for lim in limits if lim["metric"] not in metric_names
    ]
    missing = [m for m in names if m not in metrics.columns]
    if missing:
        raise KeyError(f"metrics table lacks column(s) {', '.join(missing)} named by a limit")
    planned: dict[tuple, int] = {}
    for key in _keys(metrics) if plan is None else map(_key, plan):
        planned[key] = planned.get(key, 0) + 1
    captured = ~metrics["flag_not_captured"].astype(bool)
    keys = list(GROUP_KEYS)
    # only the columns summarised here: a copy of the whole table (some 80 columns) would
    # cost memory in proportion to it for nothing
    used = [c for c in dict.fromkeys([*keys, *names, "polarity"]) if c in metrics.columns]
    frame = with_capture(metrics[used]).copy()
    for k in keys:  # groupby drops None keys; keep them as a visible value
        if k not in frame:
            frame[k] = None
    groups: dict[tuple, pd.Index] = {}
    for gkey, grp in frame.groupby(keys, sort=False, dropna=False):
        groups[tuple(None if _isnan(v) else v for v in gkey)] = grp.index
    for pkey in planned:  # planned but nothing journalled yet (an interrupted run)
        groups.setdefault(pkey, frame.index[:0])
    rows = []
    for gkey in sorted(groups, key=lambda k: tuple(map(str, k))):
        index = groups[gkey]
        gdict = dict(zip(keys, gkey, strict=True))
        n_planned = planned.get(gkey, len(index))
        n_captured = int(captured[index].sum())
        grp = frame.loc[index]
        for name in names:
            v = pd.to_numeric(grp.loc[captured[index], name], errors="coerce").to_numpy(float)
            v = v[np.isfinite(v)]
            if name in SIGNED:
                # signed metrics are taken in the group's expected polarity (the majority
                # polarity of its events), never folded by abs(): an event of the wrong
                # sign stays negative and pulls the summary down, as it should
                v = v * _expected_polarity(grp, captured[index], v)
            summ = _summary(v, confidence, coverage, rng, n_boot)
            base = {
                **gdict,
                "metric": name,
                "n_planned": n_planned,
                "n_captured": n_captured,
                **summ,
                "utl_confidence": confidence,
                "utl_coverage": coverage,
            }
            applicable = [
                lim
                for lim in limits
                if lim["metric"] == name
                and _applies(lim, gdict["mode"], gdict["volts"], gdict["load"], gdict["capture"])
            ]
            if not applicable:
                rows.append(
                    {**base, "limit": math.nan, "share_over_limit": math.nan, "verdict": None}
                )
            for lim in applicable:
                share = float(np.mean(v > lim["max"])) if v.size else math.nan
                if v.size < min_events or not np.isfinite(summ[lim["statistic"]]):
                    verdict = "insufficient"
                else:
                    verdict = "pass" if summ[lim["statistic"]] <= lim["max"] else "fail"
                rows.append(
                    {**base, "limit": lim["max"], "share_over_limit": share, "verdict": verdict}
                )
    out = pd.DataFrame(rows, columns=list(GROUPS_COLUMNS))
    log.info("%s group x metric rows, %s verdicts", len(out), int(out["verdict"].notna().sum()))
    return out


def _isnan(v: Any) -> bool:
    return isinstance(v, float) and math.isnan(v)


def capture_roles(m: pd.DataFrame) -> tuple[str, str]:
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
