"""Per-layer summaries: compact, exactly mergeable statistics of a tensor.

A :class:`Summary` is built from a tensor on the tensor's own device, without a host
synchronisation, and holds everything the divergences need:

* per channel and layer-wide: count of finite values, mean, ``M2`` (sum of squared
  deviations from the mean), number of non-finite values (NaN, +inf, -inf; these are
  excluded from every other statistic);
* per channel and layer-wide *row statistics*: a row is one sample (index along dim 0).
  For each row we take its mean and its within-row variance and keep the count, mean and
  ``M2`` of those row values.  The spread of row means is the standard error of the layer
  mean whatever the correlation between values inside one sample (pixels of one image are
  not independent), which is what the noise floors in :mod:`shiftwatch.divergence` use;
* layer-wide minimum and maximum of the finite values;
* optionally a histogram of the layer's finite values on given edges, with an underflow
  and an overflow bin.  Bins are half-open ``[e_i, e_{i+1})``; a value equal to the last
  edge counts as overflow.

Everything is stored in one float64 *table* of shape ``(C + 1, len(FIELDS))`` (row ``C`` is
the layer-wide view) plus ``extrema`` and ``hist``.  Merging walks the field declaration
:data:`FIELD_GROUPS` once, so no field has its own merge code.  Counts, means and ``M2``
merge with Chan et al.'s pairwise update (Chan, Golub & LeVeque, "Algorithms for computing
the sample variance", 1983), so merging the summaries of two tensors equals the summary of
their concatenation up to float64 rounding.

Numerics: values are shifted by a per-channel constant (the first value of the channel in
the first row) before squares are summed in the input precision per (row, channel); the
per-row sums are combined in float64.  A float32 input with mean 1e4 and std 1 therefore
keeps its variance (a naive float32 sum of squares would lose it entirely).

Units: every statistic is in the units of the input tensor.  Variances are population
variances (``M2 / n``) unless a name says ``unbiased``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

from .cells import (
    FIELDS,
    check_edges,
    finish_dense_many,
    histogram,
    reduce_moments,
    release_scratch,
    table_parts,
)
from .errors import ConfigError, UnsupportedInputError

__all__ = [
    "FIELDS",
    "FIELD_GROUPS",
    "Summary",
    "make_edges",
    "merge_tables",
    "release_scratch",
    "summarize",
    "summarize_staged",
]

_IX = {name: i for i, name in enumerate(FIELDS)}

#: How each column merges: ("moments", count, mean, m2) groups use Chan's update;
#: ("sum", column) columns add.
FIELD_GROUPS: tuple[tuple[str, ...], ...] = (
    ("moments", "n", "mean", "m2"),
    ("sum", "nonfinite"),
    ("moments", "rows", "row_mean", "row_mean_m2"),
    ("moments", "rows", "row_var", "row_var_m2"),
)

SCHEMA = 1


def merge_tables(tables: Tensor) -> Tensor:
    """Merge stacked summary tables ``(K, C + 1, len(FIELDS))`` along dim 0 into one
    ``(C + 1, len(FIELDS))`` table, exactly: walks :data:`FIELD_GROUPS` once (``sum``
    columns add; ``moments`` groups use the k-way Chan update
    ``n = sum n_i, mean = sum n_i mean_i / n, M2 = sum M2_i + sum n_i (mean_i - mean)^2``).
    Used by :meth:`Summary.merge` (K = 2) and by the cross-process merge (K = world size).
    """
    out = torch.empty_like(tables[0])
    for group in FIELD_GROUPS:
        if group[0] == "sum":
            i = _IX[group[1]]
            out[:, i] = tables[:, :, i].sum(0)
            continue
        ci, mi, vi = (_IX[g] for g in group[1:])
        out[:, ci], out[:, mi], out[:, vi] = reduce_moments(
            tables[:, :, ci], tables[:, :, mi], tables[:, :, vi], 0
        )
    return out


@dataclass(frozen=True, eq=False)
class Summary:
    """Mergeable statistics of one tensor (or of many tensors merged).

    Attributes:
        table: float64 tensor ``(C + 1, len(FIELDS))``; rows ``0..C-1`` are channels, row
            ``C`` is the whole layer.  Column meanings are in :data:`FIELDS`.
        extrema: float64 tensor ``(2,)``: layer-wide min and max of finite values
            (``+inf``/``-inf`` when there are none), recovered as ``min(x - shift) + shift``:
            exact up to the float32 rounding of ``x - shift`` (~1e-7 relative).
        hist: float64 tensor ``(B + 2,)`` of counts ``[underflow, bin_0 .. bin_{B-1},
            overflow]``, or ``None``.
        edges: float64 tensor ``(B + 1,)`` of increasing bin edges, or ``None``.
    """

    table: Tensor
    extrema: Tensor
    hist: Tensor | None = None
    edges: Tensor | None = None

    # ------------------------------------------------------------------ views
    @property
    def channels(self) -> int:
        """Number of channels ``C``."""
        return self.table.shape[0] - 1

    @property
    def device(self) -> torch.device:
        return self.table.device

    def field(self, name: str, *, layer: bool = True) -> Tensor:
        """One column: the layer-wide value (0-d) or per-channel values ``(C,)``."""
        col = self.table[:, _IX[name]]
        return col[-1] if layer else col[:-1]

    @property
    def count(self) -> Tensor:
        """Number of finite values in the layer (0-d float64)."""
        return self.field("n")

    @property
    def nonfinite(self) -> Tensor:
        """Number of NaN/inf values in the layer (0-d float64)."""
        return self.field("nonfinite")

    def mean(self, *, layer: bool = True) -> Tensor:
        """Mean of finite values (0 for an empty summary)."""
        return self.field("mean", layer=layer)

    def var(self, *, layer: bool = True, unbiased: bool = False) -> Tensor:
        """Variance of finite values; population (``M2/n``) by default, 0 when undefined."""
        n = self.field("n", layer=layer)
        m2 = self.field("m2", layer=layer).clamp_min(0)
        denom = n - 1 if unbiased else n
        return torch.where(denom > 0, m2 / denom.clamp_min(1), torch.zeros_like(m2))

    def std(self, *, layer: bool = True, unbiased: bool = False) -> Tensor:
        return self.var(layer=layer, unbiased=unbiased).sqrt()

    @property
    def min(self) -> Tensor:
        return self.extrema[0]

    @property
    def max(self) -> Tensor:
        return self.extrema[1]

    @property
    def bins(self) -> int:
        """Number of inner histogram bins ``B`` (0 without a histogram)."""
        return 0 if self.edges is None else self.edges.numel() - 1

    # ------------------------------------------------------------------ merging
    def merge(self, other: Summary) -> Summary:
        """Exact merge: the summary of the concatenation of both inputs (along dim 0).

        Raises:
            ConfigError: channel counts differ, or histograms have different edges
                (they never merge silently), or only one side has a histogram.
        """
        if not isinstance(other, Summary):
            raise TypeError(f"'other' must be a Summary (got {type(other).__name__})")
        if other.channels != self.channels:
            raise ConfigError(
                f"cannot merge summaries with {self.channels} and {other.channels} channels; "
                "summarise the same layer with the same channel_dim"
            )
        if (self.edges is None) != (other.edges is None):
            raise ConfigError(
                "cannot merge a summary with a histogram and one without; "
                "pass the same 'edges' to both summarize() calls"
            )
        other = other.to(self.device)
        if (
            self.edges is not None
            and self.edges is not other.edges
            and not torch.equal(self.edges, other.edges)
        ):
            raise ConfigError(
                "cannot merge histograms with different edges; fix the edges once "
                "(e.g. from a reference) and pass them to every summarize() call"
            )
        out = merge_tables(torch.stack([self.table, other.table]))
        extrema = torch.stack(
            [torch.minimum(self.extrema[0], other.extrema[0]),
             torch.maximum(self.extrema[1], other.extrema[1])]
        )
        hist = None if self.hist is None else self.hist + other.hist
        return Summary(out, extrema, hist, self.edges)

    @staticmethod
    def merge_all(summaries: list[Summary]) -> Summary:
        """Merge a non-empty list of summaries, left to right."""
        if not summaries:
            raise ConfigError("'summaries' must not be empty")
        acc = summaries[0]
        for s in summaries[1:]:
            acc = acc.merge(s)
        return acc

    # ------------------------------------------------------------------ transport
    def to(self, device: torch.device | str) -> Summary:
        device = torch.device(device)
        if self.table.device == device:
            return self
        return Summary(
            self.table.to(device),
            self.extrema.to(device),
            None if self.hist is None else self.hist.to(device),
            None if self.edges is None else self.edges.to(device),
        )

    def cpu(self) -> Summary:
        return self.to("cpu")

    def pack(self) -> Tensor:
        """All statistics in one flat float64 tensor (edges excluded): one transfer or
        one collective moves a whole summary.  Inverse: :meth:`unpack`."""
        parts = [self.table.reshape(-1), self.extrema]
        if self.hist is not None:
            parts.append(self.hist)
        return torch.cat(parts)

    @staticmethod
    def packed_size(channels: int, bins: int) -> int:
        """Length of :meth:`pack` for ``channels`` channels and ``bins`` inner bins."""
        return (channels + 1) * len(FIELDS) + 2 + (bins + 2 if bins else 0)

    @staticmethod
    def unpack(flat: Tensor, channels: int, edges: Tensor | None = None) -> Summary:
        """Rebuild a summary from :meth:`pack` output (a view; no copy)."""
        width = len(FIELDS)
        k = (channels + 1) * width
        table = flat[:k].view(channels + 1, width)
        extrema = flat[k : k + 2]
        hist = None if edges is None else flat[k + 2 : k + 2 + edges.numel() + 1]
        return Summary(table, extrema, hist, edges)

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON representation (lists of floats; ``inf`` written as strings)."""
        def enc(t: Tensor | None):
            if t is None:
                return None
            return [_enc_float(v) for v in t.detach().cpu().double().reshape(-1).tolist()]

        return {
            "schema": SCHEMA,
            "fields": list(FIELDS),
            "channels": self.channels,
            "table": enc(self.table),
            "extrema": enc(self.extrema),
            "hist": enc(self.hist),
            "edges": enc(self.edges),
        }

    @staticmethod
    def from_dict(data: Mapping[str, Any]) -> Summary:
        """Inverse of :meth:`to_dict`; validates shapes and the schema version."""
        if data.get("schema") != SCHEMA:
            raise ConfigError(
                f"summary 'schema' must be {SCHEMA} (got {data.get('schema')!r}); "
                "the file was written by an incompatible shiftwatch version"
            )
        if list(data.get("fields", [])) != list(FIELDS):
            raise ConfigError(f"summary 'fields' must be {list(FIELDS)}")
        c = int(data["channels"])

        def dec(key: str, shape: tuple[int, ...] | None):
            raw = data.get(key)
            if raw is None:
                return None
            t = torch.tensor([_dec_float(v) for v in raw], dtype=torch.float64)
            if shape is not None:
                if t.numel() != math.prod(shape):
                    raise ConfigError(f"summary '{key}' must have {math.prod(shape)} values")
                t = t.view(*shape)
            return t

        table = dec("table", (c + 1, len(FIELDS)))
        extrema = dec("extrema", (2,))
        edges = dec("edges", None)
        hist = dec("hist", None)
        if (edges is None) != (hist is None):
            raise ConfigError("summary 'hist' and 'edges' must both be present or both null")
        if edges is not None and hist.numel() != edges.numel() + 1:
            raise ConfigError("summary 'hist' must have len(edges) + 1 counts")
        return Summary(table, extrema, hist, edges)


