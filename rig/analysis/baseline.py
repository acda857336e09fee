"""Baseline and noise of each event from its pre-trigger samples, in ADC codes or amperes.

The level before the trigger is what every other metric is measured from: peak, crossings and
the charge integral all subtract it, and the charge integral multiplies any error in it by the
record length. :func:`baseline_noise` takes the pre-trigger samples of a chunk of events (one
row each) and returns the baseline (a trimmed mean, float64) and the noise per row;
:func:`baseline_uncertainty` the baseline's standard uncertainty, which the charge
uncertainty carries; the rules are spelled out in :mod:`rig.analysis.metrics`. Integer codes
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
    "baseline_uncertainty",
    "code_baseline",
]

MAD_TO_SIGMA = 1.4826  # MAD of a normal distribution x 1.4826 = sigma (common practice)
# Samples used for the baseline, at most: a long record (a slow capture of the tail) needs a
# long pre-trigger, since its baseline error times the record length lands in the charge;
# bounded so that the cost stays linear in a few tens of thousands of samples per event.
BASELINE_MAX = 1 << 15


BATCHES = 32  # batch means for the baseline's standard uncertainty


def baseline_noise(pre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and noise per row of ``pre`` (events x pre-trigger samples), in the units of
    the samples (codes for integer arrays, amperes for floats), both float64.

    Baseline: the mean of the samples within median +- (4 robust sigma + 3 codes) (spikes
    beyond stay out), always: no rule that switches estimators, which noise could trip.
    Noise: their standard deviation (integer codes: at least the quantisation noise
    1/sqrt(12) code); robust sigma from the MAD (1.4826 x MAD), or for int8 codes the
    interquartile range / 1.349 from per-row histograms, which are much cheaper.
    """
    if pre.dtype == np.int8:
        return baseline_int8(pre)
    med = np.median(pre, axis=1)
    mad_sigma = MAD_TO_SIGMA * np.median(np.abs(pre - med[:, None]), axis=1)
    return code_baseline(pre, med, mad_sigma, integer=pre.dtype.kind in "iu")


def baseline_uncertainty(pre: np.ndarray, base: np.ndarray, noise: np.ndarray) -> tuple:
    """Standard uncertainty of each row's baseline and the variance inflation of a long mean
    by the noise's correlation (>= 1), from ``BATCHES`` batch means of the pre-trigger
    samples (batch means, common practice for correlated series, no source): u = standard
    deviation of the batch means / sqrt(batches), at least noise / sqrt(samples). Integer
    codes with less than half a code of noise are not dithered: their mean can be off by up
    to half a code whatever the count, so 1/sqrt(12) code is added in quadrature."""
    r, k = pre.shape
    n_b = min(BATCHES, k // 2)
    if n_b < 4:
        u = noise / np.sqrt(max(k, 1))
        return u, np.ones(r)
    length = k // n_b
    means = pre[:, -n_b * length :].reshape(r, n_b, length).mean(axis=2, dtype=np.float64)
    u_batch = means.std(axis=1, ddof=1) / np.sqrt(n_b)
    u_white = noise / np.sqrt(k)
    u = np.maximum(u_batch, u_white)
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = np.where(u_white > 0, (u / u_white) ** 2, 1.0)
    if pre.dtype.kind in "iu":
        u = np.where(noise < 0.5, np.hypot(u, 1.0 / np.sqrt(12.0)), u)
    return u, np.clip(np.nan_to_num(corr, nan=1.0), 1.0, float(length))


def code_baseline(
    pre: np.ndarray, med: np.ndarray, mad_sigma: np.ndarray, integer: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and noise from the samples within median +- (4 x MAD sigma + 3 codes) (for
    floats + 0, the samples being amperes): their mean and standard deviation in float64.
    Below about one code of noise the MAD of rounded samples collapses to 0 or 1 code, so
    the standard deviation, at least 1/sqrt(12) code for codes, is the noise."""
    dev = pre - med[:, None]
    pad = 3.0 if integer else 0.0
    keep = np.abs(dev) <= (4.0 * mad_sigma + pad)[:, None]
    if not integer:  # a float record with no spread at all: keep what sits on the median
        keep |= dev == 0
    cnt = np.maximum(keep.sum(axis=1), 1)
    mean = np.where(keep, dev, 0.0).sum(axis=1) / cnt
    var = np.where(keep, (dev - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(cnt - 1, 1)
    floor = 1.0 / np.sqrt(12.0) if integer else 0.0
    return med + mean, np.maximum(np.sqrt(var), floor)


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
    return med + mean, np.maximum(np.sqrt(var), 1.0 / np.sqrt(12.0))
