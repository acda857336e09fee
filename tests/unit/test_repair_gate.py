"""The repair gate's margin: a ratio of medians just inside the tolerance passes, just outside
fails. The equivalence test is TOST on log values (Schuirmann 1987, two one-sided tests; the
one-sided Welch tests themselves are checked against scipy in tests/reference)."""

from __future__ import annotations

import numpy as np
import pytest

from rig.analysis.compare import all_equivalent, compare_samples, tost_log


def _samples(ratio: float, rng: np.random.Generator, n: int = 40) -> tuple[np.ndarray, np.ndarray]:
    base = 10.0 * np.exp(rng.normal(0.0, 0.002, n))  # 0.2 % scatter: the margin decides
    run = ratio * 10.0 * np.exp(rng.normal(0.0, 0.002, n))
    return run, base


@pytest.mark.parametrize(("ratio", "verdict"), [(1.09, "equivalent"), (1.11, "different"),
                                                 (0.91, "equivalent"), (0.89, "different")])  # fmt: skip
def test_ratio_just_inside_and_just_outside_the_margin(ratio, verdict):
    run, base = _samples(ratio, np.random.default_rng(7))
    out = compare_samples(run, base, tolerance=0.10, rng=np.random.default_rng(1), n_boot=200)
    assert out["verdict"] == verdict, out
    assert (tost_log(run, base, 0.10) < 0.05) == (verdict == "equivalent")


def test_gate_needs_every_judged_row_equivalent():
    import pandas as pd

    df = pd.DataFrame({"verdict": ["equivalent", "only in baseline"]})
    assert all_equivalent(df)
    assert not all_equivalent(pd.DataFrame({"verdict": ["equivalent", "inconclusive"]}))
    assert not all_equivalent(pd.DataFrame({"verdict": ["only in baseline"]}))
    assert not all_equivalent(pd.DataFrame({"verdict": ["equivalent", "only in run"]}))


def test_tost_p_between_the_level_and_twice_the_level_is_inconclusive():
    """At confidence 0.95 the level is 0.05: a TOST p-value of about 0.06 is not enough, and
    no rank difference either, so the verdict is inconclusive (neither pass nor fail)."""
    rng = np.random.default_rng(3)
    base = 10.0 * np.exp(rng.normal(0.0, 0.06, 8))
    run = 10.0 * np.exp(rng.normal(0.0, 0.06, 8))
    p = tost_log(run, base, 0.10)
    assert 0.05 < p < 0.10  # the set-up lands where a doubled level would pass it
    out = compare_samples(run, base, tolerance=0.10, rng=np.random.default_rng(1), n_boot=200)
    assert out["verdict"] == "inconclusive", out
