"""Group statistics against published examples and scipy.stats on the same samples."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from rig.analysis.compare import compare_samples, tost_log
from rig.analysis.stats import (
    bootstrap_ci,
    group_stats,
    tolerance_factor,
    tolerance_factor_approx,
    upper_tolerance_bound,
)


def test_tolerance_factor_nist_handbook_examples():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 7.2.6.3 (tolerance factors):
    # N = 43, p = 0.90, gamma = 0.99: k1 = 1.8752 approximate, 1.8740 exact
    assert tolerance_factor_approx(43, coverage=0.90, confidence=0.99) == pytest.approx(
        1.8752, abs=5e-4
    )
    assert tolerance_factor(43, coverage=0.90, confidence=0.99) == pytest.approx(1.8740, abs=5e-4)
    # second published example of that section, N = 40: 1.9034 approximate, 1.9017 exact
    assert tolerance_factor_approx(40, coverage=0.90, confidence=0.99) == pytest.approx(
        1.9034, abs=5e-4
    )
    assert tolerance_factor(40, coverage=0.90, confidence=0.99) == pytest.approx(1.9017, abs=5e-4)
    assert math.isnan(tolerance_factor(1))


def test_tolerance_bound_covers_as_promised():
    # Definition (NIST 7.2.6.3): with confidence gamma the bound exceeds the p-quantile.
    # Monte Carlo with a seeded generator: the share of bounds above the true 99 % quantile
    # must be close to 95 % (binomial standard error 0.7 % over 1000 trials).
    rng = np.random.default_rng(2026)
    q99 = sps.norm.ppf(0.99)
    hits = [upper_tolerance_bound(rng.normal(size=20), 0.99, 0.95) > q99 for _ in range(1000)]
    assert np.mean(hits) == pytest.approx(0.95, abs=0.025)


def test_bootstrap_median_ci_matches_scipy_bootstrap():
    # Reference: scipy.stats.bootstrap (percentile method) on the same sample. The two draw
    # different resamples, so the ends agree to Monte Carlo precision only.
    rng = np.random.default_rng(17)
    x = rng.lognormal(0.0, 0.4, 40)
    lo, hi = bootstrap_ci(
        [x], lambda a: np.median(a, axis=-1), n_resamples=20_000, rng=np.random.default_rng(1)
    )
    ref = sps.bootstrap(
        (x,), np.median, n_resamples=20_000, method="percentile", rng=np.random.default_rng(2)
    )
    spread = x.std()
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.05 * spread)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.05 * spread)


def test_ratio_of_medians_ci_matches_scipy_bootstrap():
    # Reference: scipy.stats.bootstrap with two independent samples (percentile method).
    rng = np.random.default_rng(23)
    a, b = rng.lognormal(0.1, 0.3, 30), rng.lognormal(0.0, 0.3, 25)
    res = compare_samples(a, b, rng=np.random.default_rng(3), n_boot=20_000)
    ref = sps.bootstrap(
        (a, b),
        lambda x, y, axis=-1: np.median(x, axis) / np.median(y, axis),
        n_resamples=20_000,
        method="percentile",
        rng=np.random.default_rng(4),
    )
    assert res["ratio"] == pytest.approx(np.median(a) / np.median(b))
    assert res["ratio_ci_low"] == pytest.approx(ref.confidence_interval.low, abs=0.02)
    assert res["ratio_ci_high"] == pytest.approx(ref.confidence_interval.high, abs=0.02)


def test_rank_test_is_scipy_mannwhitneyu():
    # Reference: scipy.stats.mannwhitneyu, two-sided, on the same samples.
    rng = np.random.default_rng(29)
    a, b = rng.gamma(3.0, 1.0, 18), rng.gamma(3.5, 1.0, 22)
    res = compare_samples(a, b, rng=np.random.default_rng(0), n_boot=200)
    ref = sps.mannwhitneyu(a, b, alternative="two-sided")
    assert res["mw_u"] == ref.statistic
    assert res["mw_p"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_tost_against_two_scipy_one_sided_tests():
    # Reference: two one-sided Welch t tests written with scipy.stats.t on the log values
    # (Schuirmann's TOST), bounds ln(0.9) and ln(1.1).
    rng = np.random.default_rng(31)
    a, b = rng.lognormal(0.02, 0.05, 30), rng.lognormal(0.0, 0.05, 30)
    la, lb = np.log(a), np.log(b)
    va, vb = la.var(ddof=1) / la.size, lb.var(ddof=1) / lb.size
    se = math.sqrt(va + vb)
    df = (va + vb) ** 2 / (va**2 / (la.size - 1) + vb**2 / (lb.size - 1))  # Welch
    diff = la.mean() - lb.mean()
    p_low = sps.t.sf((diff - math.log(0.9)) / se, df)
    p_high = sps.t.cdf((diff - math.log(1.1)) / se, df)
    assert tost_log(a, b, 0.10) == pytest.approx(max(p_low, p_high), rel=1e-9)
    assert tost_log(a, b, 0.10) < 0.05  # 2 % apart with 5 % scatter: equivalent
    assert tost_log(a * 1.3, b, 0.10) > 0.5  # 30 % apart: not
    # without scatter (every peak clipped at the same code) the means decide
    assert tost_log(np.full(5, 2.0), np.full(5, 2.0)) == 0.0
    assert tost_log(np.full(5, 2.5), np.full(5, 2.0)) == 1.0


def test_group_table_statistics_against_numpy():
    # Reference: numpy percentiles, mean, std (ddof 1) and the exact k1 on one group.
    rng = np.random.default_rng(37)
    v = rng.normal(1.0, 0.1, 25)
    df = pd.DataFrame(
        {
            "meter": "m",
            "serial": "s",
            "mode": "ACV",
            "volts": 100.0,
            "load": "short",
            "delay_s": 0.0,
            "peak_a": -v,
            "flag_not_captured": False,
        }
    )
    limits = [
        {"metric": "peak_a", "max": 1.2, "statistic": "p95"},
        {"metric": "peak_a", "max": 1.2, "statistic": "utl"},
    ]
    g = group_stats(df, None, limits, metric_names=("peak_a",), rng=np.random.default_rng(0))
    assert len(g) == 2
    row = g.iloc[0]
    assert row["mean"] == pytest.approx(v.mean())  # magnitude of the signed peak
    assert row["std"] == pytest.approx(v.std(ddof=1))
    assert row["p95"] == pytest.approx(np.percentile(v, 95))
    assert row["p99"] == pytest.approx(np.percentile(v, 99))
    assert row["max"] == pytest.approx(v.max())
    utl = v.mean() + tolerance_factor(25, 0.99, 0.95) * v.std(ddof=1)
    assert row["utl"] == pytest.approx(utl)
    assert row["share_over_limit"] == pytest.approx(np.mean(v > 1.2))
    assert list(g["verdict"]) == [
        "pass" if np.percentile(v, 95) <= 1.2 else "fail",
        "pass" if utl <= 1.2 else "fail",
    ]
