"""Baseline and noise of each event from its pre-trigger samples, in ADC codes or amperes.

The level before the trigger is what every other metric is measured from: peak, crossings and
the charge integral all subtract it, and the charge integral multiplies any error in it by the
record length. :func:`baseline_noise` takes the pre-trigger samples of a chunk of events (one
row each) and returns the baseline (median, or a finer mean for whole ADC codes) and the noise
(robust sigma) per row; the rules are spelled out in :mod:`rig.analysis.metrics`. Integer codes
get their own estimators because the median and the MAD of rounded samples are too coarse below
a code or so of noise; int8 codes go through per-row histograms, which are much cheaper.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "BASELINE_MAX",
    "MAD_TO_SIGMA",
    "baseline_int8",
    "baseline_noise",
    "code_baseline",
    "settle_baseline",
]

MAD_TO_SIGMA = 1.4826  # MAD of a normal distribution x 1.4826 = sigma (common practice)
# Samples used for the baseline, at most: a long record (a slow capture of the tail) needs a
# long pre-trigger, since its baseline error times the record length lands in the charge;
# bounded so that the cost stays linear in a few tens of thousands of samples per event.
BASELINE_MAX = 1 << 15


def baseline_noise(pre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and noise per row of ``pre`` (events x pre-trigger samples), in the units of
    the samples (codes for integer arrays, amperes for floats).

    Floats: median and 1.4826 x MAD. Integer codes: :func:`code_baseline` (int16 and wider)
    or :func:`baseline_int8`.
    """
    if pre.dtype == np.int8:
        return baseline_int8(pre)
    base = np.median(pre, axis=1)
    noise = MAD_TO_SIGMA * np.median(np.abs(pre - base[:, None]), axis=1)
    if pre.dtype.kind in "iu":
        base, noise = code_baseline(pre, base, noise)
    return base, noise


def code_baseline(
    pre: np.ndarray, med: np.ndarray, mad_sigma: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and noise of integer codes, in codes, from the samples within median +-
    (4 x MAD sigma + 3 codes) (spikes beyond stay out). Noise: their standard deviation
    (below about one code of noise the MAD of rounded samples collapses to 0 or 1 code), at
    least the quantisation noise 1/sqrt(12) code. Baseline: see :func:`settle_baseline`."""
    dev = pre - med[:, None]
    keep = np.abs(dev) <= (4.0 * mad_sigma + 3.0)[:, None]
    cnt = np.maximum(keep.sum(axis=1), 1)
    mean = np.where(keep, dev, 0.0).sum(axis=1) / cnt
    var = np.where(keep, (dev - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(cnt - 1, 1)
    return settle_baseline(med, mean, var, cnt), np.maximum(np.sqrt(var), 1.0 / np.sqrt(12.0))


def settle_baseline(
    med: np.ndarray, mean_dev: np.ndarray, var: np.ndarray, cnt: np.ndarray
) -> np.ndarray:
    """The median of whole codes, or the mean of the kept samples (median + mean_dev) where
    the two differ by more than twice the mean's standard error sqrt(var / cnt): the median
    is then off the true level by part of a code (it is a whole or half code), which the
    charge integral would multiply by the record length. Where they agree the median stays,
    since it is exact when the level sits on a code."""
    se = np.sqrt(np.maximum(var, 1.0 / 12.0) / np.maximum(cnt, 1))
    return np.where(np.abs(mean_dev) > 2.0 * se, med + mean_dev, med)


def baseline_int8(pre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Baselines and noise (codes) of int8 codes from per-row histograms, from the samples
    within median +- (4 sigma + 3 codes), where sigma = IQR / 1.349 (normal distribution);
    the same rule as :func:`code_baseline` with the interquartile range in place of the
    MAD, at a fraction of the cost."""
    r, k = pre.shape
    # bin index code + 128 of each row's own 256 bins: the uint8 view XOR 0x80 is code + 128
    # (two's complement), 3.5x cheaper than widening and adding 128
    flat = (pre.view(np.uint8) ^ np.uint8(0x80)).astype(np.intp)
    flat += (256 * np.arange(r, dtype=np.intp))[:, None]
    counts = np.bincount(flat.ravel(), minlength=256 * r).reshape(r, 256)
    cum = np.cumsum(counts, axis=1)
    codes = np.arange(-128, 128, dtype=np.float64)

    def rank(q: int) -> np.ndarray:
        return codes[np.argmax(cum > q, axis=1)]

    med = 0.5 * (rank((k - 1) // 2) + rank(k // 2))
    sigma = (rank((3 * k) // 4) - rank(k // 4)) / 1.349
    dev = codes[None, :] - med[:, None]
    w = np.where(np.abs(dev) <= (4.0 * sigma + 3.0)[:, None], counts, 0)
    cnt = np.maximum(w.sum(axis=1), 1)
    mean = (w * dev).sum(axis=1) / cnt
    var = (w * (dev - mean[:, None]) ** 2).sum(axis=1) / np.maximum(cnt - 1, 1)
    return settle_baseline(med, mean, var, cnt), np.maximum(np.sqrt(var), 1.0 / np.sqrt(12.0))
