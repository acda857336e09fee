"""Memory that does not grow with the number of events: the bootstrap in blocks, the journal
read once per run when single events are loaded.

Reference for the bootstrap: the plain percentile bootstrap (B. Efron, R. Tibshirani, "An
Introduction to the Bootstrap", 1993, chapter 13; from memory), written out with numpy below
as all resamples at once; the blocked version must give the same interval from the same draws
when they fit one block, and a valid interval (same to Monte Carlo error) when they do not.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from rig.analysis.stats import bootstrap_ci


def _plain(x: np.ndarray, rng: np.random.Generator, b: int = 2000) -> tuple[float, float]:
    idx = rng.integers(0, x.size, size=(b, x.size))
    dist = np.median(x[idx], axis=-1)
    lo, hi = np.quantile(dist, [0.025, 0.975])
    return float(lo), float(hi)


def test_a_small_sample_gives_the_same_interval_as_all_resamples_at_once():
    x = np.random.default_rng(5).lognormal(0, 0.3, 400)
    got = bootstrap_ci([x], lambda r: np.median(r, axis=-1), rng=np.random.default_rng(9))
    assert got == _plain(x, np.random.default_rng(9))


def test_a_large_sample_is_resampled_in_blocks_with_bounded_memory():
    x = np.random.default_rng(6).normal(10.0, 1.0, 50_000)
    tracemalloc.start()
    lo, hi = bootstrap_ci(
        [x],
        lambda r: np.median(r, axis=-1),
        n_resamples=400,
        rng=np.random.default_rng(1),
        block_elements=500_000,
    )
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 40e6  # 400 x 50,000 at once would need 160 MB of indices alone
    ref = _plain(x, np.random.default_rng(2), b=400)
    # the median's standard error is about 1.2533 sigma / sqrt(n) = 0.0056: the ends agree
    # to a fraction of it (normal theory of the sample median, common practice, no source)
    assert lo == pytest.approx(ref[0], abs=0.003) and hi == pytest.approx(ref[1], abs=0.003)
    assert lo < np.median(x) < hi


def test_two_samples_keep_their_own_sizes_in_every_block():
    rng = np.random.default_rng(3)
    a, b = rng.normal(1.0, 0.1, 3000), rng.normal(2.0, 0.1, 1000)

    def ratio(ra, rb):
        assert ra.shape[-1] == 3000 and rb.shape[-1] == 1000
        return np.median(rb, axis=-1) / np.median(ra, axis=-1)

    lo, hi = bootstrap_ci([a, b], ratio, rng=np.random.default_rng(4), block_elements=40_000)
    assert lo < np.median(b) / np.median(a) < hi


def test_single_event_loads_read_the_journal_once_per_run(tmp_path, monkeypatch):
    import rig.analysis.runs as runs
    from tests.report_fixtures import build_run

    run = build_run(tmp_path, np.random.default_rng(7), reps=2, delays=())
    calls = []
    real = runs.journal_frame
    monkeypatch.setattr(runs, "journal_frame", lambda d: calls.append(d) or real(d))
    events = runs.load_run(run).query("status == 'captured'")["event"].head(5)
    for e in events:
        assert runs.load_event_waveform(run, int(e)).n > 0
    assert len(calls) == 1
    with open(run / "journal.jsonl", "a", encoding="utf-8") as fh:  # the run goes on
        fh.write('{"event": 999999, "status": "not_captured", "file": null}\n')
    with pytest.raises(Exception, match="no waveform"):
        runs.load_event_waveform(run, 999999)
    assert len(calls) == 2
