"""Quantiles at many points at once (one column per point), fed row by row, in memory that does
not grow with the number of rows.

Exact while at most :data:`EXACT_CAP` rows were added: the rows are kept (float32) and
:meth:`GridQuantiles.quantile` is :func:`numpy.quantile` (its default "linear" method) over
them. Past the cap every column becomes a histogram with log-spaced buckets in |value| on each
side of zero, the bucket layout of DDSketch (C. Masson, J. E. Rim, H. K. Lee, "DDSketch: a fast
and fully-mergeable quantile sketch with relative-error guarantees", PVLDB 12(12), 2019):
bucket ``i`` holds ``floor * g**(i-1) < |x| <= floor * g**i`` with
``g = (1 + a) / (1 - a)``, ``a`` = :data:`REL_ERROR`, and stands for
``2 floor g**i / (g + 1)``, which is within a relative ``a`` of every value in the bucket;
``|x| <= floor`` falls in a zero bucket (value 0). The quantile of rank ``h = (n - 1) q`` is
interpolated between the estimates of order statistics ``floor(h)`` and ``floor(h) + 1`` as
numpy does, so the estimate differs from :func:`numpy.quantile` on the same values by at most

    REL_ERROR * max(|x_(k)|, |x_(k+1)|) + floor          (the error bound, A or the rows' unit)

with ``floor = FLOOR_RATIO * span`` (the first EXACT_CAP rows, kept as float32 until the
switch, add their rounding, 6e-8 relative). ``span`` is the largest |value| the caller expects; larger
values are counted in the top bucket (read back as about ``span``). Memory past the cap:
``columns x (2 M + 1)`` uint32 counts, ``M = ceil(ln(1 / FLOOR_RATIO) / ln g)`` (1037 buckets
each side at the defaults), whatever the number of rows. Two estimators with the same layout
merge into the one that would have seen both sets of rows.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = ["EXACT_CAP", "FLOOR_RATIO", "REL_ERROR", "GridQuantiles"]

EXACT_CAP = 1000  # rows kept exactly; the histogram takes over at the 1001st
REL_ERROR = 0.01  # relative error of a bucket's value (DDSketch's alpha)
FLOOR_RATIO = 1e-9  # |value| below FLOOR_RATIO * span counts as 0 (absolute error bound)
_BLOCK = 64  # rows counted at a time


class GridQuantiles:
    """Quantiles of ``width`` columns over the rows added so far (see the module docstring)."""

    def __init__(
        self,
        width: int,
        span: float,
        cap: int = EXACT_CAP,
        rel_error: float = REL_ERROR,
        floor_ratio: float = FLOOR_RATIO,
    ) -> None:
        if width < 1 or not math.isfinite(span) or span <= 0:
            raise ValueError(f"GridQuantiles: width {width} and span {span} must be positive")
        if not 0 < rel_error < 1 or not 0 < floor_ratio < 1 or cap < 1:
            raise ValueError(
                f"GridQuantiles: rel_error {rel_error}, floor_ratio {floor_ratio} must lie in "
                f"(0, 1) and cap {cap} be at least 1"
            )
        self.width = int(width)
        self.span = float(span)
        self.cap = int(cap)
        self.rel_error = float(rel_error)
        self.floor = float(span) * float(floor_ratio)
        self.gamma = (1 + rel_error) / (1 - rel_error)
        self._log_gamma = math.log(self.gamma)
        self.buckets_per_side = math.ceil(math.log(1 / floor_ratio) / self._log_gamma)
        self.n = 0
        self._rows: np.ndarray | None = np.empty((0, self.width), np.float32)  # grows to cap
        self._counts: np.ndarray | None = None

    @property
    def exact(self) -> bool:
        """True while the rows are kept (n <= cap): quantiles equal numpy's."""
        return self._counts is None

    @property
    def nbytes(self) -> int:
        """Bytes held by the estimator's arrays."""
        held = self._rows if self._counts is None else self._counts
        assert held is not None
        return int(held.nbytes)

    def _kept(self) -> np.ndarray:
        """The rows kept while exact (a view of the first n rows of the buffer)."""
        assert self._rows is not None
        return self._rows[: self.n]

    def _keep(self, rows: np.ndarray) -> None:
        """Append rows to the buffer, doubling it (up to the cap) when full."""
        assert self._rows is not None
        start = self.n - rows.shape[0]
        if self.n > self._rows.shape[0]:
            grown = np.empty(
                (min(self.cap, max(self.n, 2 * self._rows.shape[0], 16)), self.width), np.float32
            )
            grown[:start] = self._rows[:start]
            self._rows = grown
        self._rows[start : self.n] = rows

    def _layout(self) -> tuple[int, float, float, int]:
        return (self.width, self.span, self.rel_error, self.buckets_per_side)

    def _bucket(self, rows: np.ndarray) -> np.ndarray:
        """Bucket index of every value: 0 .. 2M, the zero bucket at M."""
        m = self.buckets_per_side
        mag = np.abs(rows.astype(np.float64))
        with np.errstate(divide="ignore"):
            i = np.ceil(np.log(np.maximum(mag, self.floor) / self.floor) / self._log_gamma)
        i = np.clip(i, 0, m).astype(np.int64)
        return m + np.where(rows < 0, -i, i)

    def _values(self, index: np.ndarray) -> np.ndarray:
        """The value a bucket stands for (0 for the zero bucket)."""
        s = index - self.buckets_per_side
        mag = self.floor * 2 * self.gamma ** np.abs(s).astype(np.float64) / (self.gamma + 1)
        return np.where(s == 0, 0.0, np.sign(s) * mag)

    def _to_histogram(self, kept: int) -> None:
        assert self._rows is not None
        rows = self._rows[:kept]
        self._counts = np.zeros((self.width, 2 * self.buckets_per_side + 1), np.uint32)
        self._rows = None
        self._count_rows(rows)

    def _count_rows(self, rows: np.ndarray) -> None:
        assert self._counts is not None
        # in blocks, so counting the kept rows at the switch needs little temporary memory
        for start in range(0, rows.shape[0], _BLOCK):
            block = rows[start : start + _BLOCK]
            cols = np.broadcast_to(np.arange(self.width), block.shape)
            np.add.at(self._counts, (cols, self._bucket(block)), 1)

    def add(self, rows: np.ndarray) -> None:
        """Add one row (``width`` values) or a block of rows (k x width); finite values only."""
        rows = np.asarray(rows, dtype=np.float64)
        rows = rows.reshape(1, -1) if rows.ndim == 1 else rows
        if rows.ndim != 2 or rows.shape[1] != self.width:
            raise ValueError(
                f"GridQuantiles: rows of shape {rows.shape}, expected (k, {self.width})"
            )
        if not np.isfinite(rows).all():
            raise ValueError("GridQuantiles: rows must be finite")
        before = self.n
        self.n += rows.shape[0]
        if self._counts is None and self.n > self.cap:
            self._to_histogram(before)
        if self._counts is None:
            self._keep(rows.astype(np.float32))
        else:
            self._count_rows(rows)

    def merge(self, other: GridQuantiles) -> GridQuantiles:
        """Add ``other``'s rows to this estimator (same width, span, error and cap); returns it."""
        if self._layout() != other._layout() or self.cap != other.cap:
            raise ValueError("GridQuantiles: cannot merge estimators of different layouts")
        before = self.n
        self.n += other.n
        if self._counts is None and self.n > self.cap:
            self._to_histogram(before)
        if self._counts is None:
            self._keep(other._kept())
        elif other._counts is None:
            self._count_rows(other._kept())
        else:
            self._counts += other._counts
        return self

    def quantile(self, q: Sequence[float]) -> np.ndarray:
        """(len(q), width) quantiles (float64); NaN when no row was added."""
        qs = np.asarray(q, dtype=np.float64)
        if self.n == 0:
            return np.full((qs.size, self.width), np.nan)
        if self._counts is None:
            return np.quantile(self._kept(), qs, axis=0).astype(np.float64)
        cum = np.cumsum(self._counts, axis=1, dtype=np.int64)
        out = np.empty((qs.size, self.width))
        for j, p in enumerate(qs):
            h = (self.n - 1) * float(p)
            k = math.floor(h)
            frac = h - k
            lo = self._values((cum <= k).sum(axis=1))
            hi = self._values((cum <= min(k + 1, self.n - 1)).sum(axis=1))
            out[j] = lo + frac * (hi - lo)
        return out