def _enc_float(v: float) -> float | str:
    return v if math.isfinite(v) else ("inf" if v > 0 else "-inf" if v < 0 else "nan")


def _dec_float(v: float | str) -> float:
    return float(v)


def make_edges(low: float, high: float, bins: int, *, device: torch.device | str = "cpu") -> Tensor:
    """``bins + 1`` evenly spaced float64 edges on ``[low, high]``."""
    if not isinstance(bins, int) or bins < 1:
        raise ConfigError(f"'bins' must be a positive integer (got {bins!r})")
    if not (math.isfinite(low) and math.isfinite(high)) or not high > low:
        raise ConfigError(f"'low' and 'high' must be finite with high > low (got {low}, {high})")
    return torch.linspace(low, high, bins + 1, dtype=torch.float64, device=device)


def _check_dtype(x: Tensor) -> None:
    if not isinstance(x, Tensor):
        raise UnsupportedInputError(f"expected a torch.Tensor (got {type(x).__name__})")
    if x.is_complex() or not x.is_floating_point():
        raise UnsupportedInputError(
            f"cannot summarise a tensor of dtype {x.dtype}: only floating-point inputs "
            "have distributions to compare; cast it with .float() or leave the layer out"
        )


def summarize(
    x: Tensor,
    *,
    channel_dim: int = 1,
    edges: Tensor | None = None,
    max_hist_values: int | None = 16384,
) -> Summary:
    """Summarise ``x`` on its own device, without host synchronisation.

    Args:
        x: floating-point tensor whose dim 0 indexes samples (rows).  A 1-d tensor is
            treated as one sample of ``x.numel()`` channels; a 0-d tensor as one value.
            float16/bfloat16 inputs are summarised in float32.
        channel_dim: the channel axis (1 for ``(N, C, ...)`` inputs of convolutions and
            normalization layers, -1 for ``(N, ..., F)`` inputs of linear layers).  Must
            not be the sample axis 0.
        edges: increasing bin edges (any float dtype, any device) for the histogram, or
            ``None`` for no histogram.
        max_hist_values: at most this many values (a subsample of evenly spread
            contiguous chunks of 64 values, taken on the device) go into the histogram;
            ``None`` uses all values.  Moments always use all values.  Subsampled
            histograms are not exactly mergeable with the histogram of the concatenated
            input (the picks differ).

    Returns:
        A :class:`Summary` on ``x.device``.

    Raises:
        UnsupportedInputError: integer, boolean or complex dtype.
        ConfigError: bad ``channel_dim``, ``edges`` or ``max_hist_values``.
    """
    return summarize_staged(
        x, channel_dim=channel_dim, edges=edges, max_hist_values=max_hist_values
    )()


