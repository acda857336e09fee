"""Streamed waveform bands (rig.analysis.bands, rig.analysis.gridquantiles) against numpy.

numpy.quantile (default "linear" method) on the same decimated records is the outside
reference for the quantiles; numpy.sum x dt and numpy.trapezoid on the full record for the
charge the tail bins keep; numpy.interp for the sub-sample shift of a record.
"""

from __future__ import annotations

import numpy as np
import pytest

from rig.analysis.bands import BandAccumulator, align, band_grid
from rig.analysis.gridquantiles import EXACT_CAP, REL_ERROR, GridQuantiles
from rig.analysis.runs import _shifted

DT = 1e-9
N = 3000
T0 = -200 * DT
Q = (0.05, 0.5, 0.95)


def _records(rng: np.random.Generator, k: int, n: int = N) -> np.ndarray:
    """k damped exponentials (amplitude 0.5-2 A, tau 50-150 ns, a tenth of them negative) on
    a random baseline with 1 mA noise, sampled at DT from T0."""
    t = T0 + DT * np.arange(n)
    amp = rng.uniform(0.5, 2.0, k) * np.where(rng.random(k) < 0.1, -1.0, 1.0)
    tau = rng.uniform(50e-9, 150e-9, k)
    pulse = np.where(t > 0, np.exp(-np.clip(t, 0, None)[None, :] / tau[:, None]), 0.0)
    base = rng.uniform(-0.01, 0.01, k)[:, None]
    return base + amp[:, None] * pulse + rng.normal(0, 1e-3, (k, n))


def _grid():
    return band_grid(T0, DT, N, (-30e-9, 600e-9))


def _reduced(grid, recs: np.ndarray) -> np.ndarray:
    t = grid.time()
    return np.array([grid.reduce(align(t, r)[0]) for r in recs])


def _fed(grid, recs: np.ndarray, **kw) -> BandAccumulator:
    acc = BandAccumulator(grid, span=10.0, **kw)
    for r in recs:
        acc.add(r)
    return acc


def test_exact_up_to_the_cap_equals_numpy_quantile():
    rng = np.random.default_rng(14)
    recs = _records(rng, 400)
    grid = _grid()
    acc = _fed(grid, recs)
    assert acc.values.exact and acc.n == 400 <= EXACT_CAP
    ref = np.quantile(_reduced(grid, recs).astype(np.float32), Q, axis=0)
    np.testing.assert_array_equal(acc.values.quantile(Q), ref.astype(np.float64))
    b = acc.result()
    nl = grid.lin_t.size
    # mostly positive pulses: the linear part keeps the sign, the tail is the bin means
    np.testing.assert_array_equal(b.lin_mid, ref[1, :nl].astype(np.float64))
    np.testing.assert_array_equal(b.lin_lo, ref[0, :nl].astype(np.float64))
    np.testing.assert_array_equal(b.log_hi, ref[2, nl:].astype(np.float64))
    assert b.exact and b.peak == pytest.approx(np.max(np.abs(ref[1, :nl])))


def test_above_the_cap_within_the_stated_bound():
    """|estimate - numpy| <= REL_ERROR * max(|x_(k)|, |x_(k+1)|) + floor (gridquantiles)."""
    rng = np.random.default_rng(2026)
    recs = _records(rng, 3000)
    grid = _grid()
    acc = _fed(grid, recs)
    assert not acc.values.exact
    rows = _reduced(grid, recs)
    est = acc.values.quantile(Q)
    ref = np.quantile(rows, Q, axis=0)
    srt = np.sort(rows, axis=0)
    for j, p in enumerate(Q):
        k = int(np.floor((rows.shape[0] - 1) * p))
        bracket = np.maximum(np.abs(srt[k]), np.abs(srt[min(k + 1, rows.shape[0] - 1)]))
        # float32 keeping of the first EXACT_CAP rows adds ~6e-8 relative
        bound = REL_ERROR * (1 + 1e-6) * bracket + acc.values.floor
        assert np.all(np.abs(est[j] - ref[j]) <= bound)
    # where the median stands well above zero the estimate is within 1 % of numpy's
    big = np.abs(ref[1]) > 0.05
    assert big.sum() > 100
    assert np.all(np.abs(est[1, big] / ref[1, big] - 1) <= REL_ERROR * 1.000001)


