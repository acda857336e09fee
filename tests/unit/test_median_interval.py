"""The median's confidence interval of large groups: the distribution-free order-statistic
interval (W. J. Conover, Practical Nonparametric Statistics, 3rd ed., 1999, §3.2, from
memory), checked against scipy.stats.binom (the ranks' defining binomial probabilities),
Conover's normal approximation of the ranks, a seeded coverage simulation and
scipy.stats.bootstrap; and the switch in groups.csv (column ``median_ci_method``).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from rig.analysis.stats import (
    GROUPS_COLUMNS,
    MEDIAN_CI_BOOTSTRAP_MAX,
    group_stats,
    median_ci_order_statistic,
    median_ci_ranks,
)

# groups.csv as written before the interval's method was recorded: columns are appended only
COLUMNS_BEFORE = (
    "meter serial mode capture volts load delay_s metric n_planned n_captured mean std median "
    "median_ci_low median_ci_high p95 p99 max utl utl_confidence utl_coverage limit "
    "share_over_limit verdict"
).split()


@pytest.mark.parametrize("n", [6, 7, 10, 25, 100, 1001, 4999, 100_000])
@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_ranks_are_the_narrowest_that_reach_the_confidence(n, confidence):
    ranks = median_ci_ranks(n, confidence)
    if ranks is None:  # even [X(1), X(n)] falls short: 1 - 2 / 2^n < confidence
        assert 1.0 - 2.0 * 0.5**n < confidence
        return
    r, s = ranks
    assert 1 <= r <= s <= n and s == n + 1 - r
    binom = sps.binom(n, 0.5)  # Y: values below the population median
    cover = binom.cdf(s - 1) - binom.cdf(r - 1)  # P(r <= Y <= s - 1)
    assert cover >= confidence
    if r + 1 <= n - r:  # one rank further in on each side would fall short
        assert binom.cdf(n - r - 1) - binom.cdf(r) < confidence
    # Conover's large-sample rank: n/2 + z_{alpha/2} sqrt(n)/2 (normal approximation)
    if n >= 100:
        approx = n / 2 + sps.norm.ppf((1 - confidence) / 2) * math.sqrt(n) / 2
        assert abs(r - approx) <= 1.5


def test_too_few_values_give_no_interval():
    assert median_ci_ranks(5, 0.95) is None  # 1 - 2/32 = 0.9375 < 0.95
    assert median_ci_ranks(6, 0.95) == (1, 6)  # 1 - 2/64 = 0.969
    lo, hi = median_ci_order_statistic(np.arange(5.0), 0.95)
    assert math.isnan(lo) and math.isnan(hi)


def test_interval_is_the_ranked_values_ignoring_non_finite_ones():
    x = np.random.default_rng(40).permutation(np.arange(1.0, 2002.0))  # 1 .. 2001
    x = np.concatenate([x, [np.nan, np.inf]])
    r, s = median_ci_ranks(2001, 0.95)
    assert median_ci_order_statistic(x, 0.95) == (float(r), float(s))


def test_coverage_in_a_seeded_simulation():
    # lognormal(0, 0.5): population median exactly 1; 4000 samples of n = 1500. The
    # interval must cover it at least as often as the exact binomial coverage says, within
    # 3 standard errors of the simulation (binomial, sqrt(p (1 - p) / trials) = 0.0034)
    rng = np.random.default_rng(41)
    n, trials, conf = 1500, 4000, 0.95
    r, s = median_ci_ranks(n, conf)
    exact = sps.binom.cdf(s - 1, n, 0.5) - sps.binom.cdf(r - 1, n, 0.5)
    hits = 0
    for _ in range(trials // 500):
        x = rng.lognormal(0.0, 0.5, (500, n))
        part = np.partition(x, (r - 1, s - 1), axis=1)
        hits += int(np.sum((part[:, r - 1] <= 1.0) & (1.0 <= part[:, s - 1])))
        # the function itself on the first sample of each block
        lo, hi = median_ci_order_statistic(x[0], conf)
        assert (lo, hi) == (part[0, r - 1], part[0, s - 1])
    tol = 3 * math.sqrt(conf * (1 - conf) / trials)
    assert abs(hits / trials - exact) <= tol
    assert hits / trials >= conf - tol


def test_agrees_with_scipy_percentile_bootstrap_on_a_large_sample():
    x = np.random.default_rng(42).gamma(2.0, 1.0, 6000)
    lo, hi = median_ci_order_statistic(x, 0.95)
    ref = sps.bootstrap(
        (x,),
        np.median,
        confidence_level=0.95,
        n_resamples=2000,
        method="percentile",
        batch=100,
        rng=np.random.default_rng(43),
    ).confidence_interval
    width = hi - lo
    # both estimate the same interval; they differ by Monte Carlo error of the bootstrap and
    # the discreteness of the ranks: a quarter of the width at most
    assert abs(lo - ref.low) < 0.25 * width and abs(hi - ref.high) < 0.25 * width


def _metrics(sizes: dict[str, int], rng: np.random.Generator) -> pd.DataFrame:
    parts = []
    for mode, n in sizes.items():
        parts.append(
            pd.DataFrame(
                {
                    "event": np.arange(n),
                    "meter": "Candidate A",
                    "serial": "S-1",
                    "mode": mode,
                    "capture": "main",
                    "volts": 500.0,
                    "load": "short",
                    "delay_s": 0.0,
                    "flag_not_captured": False,
                    "peak_a": rng.lognormal(1.0, 0.2, n),
                    "polarity": 1,
                }
            )
        )
    return pd.concat(parts, ignore_index=True)


def test_groups_switch_method_above_the_stated_size():
    rng = np.random.default_rng(44)
    big = MEDIAN_CI_BOOTSTRAP_MAX + 1
    m = _metrics({"small": 40, "edge": MEDIAN_CI_BOOTSTRAP_MAX, "big": big}, rng)
    g = group_stats(m, None, metric_names=("peak_a",), rng=np.random.default_rng(0))
    assert list(g.columns[: len(COLUMNS_BEFORE)]) == COLUMNS_BEFORE
    assert list(g.columns) == list(GROUPS_COLUMNS)
    g = g.set_index("mode")
    assert g.loc["small", "median_ci_method"] == "bootstrap"
    assert g.loc["edge", "median_ci_method"] == "bootstrap"
    assert g.loc["big", "median_ci_method"] == "order statistic"
    v = m.loc[m["mode"] == "big", "peak_a"].to_numpy()
    assert (g.loc["big", "median_ci_low"], g.loc["big", "median_ci_high"]) == (
        median_ci_order_statistic(v, 0.95)
    )
    assert g.loc["big", "median"] == np.median(v)
    assert g.loc["big", "p99"] == np.percentile(v, 99)  # exact quantiles at any size