def summarize_staged(
    x: Tensor,
    *,
    channel_dim: int = 1,
    edges: Tensor | None = None,
    max_hist_values: int | None = 16384,
) -> Callable[[], Summary]:
    """:func:`summarize` in two stages: every pass over ``x`` (and every check of the
    arguments) now, the small float64 tail when the returned function is called.  The
    function holds small per-channel tensors and the histogram, never ``x``.  The monitor
    runs stage one in its forward hooks and the tails of all layers together at
    ``step()``.  Same arguments and errors as :func:`summarize`."""
    _check_dtype(x)
    x = x.detach()
    if x.dtype in (torch.float16, torch.bfloat16):
        x = x.float()
    if x.ndim == 0:
        x = x.reshape(1, 1)
        channel_dim = 1
    elif x.ndim == 1:
        x = x.unsqueeze(0)
        channel_dim = 1
    cdim = channel_dim % x.ndim if -x.ndim <= channel_dim < x.ndim else None
    if cdim is None or cdim == 0:
        raise ConfigError(
            f"'channel_dim' must be a non-batch axis of a {x.ndim}-d input "
            f"(1..{x.ndim - 1} or -1..-{x.ndim - 1}; got {channel_dim})"
        )
    if max_hist_values is not None and (
        not isinstance(max_hist_values, int) or max_hist_values < 1
    ):
        raise ConfigError(
            f"'max_hist_values' must be a positive int or None (got {max_hist_values!r})"
        )
    if edges is not None:
        edges = check_edges(edges, x.device)
    if x.numel() == 0:
        dev, f64 = x.device, torch.float64
        table = torch.zeros(x.shape[cdim] + 1, len(FIELDS), dtype=f64, device=dev)
        inf = torch.tensor([math.inf, -math.inf], dtype=f64, device=dev)
        hist = None if edges is None else torch.zeros(edges.numel() + 1, dtype=f64, device=dev)
        empty = Summary(table, inf, hist, edges)
        return lambda: empty
    finish, all_finite = table_parts(x, cdim)
    hist = None if edges is None else histogram(x, edges, max_hist_values, all_finite)

    def complete() -> Summary:
        table, extrema = finish()
        return Summary(table, extrema, hist, edges)

    dense = getattr(finish, "dense", None)
    if dense is not None:  # lets finish_staged_many batch this tail with others
        complete.dense = (dense, hist, edges)  # type: ignore[attr-defined]
    return complete


def finish_staged_many(pending: list[Callable[[], Summary]]) -> list[Summary]:
    """Call the tails returned by :func:`summarize_staged`; the same as
    ``[p() for p in pending]`` up to rounding, with the tails of dense CPU inputs run
    together (:func:`shiftwatch.cells.finish_dense_many`)."""
    out: list[Summary | None] = [None] * len(pending)
    batch = [i for i, p in enumerate(pending) if getattr(p, "dense", None) is not None]
    if len(batch) > 1:
        parts = [pending[i].dense for i in batch]  # type: ignore[attr-defined]
        done = finish_dense_many([d for d, _, _ in parts])
        for i, (table, extrema), (_, hist, edges) in zip(batch, done, parts, strict=True):
            out[i] = Summary(table, extrema, hist, edges)
    return [s if s is not None else p() for s, p in zip(out, pending, strict=True)]
