"""Timing of each event's pulse shape: where the current crosses given levels, and its tail.

The rise, decay and width metrics of :mod:`rig.analysis.metrics` are times between level
crossings next to the peak (10, 50, 90 % of the peak, 1/e, the noise floor). :func:`search`
finds them without reading whole records: it looks sample by sample at the ``BLOCK`` samples
next to the start, and beyond them a table of block minima (:func:`envelope`) names the one
block that holds the crossing. :func:`interp` turns the found sample into a fractional index by
linear interpolation, and :func:`fit_tail` fits the tail's time constant. Arrays are
``y`` = baseline-removed current turned positive (events x samples, codes or amperes); indices
and times are in samples.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "BLOCK",
    "FIT_POINTS",
    "block_min",
    "envelope",
    "first_below",
    "fit_tail",
    "interp",
    "read_window",
    "search",
]

FIT_POINTS = 256  # samples of the tail fit, at most (evenly spaced)
BLOCK = 64  # samples per block of the crossing search's envelope


def envelope(
    raw: np.ndarray, y: np.ndarray, base: np.ndarray, neg: np.ndarray, integer: bool, work: Any
) -> np.ndarray:
    """Block minima of y = (raw - base) x polarity. For integer codes they are taken on the
    raw codes (1 or 2 bytes a sample instead of 4) and shifted afterwards: y is a monotonic
    function of raw within a row, computed by the same float subtraction, so the result is
    identical to ``block_min(y, BLOCK)``."""
    if not integer:
        return block_min(y, BLOCK)
    r = raw.shape[0]
    env = np.empty((r, raw.shape[1] // BLOCK), dtype=work)
    b = base[:, None].astype(work)
    if neg.size == 0:
        np.subtract(block_min(raw, BLOCK), b, out=env, casting="unsafe")
        return env
    pos = np.ones(r, dtype=bool)
    pos[neg] = False
    if pos.any():
        env[pos] = block_min(raw[pos], BLOCK).astype(work) - b[pos]
    env[neg] = -(-block_min(-raw[neg].astype(np.int32), BLOCK).astype(work) - b[neg])
    return env


def block_min(y: np.ndarray, block: int) -> np.ndarray:
    """Minimum of each whole block of ``block`` samples (a power of two) per row, by halving
    (pairwise minima over contiguous data are much faster than a reduction over short axes)."""
    nb = y.shape[1] // block
    m = y[:, : nb * block]
    while m.shape[1] > nb:
        m = np.minimum(m[:, 0::2], m[:, 1::2])
    return m


def read_window(y: np.ndarray, rows: np.ndarray, first: np.ndarray, width: int):
    """Samples ``first .. first+width-1`` of each row (copied as contiguous blocks through a
    sliding-window view), with their indices; samples outside the row read as +inf."""
    n = y.shape[1]
    flat = y.reshape(-1)
    width = min(width, flat.size)
    view = np.lib.stride_tricks.sliding_window_view(flat, width)
    fstart = np.clip(rows * n + first, 0, flat.size - width)
    vals = view[fstart].astype(np.float64)
    idx = (fstart - rows * n)[:, None] + np.arange(width)
    outside = (idx < first[:, None]) | (idx >= first[:, None] + width) | (idx < 0) | (idx >= n)
    vals[outside] = np.inf
    return vals, idx


def first_below(vals: np.ndarray, idx: np.ndarray, level: np.ndarray, forward: bool):
    """Nearest index (first when forward, last when backward) with vals < level; -1 if none."""
    cond = vals < level[:, None]
    if not forward:
        cond = cond[:, ::-1]
        idx = idx[:, ::-1]
    hit = cond.any(axis=1)
    return np.where(hit, idx[np.arange(idx.shape[0]), np.argmax(cond, axis=1)], -1)


def search(
    y: np.ndarray,
    env: np.ndarray,
    block: int,
    start: np.ndarray,
    levels: np.ndarray,
    *,
    forward: bool,
) -> np.ndarray:
    """Per row and level, the nearest index from ``start`` on (forward or backward, start
    included) where ``y`` is below the level; -1 where there is none.

    Exact look at the ``block`` samples from ``start``; beyond them the block minima ``env``
    name the first block that holds a crossing, and only that block is read sample by sample.
    """
    r, n = y.shape
    nb = env.shape[1]
    found = np.full(levels.shape, -1, dtype=np.int64)
    rows = np.flatnonzero((start >= 0) & (start < n))
    if rows.size == 0:
        return found
    st = start[rows].astype(np.int64)
    first = st if forward else st - (block - 1)
    vals, idx = read_window(y, rows, first, block)
    blocks = np.arange(nb)
    if forward:
        beyond = blocks[None, :] >= (st // block + 1)[:, None]
    else:
        beyond = blocks[None, :] <= (st // block - 1)[:, None]
    env_r = env[rows]
    for j in range(levels.shape[1]):
        lv = levels[rows, j]
        k = first_below(vals, idx, lv, forward)
        todo = k < 0
        if todo.any():
            cond = (env_r[todo] < lv[todo, None]) & beyond[todo]
            hit = cond.any(axis=1)
            pick = np.argmax(cond, axis=1) if forward else nb - 1 - np.argmax(cond[:, ::-1], axis=1)
            sub = np.flatnonzero(todo)
            kb = np.full(sub.size, -1, dtype=np.int64)
            if hit.any():
                v2, i2 = read_window(y, rows[sub[hit]], pick[hit] * block, block)
                kb[hit] = first_below(v2, i2, lv[sub[hit]], forward)
            if forward and nb * block < n:  # samples after the last whole block
                rest = (kb < 0) & (st[sub] < nb * block)
                if rest.any():
                    tail_first = np.full(int(rest.sum()), nb * block, dtype=np.int64)
                    v3, i3 = read_window(y, rows[sub[rest]], tail_first, block)
                    kb[rest] = first_below(v3, i3, lv[sub[rest]], forward)
            k[todo] = kb
        found[rows, j] = k
    return found


def interp(y: np.ndarray, k: np.ndarray, levels: np.ndarray, *, forward: bool) -> np.ndarray:
    """Fractional sample index where ``y`` crosses each level next to the found sample ``k``
    (the neighbour towards the peak is at or above the level); NaN where k < 0."""
    n = y.shape[1]
    rows = np.arange(y.shape[0])[:, None]
    kk = np.clip(k, 0, n - 1)
    nb = np.clip(kk - 1 if forward else kk + 1, 0, n - 1)
    y_k = y[rows, kk].astype(np.float64)
    y_nb = y[rows, nb].astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (y_nb - levels) / (y_nb - y_k)
    frac = np.clip(np.nan_to_num(frac, nan=0.0), 0.0, 1.0)
    t = nb + frac if forward else nb - frac
    return np.where(k >= 0, t, np.nan)


def fit_tail(y: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Tail time constant in samples: weighted least squares of log y on time, weights y^2,
    over at most FIT_POINTS evenly spaced samples in [start, end); NaN with < 3 points."""
    n = y.shape[1]
    length = np.maximum(end - start, 0)
    stride = np.maximum(1, -(-length // FIT_POINTS))
    idx = start[:, None] + stride[:, None] * np.arange(FIT_POINTS)
    use = idx < end[:, None]
    vals = y[np.arange(y.shape[0])[:, None], np.clip(idx, 0, n - 1)].astype(np.float64)
    use &= vals > 0
    w = np.where(use, vals * vals, 0.0)
    ly = np.log(np.where(use, vals, 1.0))
    t = (idx - start[:, None]).astype(np.float64)
    s0, s1, s2 = w.sum(1), (w * t).sum(1), (w * t * t).sum(1)
    sy, sty = (w * ly).sum(1), (w * t * ly).sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (s0 * sty - s1 * sy) / (s0 * s2 - s1 * s1)
        tau = -1.0 / slope
    return np.where((use.sum(1) >= 3) & (slope < 0), tau, np.nan)
