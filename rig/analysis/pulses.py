"""Counting the separate current pulses of each event (contact bounce), with hysteresis.

A bouncing contact discharges the meter in several pulses. :func:`pulse_masks` marks, per
sample, where the current is above the upper threshold or under the lower one (the thresholds
and their hysteresis are set by :mod:`rig.analysis.metrics`), and :func:`count_pulses` counts
the entries into "above" that follow a dip into "under". The count reads the boolean masks
64 samples at a time as machine words (:func:`count_pulses_blocks`) and resolves sample by
sample only the few blocks that hold both states; :func:`count_pulses_sparse` is the plain
sample-by-sample count, used for records that are not a multiple of 8 samples.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "block_any",
    "count_pulses",
    "count_pulses_blocks",
    "count_pulses_sparse",
    "prev_nonzero",
    "pulse_masks",
]


def pulse_masks(
    raw: np.ndarray,
    y: np.ndarray,
    base: np.ndarray,
    pol: np.ndarray,
    hi: np.ndarray,
    lo: np.ndarray,
    integer: bool,
) -> tuple[np.ndarray, np.ndarray]:
    """Boolean masks y > hi and y < lo. For integer codes the comparison is done on the raw
    codes against integer thresholds (exact for integers, and 4x less memory traffic)."""
    if not integer:
        return y > hi[:, None].astype(y.dtype), y < lo[:, None].astype(y.dtype)
    info = np.iinfo(raw.dtype)

    def th(v: np.ndarray) -> np.ndarray:
        return np.clip(v, info.min, info.max).astype(raw.dtype)[:, None]

    above = np.empty(raw.shape, dtype=bool)
    under = np.empty(raw.shape, dtype=bool)
    pos = pol > 0
    for sel, positive in ((pos, True), (~pos, False)):
        if not sel.any():
            continue
        part = raw if sel.all() else raw[sel]
        if positive:  # raw > base + hi; raw < base + lo
            a = part > th(np.floor(base[sel] + hi[sel]))
            u = part <= th(np.ceil(base[sel] + lo[sel]) - 1)
        else:  # raw < base - hi; raw > base - lo
            a = part < th(np.ceil(base[sel] - hi[sel]))
            u = part >= th(np.floor(base[sel] - lo[sel]) + 1)
        if sel.all():
            return a, u
        above[sel], under[sel] = a, u
    return above, under


def count_pulses(above: np.ndarray, under: np.ndarray) -> np.ndarray:
    """Pulses per row: entries into ``above`` that follow a dip into ``under`` (or the start).

    Block by block where the masks can be read 8 samples to a machine word (records of a
    multiple of 8 samples), else sample by sample; both give the same counts."""
    if above.shape[1] % 8 == 0 and above.flags.c_contiguous and under.flags.c_contiguous:
        return count_pulses_blocks(above, under)
    return count_pulses_sparse(above, under)


def prev_nonzero(tok: np.ndarray) -> np.ndarray:
    """For each position, the last nonzero token strictly before it in its row (-1 if none:
    a record starts "under")."""
    r, m = tok.shape
    pos = np.where(tok != 0, np.arange(m, dtype=np.int32), np.int32(-1))
    last = np.maximum.accumulate(pos, axis=1)
    prev_pos = np.full_like(last, -1)
    prev_pos[:, 1:] = last[:, :-1]
    vals = np.take_along_axis(tok, np.maximum(prev_pos, 0), axis=1)
    return np.where(prev_pos >= 0, vals, np.int8(-1)).astype(np.int8)


def block_any(mask: np.ndarray, words: int) -> np.ndarray:
    """Whether each block of ``words`` x 8 samples holds a True (a last, shorter block takes
    the rest), reading the booleans as 64-bit words and OR-ing them pairwise."""
    w = mask.view(np.uint64)
    nb = w.shape[1] // words
    m = w[:, : nb * words]
    while m.shape[1] > nb:
        m = m[:, 0::2] | m[:, 1::2]
    out = m != 0
    if w.shape[1] > nb * words:
        out = np.concatenate([out, (w[:, nb * words :] != 0).any(axis=1)[:, None]], axis=1)
    return out


def count_pulses_blocks(above: np.ndarray, under: np.ndarray, block: int = 64) -> np.ndarray:
    """count_pulses on blocks: a block with only "above" (or only "under") samples is one
    token +1 (-1); the few blocks with both are resolved sample by sample into their first
    and last state and the rises inside them."""
    r, n = above.shape
    a_any = block_any(above, block // 8)
    u_any = block_any(under, block // 8)
    nb = a_any.shape[1]
    tok = np.zeros((r, 2 * nb), dtype=np.int8)  # (first, last) state of every block
    plain = a_any.astype(np.int8) - u_any.astype(np.int8)
    tok[:, 0::2] = plain
    tok[:, 1::2] = plain
    inner = np.zeros(r, dtype=np.int64)
    br, bb = np.nonzero(a_any & u_any)
    if br.size:
        idx = bb[:, None] * block + np.arange(block)
        valid = idx < n
        idx = np.minimum(idx, n - 1)
        st = above[br[:, None], idx].view(np.int8) - under[br[:, None], idx].view(np.int8)
        st = np.where(valid, st, 0).astype(np.int8)
        prev = prev_nonzero(st)
        first_pos = np.argmax(st != 0, axis=1)
        last_pos = block - 1 - np.argmax(st[:, ::-1] != 0, axis=1)
        first = st[np.arange(br.size), first_pos]
        last = st[np.arange(br.size), last_pos]
        # rises inside the block; one at its first state depends on the block before and is
        # counted through the block's token instead
        rises = ((st == 1) & (prev == -1)).sum(axis=1) - (first == 1)
        tok[br, 2 * bb] = first
        tok[br, 2 * bb + 1] = last
        np.add.at(inner, br, rises)
    # Only tokens that differ from their neighbour can start a rise: few per row.
    keep = tok != 0
    keep[:, 1:] &= tok[:, 1:] != tok[:, :-1]
    rows, cols = np.nonzero(keep)
    vals = tok[rows, cols]
    prev = np.full(vals.size, -1, dtype=np.int8)  # a record starts "under"
    if vals.size > 1:
        same_row = rows[1:] == rows[:-1]
        prev[1:] = np.where(same_row, vals[:-1], -1)
    rise = (vals == 1) & (prev == -1) & (cols % 2 == 0)  # rises at a block's first state
    return np.bincount(rows[rise], minlength=r) + inner


def count_pulses_sparse(above: np.ndarray, under: np.ndarray) -> np.ndarray:
    """count_pulses sample by sample.

    The state +1 (above), -1 (under) or 0 (between) changes only at a few samples; those
    changes, found in one pass, are all the hysteresis logic needs."""
    r, n = above.shape
    state = above.view(np.int8) - under.view(np.int8)
    change = np.flatnonzero(state[:, 1:] != state[:, :-1])  # flat in the (r, n - 1) grid
    rows, col = np.divmod(change, n - 1)
    new = state.reshape(-1)[rows * n + col + 1]
    keep = new != 0  # entering "between" changes nothing
    rows, new = rows[keep], new[keep]
    start = np.where(state[:, 0] > 0, 1, -1).astype(np.int8)  # between at the start: under
    prev = np.empty_like(new)
    if new.size:
        prev[1:] = new[:-1]
        first = np.ones(new.size, dtype=bool)
        first[1:] = rows[1:] != rows[:-1]
        prev[first] = start[rows[first]]
    starts = (new == 1) & (prev == -1)
    return np.bincount(rows[starts], minlength=r) + (start > 0)