def test_merging_equals_one_accumulator_fed_with_all():
    rng = np.random.default_rng(7)
    grid = _grid()
    recs = _records(rng, 2600)
    whole = _fed(grid, recs)
    for split in (300, 700, 1800):  # exact + exact (sum below / above cap), exact + sketch
        a = _fed(grid, recs[:split])
        a.merge(_fed(grid, recs[split:]))
        assert a.n == whole.n and a.polarity == whole.polarity
        np.testing.assert_array_equal(a.values.quantile(Q), whole.values.quantile(Q))
        np.testing.assert_array_equal(a.result().lin_mid, whole.result().lin_mid)
        assert a.result().noise == whole.result().noise
    small = _fed(grid, recs[:250])
    both = _fed(grid, recs[:100]).merge(_fed(grid, recs[100:250]))
    np.testing.assert_array_equal(both.values.quantile(Q), small.values.quantile(Q))
    with pytest.raises(ValueError):
        whole.merge(_fed(band_grid(T0, DT, N, (-30e-9, 100e-9)), recs[:3]))


def test_tail_bins_keep_the_charge_of_the_record():
    """Sum of bin mean x samples x dt = numpy.sum(x) dt after the trigger, and numpy.trapezoid
    of the full record (a pulse that starts at 0 and has decayed by the record's end)."""
    rng = np.random.default_rng(3)
    n, dt = 200_000, 5e-7
    t = -2000 * dt + dt * np.arange(n)
    tp = np.clip(t, 0, None)
    x = np.where(t > 0, 0.8 * (np.exp(-tp / 2e-3) - np.exp(-tp / 2e-6)), 0.0)
    x = x + rng.normal(0, 1e-4, n) * (t > 0)
    grid = band_grid(t[0], dt, n, (-1e-5, 1e-4))
    row = grid.reduce(x)
    assert row.size == grid.width and grid.log_t.size <= 200
    q = grid.tail_charge(row)
    assert q == pytest.approx(np.sum(x[t > dt / 2]) * dt, rel=1e-12)
    # the trapezoid rule differs from the sum by half of each end sample (x[0] = 0 before the
    # trigger, x[-1] = noise)
    assert q == pytest.approx(np.trapezoid(x, dx=dt) + 0.5 * dt * (x[0] + x[-1]), rel=1e-12)
    # and the exponentials' own integral, 0.8 (2 ms - 2 us) (textbook), to the sampling error
    assert q == pytest.approx(0.8 * (2e-3 - 2e-6), rel=2e-3)


def test_a_peak_narrower_than_a_linear_bin_keeps_its_height():
    n = 50_000
    t = -1000 * DT + DT * np.arange(n)
    x = np.where(t > 0, 1e-3, 0.0)
    x[30_000] = 2.5
    grid = band_grid(t[0], DT, n, (t[0], t[-1]))
    assert not grid.lin_exact and grid.lin_t.size <= 1000
    acc = BandAccumulator(grid, span=10.0)
    for _ in range(3):
        acc.add(x)
    assert acc.result().peak == pytest.approx(2.5)


def test_memory_does_not_grow_with_the_number_of_events():
    rng = np.random.default_rng(11)
    n = 1500
    grid = band_grid(T0, DT, n, (-30e-9, 600e-9))
    acc = BandAccumulator(grid, span=10.0)
    block = _records(rng, 2000, n)
    for r in block:
        acc.add(r)
    at_2000 = acc.nbytes
    for _ in range(9):
        for r in _records(rng, 2000, n):
            acc.add(r)
    assert acc.n == 20_000
    assert acc.nbytes == at_2000
    q = GridQuantiles(grid.width, 10.0)
    assert at_2000 == q.width * (2 * q.buckets_per_side + 1) * 4 + (2 * q.buckets_per_side + 1) * 4


def test_shift_within_a_sample_matches_numpy_interp():
    rng = np.random.default_rng(5)
    v = rng.normal(size=500)
    src = 1e-9 * np.arange(500)
    for frac in (0.3, -0.45):
        expect = np.interp(src + frac * 1e-9, src, v)
        np.testing.assert_allclose(_shifted(v, frac), expect, rtol=0, atol=1e-12)


def test_bad_input_is_refused():
    q = GridQuantiles(3, 1.0)
    with pytest.raises(ValueError):
        q.add(np.array([1.0, np.nan, 0.0]))
    with pytest.raises(ValueError):
        q.add(np.ones(4))
    with pytest.raises(ValueError):
        GridQuantiles(3, 0.0)
    assert np.isnan(q.quantile([0.5])).all()


def test_a_record_that_ends_before_the_trigger_has_no_tail():
    grid = band_grid(-1e-6, 1e-7, 10, (-1e-6, 0.0))
    assert grid.log_t.size == 0 and grid.width == 10
    acc = BandAccumulator(grid, span=100.0)
    acc.add(np.arange(10.0))
    b = acc.result()
    assert b.log_mid.size == 0 and b.lin_mid.size == 10
    # baseline (mean of the 10 pre-trigger samples, 4.5) removed; largest |value| made positive
    np.testing.assert_allclose(b.lin_mid, np.arange(10.0) - 4.5)
