"""Histograms as TensorBoard stores them, built from counts the core already computed.

TensorBoard's ``HistogramProto`` keeps, per bucket, only the right edge
(``bucket_limit``) and the count; it draws the first bucket from ``min`` and the last one
up to ``max``.  :class:`HistogramData` maps the core's fixed-edge histogram (with an
underflow and an overflow bin) onto that form without looking at the input again.
NumPy for the checks; the proto class is passed in by the sink.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

if TYPE_CHECKING:
    from ..summary import Summary

__all__ = ["HistogramData"]


def _floats(values: Any, name: str) -> np.ndarray:
    if isinstance(values, torch.Tensor):
        values = values.detach().cpu()
    try:
        return np.asarray(values, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"'{name}' must be a sequence of numbers ({exc})") from exc


@dataclass(frozen=True)
class HistogramData:
    """A histogram already computed by the core, in the form TensorBoard stores.

    Attributes:
        edges: ``B + 1`` increasing, finite bin edges (input units).
        counts: ``B + 2`` counts ``[underflow, bin_0 .. bin_{B-1}, overflow]``: bin ``i``
            holds values in ``[edges[i], edges[i+1])``, underflow values below
            ``edges[0]``, overflow values at or above ``edges[B]``.  Counts may come from
            a subsample of the layer input.
        min, max: smallest and largest finite value (input units).
        num, sum, sum_squares: count, sum and sum of squares of the values the
            statistics describe (all finite values, even when ``counts`` is a subsample).

    Sequences are stored as tuples of floats (NumPy arrays and tensors are accepted).

    Raises:
        ValueError: lengths do not match, edges are not increasing and finite, or a
            count is negative or not finite.
    """

    edges: Sequence[float]
    counts: Sequence[float]
    min: float
    max: float
    num: float
    sum: float
    sum_squares: float

    def __post_init__(self) -> None:
        # vectorised checks: the monitor builds one of these per layer and sampled step
        edges = _floats(self.edges, "edges")
        counts = _floats(self.counts, "counts")
        if edges.size < 2:
            raise ValueError(f"'edges' must hold at least 2 values (got {edges.size})")
        if counts.size != edges.size + 1:
            raise ValueError(
                f"'counts' must hold len(edges) + 1 = {edges.size + 1} values "
                f"[underflow, bins..., overflow] (got {counts.size})"
            )
        if not (np.isfinite(edges).all() and (np.diff(edges) > 0).all()):
            raise ValueError("'edges' must be finite and strictly increasing")
        if not (np.isfinite(counts).all() and (counts >= 0).all()):
            raise ValueError("'counts' must be finite and non-negative")
        object.__setattr__(self, "edges", tuple(edges.tolist()))
        object.__setattr__(self, "counts", tuple(counts.tolist()))
        for name in ("min", "max", "num", "sum", "sum_squares"):
            object.__setattr__(self, name, float(getattr(self, name)))

    @classmethod
    def trusted(
        cls,
        edges: tuple[float, ...],
        counts: tuple[float, ...],
        min: float,
        max: float,
        num: float,
        sum: float,
        sum_squares: float,
    ) -> HistogramData:
        """Build without the checks of the constructor, for data that satisfies them by
        construction: tuples of Python floats, evenly spaced finite ``edges`` (from the
        monitor's fixed ranges) and counts from a bincount.  The monitor writes one
        histogram per layer and sampled step; the checks cost ~70 us each there."""
        self = object.__new__(cls)
        for name, value in (("edges", edges), ("counts", counts), ("min", min), ("max", max),
                            ("num", num), ("sum", sum), ("sum_squares", sum_squares)):
            object.__setattr__(self, name, value)
        return self

    @classmethod
    def from_summary(cls, summary: Summary) -> HistogramData:
        """Take the histogram and moments of a :class:`shiftwatch.summary.Summary`.

        ``num``, ``sum`` and ``sum_squares`` come from the summary's count, mean and
        ``M2`` (``sum = n * mean``, ``sum_squares = M2 + n * mean**2``); nothing is
        recomputed from the input.

        Raises:
            ValueError: the summary has no histogram.
        """
        if summary.hist is None or summary.edges is None:
            raise ValueError("the summary has no histogram; pass 'edges' to summarize() to get one")
        n, mean, m2, lo, hi = (
            float(v)
            for v in (summary.count, summary.mean(), summary.field("m2"), summary.min, summary.max)
        )
        return cls(
            edges=summary.edges.tolist(),
            counts=summary.hist.tolist(),
            min=lo,
            max=hi,
            num=n,
            sum=n * mean,
            sum_squares=m2 + n * mean * mean,
        )

    def buckets(self) -> tuple[list[float], list[float]]:
        """``(bucket_limit, bucket)``: right edges and counts as TensorBoard stores them.

        TensorBoard keeps only right edges; it draws the first bucket from ``min`` and the
        last one up to ``max``.  So the underflow bucket ends at ``edges[0]``, bin ``i``
        at ``edges[i+1]`` and the overflow bucket at ``max``.  Leading and trailing empty
        buckets are dropped (TensorBoard drops them too when it displays a histogram), so
        no bucket is drawn backwards; an all-empty histogram has no buckets.
        """
        counts = self.counts
        nonzero = [i for i, c in enumerate(counts) if c > 0]
        if not nonzero:
            return [], []
        first, last = nonzero[0], nonzero[-1]
        top = self.edges[-1]
        over = self.max if math.isfinite(self.max) and self.max >= top else top
        limits = [*self.edges, over]
        return limits[first : last + 1], list(counts[first : last + 1])

    def to_proto(self, histogram_proto: Any) -> Any:
        """This histogram as a ``HistogramProto`` (the class is passed in: TensorBoard's)."""
        limits, counts = self.buckets()
        empty = not counts
        return histogram_proto(
            min=0.0 if empty or not math.isfinite(self.min) else self.min,
            max=0.0 if empty or not math.isfinite(self.max) else self.max,
            num=self.num,
            sum=self.sum,
            sum_squares=self.sum_squares,
            bucket_limit=limits,
            bucket=counts,
        )
