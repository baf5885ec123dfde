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
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import Tensor

from .errors import ConfigError, UnsupportedInputError

__all__ = [
    "FIELDS",
    "FIELD_GROUPS",
    "Summary",
    "make_edges",
    "merge_tables",
    "summarize",
]

#: Column names of :attr:`Summary.table`.
FIELDS: tuple[str, ...] = (
    "n",  # number of finite values
    "mean",  # mean of finite values
    "m2",  # sum of squared deviations from the mean
    "nonfinite",  # number of NaN/inf values
    "rows",  # number of rows (samples) with at least one finite value
    "row_mean",  # mean over rows of the row means
    "row_mean_m2",  # M2 of the row means
    "row_var",  # mean over rows of the within-row (population) variances
    "row_var_m2",  # M2 of the within-row variances
)
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


def _reduce_moments(n, mean, m2, dim: int):
    """Merge many (count, mean, M2) triples along ``dim`` (0 or 1) in one vectorised step.
    Works on torch tensors and on numpy arrays alike (the CPU tail runs in numpy)."""
    xp = np if isinstance(n, np.ndarray) else torch
    total = n.sum(dim)
    mu = (n * mean).sum(dim) / total.clip(min=1)
    dev = mean - (mu[None] if dim == 0 else mu[:, None])
    m2_tot = (n * dev * dev).sum(dim)
    if m2 is not None:
        m2_tot = m2_tot + m2.sum(dim)
    return total, xp.where(total > 0, mu, 0.0), m2_tot


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
        out[:, ci], out[:, mi], out[:, vi] = _reduce_moments(
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
    max_hist_values: int | None = 65536,
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
        edges = _check_edges(edges, x.device)

    n_rows, n_ch = x.shape[0], x.shape[cdim]
    reduce_dims = tuple(d for d in range(1, x.ndim) if d != cdim)
    per_row = math.prod(x.shape[d] for d in reduce_dims)
    dev, f64 = x.device, torch.float64
    if x.numel() == 0:
        table = torch.zeros(n_ch + 1, len(FIELDS), dtype=f64, device=dev)
        inf = torch.tensor([math.inf, -math.inf], dtype=f64, device=dev)
        hist = None if edges is None else torch.zeros(edges.numel() + 1, dtype=f64, device=dev)
        return Summary(table, inf, hist, edges)

    if per_row == 1:
        # One value per (row, channel), e.g. (N, F) inputs of linear layers: the tensor is
        # small, so a direct float64 two-pass is both exact and cheaper than the cell path.
        table, extrema = _table_single_values(x.reshape(n_rows, n_ch))
        hist = None if edges is None else _histogram(x, edges, max_hist_values)
        return Summary(table, extrema, hist, edges)

    # Full-size passes are the cost here (each ~0.1-0.2 ms per 2M values on 2 CPU
    # threads); boolean masks are avoided because building them is ~10x slower.  One work
    # buffer serves every pass.
    shape_b = [1] * x.ndim
    shape_b[cdim] = n_ch
    chan_dims = (0, *reduce_dims)

    def rsum(t: Tensor) -> Tensor:
        # a copy when nothing is reduced: t is the work buffer, overwritten below
        return t.sum(dim=reduce_dims) if reduce_dims else t.clone()

    cells = _cells_all_finite_cpu(x, cdim, reduce_dims, shape_b, chan_dims, rsum)
    if cells is None:
        cells = _cells_general(x, cdim, reduce_dims, per_row, shape_b, chan_dims, rsum)
    s1, s2, nf, shift, lo_c, hi_c = cells
    s1, s2, nf = (t.reshape(n_rows, n_ch) for t in (s1, s2, nf))
    parts = (s1, s2, nf, shift.reshape(n_ch).to(f64), lo_c.to(f64), hi_c.to(f64))
    if x.device.type == "cpu":
        # ~40 small float64 operations: numpy costs ~1 us each where torch costs ~7 us
        table, extrema = _finish(*(t.numpy() for t in parts), per_row)
        table, extrema = torch.from_numpy(table), torch.from_numpy(extrema)
    else:
        table, extrema = _finish(*parts, per_row)

    hist = None if edges is None else _histogram(x, edges, max_hist_values)
    return Summary(table, extrema, hist, edges)


def _finish(s1, s2, nf, shift, lo_c, hi_c, per_row: int):
    """Table and extrema from per-(row, channel) sums about the per-channel ``shift``
    (float64 torch tensors on any device, or numpy arrays)."""
    xp = np if isinstance(s1, np.ndarray) else torch
    cnt = per_row - nf  # finite values per (row, channel)
    safe = cnt.clip(min=1)
    m_rc = xp.where(cnt > 0, s1 / safe + shift[None], 0.0)
    if per_row == 1:  # one value per cell: no within-cell spread (avoid rounding residue)
        m2_rc = s1 * 0.0
    else:
        m2_rc = xp.where(cnt > 0, (s2 - s1 * s1 / safe).clip(min=0), 0.0)
    # Column C holds each row's layer-wide triple (its channels merged), so one set of
    # reductions over rows fills the channel rows and the layer row of the table alike.
    n_r, m_r, m2_r = _reduce_moments(cnt, m_rc, m2_rc, 1)
    cat = np.concatenate if xp is np else torch.cat
    cnt = cat([cnt, n_r[:, None]], 1)
    m_rc = cat([m_rc, m_r[:, None]], 1)
    m2_rc = cat([m2_rc, m2_r[:, None]], 1)
    nf = cat([nf, nf.sum(1)[:, None]], 1)
    n, mean, m2 = _reduce_moments(cnt, m_rc, m2_rc, 0)
    valid = (cnt > 0) + cnt * 0.0  # float64 in numpy and torch alike
    v_rc = m2_rc / cnt.clip(min=1)
    rows, row_mean, row_mean_m2 = _reduce_moments(valid, m_rc, None, 0)
    _, row_var, row_var_m2 = _reduce_moments(valid, v_rc, None, 0)
    cols = {
        "n": n, "mean": mean, "m2": m2, "nonfinite": nf.sum(0), "rows": rows,
        "row_mean": row_mean, "row_mean_m2": row_mean_m2,
        "row_var": row_var, "row_var_m2": row_var_m2,
    }
    table = xp.stack([cols[k] for k in FIELDS], 1)
    has = n[:-1] > 0  # extrema over channels that hold finite values
    lo = xp.where(has, lo_c + shift, math.inf).min()
    hi = xp.where(has, hi_c + shift, -math.inf).max()
    return table, xp.stack([lo, hi])


def _table_single_values(x: Tensor, *, use_numpy: bool | None = None) -> tuple[Tensor, Tensor]:
    """Table and extrema of an ``(N, C)`` tensor holding one value per (row, channel).
    On CPU the float64 arithmetic runs in numpy (~4x cheaper per operation here);
    ``use_numpy=False`` forces the torch path other devices take (for tests)."""
    v = x.to(torch.float64)
    on_cpu = v.device.type == "cpu" if use_numpy is None else use_numpy
    if on_cpu:
        v = v.numpy()
    xp = np if on_cpu else torch
    with np.errstate(invalid="ignore"):  # inf * 0 is NaN on purpose
        bad = xp.nan_to_num(v * 0, nan=1.0)  # 1 where non-finite
    good = 1.0 - bad
    v = xp.nan_to_num(v, nan=0.0, posinf=0.0, neginf=0.0)

    def moments(dim: int):
        n = good.sum(dim)
        mean = v.sum(dim) / n.clip(min=1)
        dev = (v - (mean[None] if dim == 0 else mean[:, None])) * good
        return n, mean, (dev * dev).sum(dim)

    n_c, mean_c, m2_c = moments(0)  # per channel: each finite value is its own row
    n_r, mean_r, m2_r = moments(1)  # per row, across channels
    n_l, mean_l, m2_l = _reduce_moments(n_c, mean_c, m2_c, 0)
    valid = (n_r > 0) + n_r * 0.0  # float64 in numpy and torch alike
    rows, row_mean, row_mean_m2 = _reduce_moments(valid, mean_r, None, 0)
    _, row_var, row_var_m2 = _reduce_moments(valid, m2_r / n_r.clip(min=1), None, 0)
    zeros = n_c * 0.0
    cols = {
        "n": (n_c, n_l), "mean": (mean_c, mean_l), "m2": (m2_c, m2_l),
        "nonfinite": (bad.sum(0), bad.sum()), "rows": (n_c, rows),
        "row_mean": (mean_c, row_mean), "row_mean_m2": (m2_c, row_mean_m2),
        "row_var": (zeros, row_var), "row_var_m2": (zeros, row_var_m2),
    }
    cat = np.concatenate if on_cpu else torch.cat
    table = xp.stack([cat([c, layer.reshape(1)]) for c, layer in (cols[k] for k in FIELDS)], 1)
    lo = xp.where(good > 0, v, math.inf).min()
    hi = xp.where(good > 0, v, -math.inf).max()
    extrema = xp.stack([lo, hi])
    if on_cpu:
        return torch.from_numpy(table), torch.from_numpy(extrema)
    return table, extrema


def _cells_general(x, cdim, reduce_dims, per_row, shape_b, chan_dims, rsum):
    """Per-(row, channel) sums about a per-channel shift, with non-finite values excluded,
    branch-free (no host sync): 9 full passes."""
    f64 = torch.float64
    buf = torch.mul(x, 0, out=_scratch(x))  # NaN exactly where x is NaN or +-inf, else 0
    bad = buf.nan_to_num_(nan=1.0)  # 1 where non-finite
    nf = rsum(bad).to(f64)  # non-finite values per (row, channel)
    # Per-channel shift: the first finite value of the channel.  Any value of the channel
    # keeps float32 sums of squares accurate (0 for data near 1e4 would not), and since it
    # is a real value, writing it where values are non-finite leaves min and max exact.
    shift = _first_finite(x, bad, nf, cdim, per_row).view(shape_b)
    d = torch.sub(x, shift, out=buf)
    d.nan_to_num_(nan=0.0, posinf=0.0, neginf=0.0)  # non-finite -> the shift itself
    lo_c, hi_c = _channel_minmax(d, cdim, chan_dims)
    s1 = rsum(d).to(f64)
    s2 = rsum(d.square_()).to(f64)  # in place: d is not needed afterwards
    return s1, s2, nf, shift, lo_c, hi_c


def _cells_all_finite_cpu(x, cdim, reduce_dims, shape_b, chan_dims, rsum):
    """CPU fast path (6 full passes): shift by the channel's first value of row 0, sum,
    and when every (row, channel) sum is finite there is no NaN/inf at all, so the
    non-finite handling is skipped.  Looking at the sums is no device synchronisation
    on CPU: the data is on the host already.  Returns None when the general path is needed
    (non-finite values, overflow, other devices)."""
    if x.device.type != "cpu":
        return None
    f64 = torch.float64
    first = x[0].movedim(cdim - 1, 0).reshape(x.shape[cdim], -1)[:, 0]
    if not bool(torch.isfinite(first).all()):
        return None
    shift = first.reshape(shape_b)
    d = torch.sub(x, shift, out=_scratch(x))
    s1 = rsum(d)
    if not bool(torch.isfinite(s1).all()):
        return None  # a NaN/inf somewhere (or an overflow): exact exclusion needed
    lo_c, hi_c = _channel_minmax(d, cdim, chan_dims)
    s2 = rsum(d.square_()).to(f64)
    nf = torch.zeros(s1.shape, dtype=f64)
    return s1.to(f64), s2, nf, shift, lo_c, hi_c


def _first_finite(x: Tensor, bad: Tensor, nf: Tensor, cdim: int, per_row: int) -> Tensor:
    """Per channel, the first finite value in row-major order (0 if there is none), found
    from the 0/1 non-finite indicator ``bad`` and the per-(row, channel) non-finite counts
    ``nf`` with float arithmetic and without sync."""
    n_ch = x.shape[cdim]
    empty_cell = (nf.reshape(x.shape[0], n_ch) >= per_row).to(x.dtype)
    row = empty_cell.argmin(dim=0)  # first row of each channel holding a finite value
    ch = torch.arange(n_ch, device=x.device)
    xv, bv = x.movedim(cdim, 1), bad.movedim(cdim, 1)  # (N, C, *rest)
    cells_x = xv[row, ch].reshape(n_ch, -1)
    pos = bv[row, ch].reshape(n_ch, -1).argmin(dim=1)  # first finite position in the cell
    value = cells_x[ch, pos]
    return torch.nan_to_num(value, nan=0.0, posinf=0.0, neginf=0.0)


def _channel_minmax(d: Tensor, cdim: int, chan_dims: tuple[int, ...]) -> tuple[Tensor, Tensor]:
    """Per-channel min and max of the work buffer ``d``.  Reducing one inner dim of a
    contiguous ``(N, C, L)`` view is ~2x faster than a multi-dim reduction (and
    ``aminmax`` with a dim was ~30x slower on CPU)."""
    n, c = d.shape[0], d.shape[cdim]
    if d.is_contiguous() and cdim == 1:
        v, dim = d.reshape(n, c, -1), 2
    elif d.is_contiguous() and cdim == d.ndim - 1:
        v, dim = d.reshape(n, -1, c), 1
    else:
        return d.amin(dim=chan_dims), d.amax(dim=chan_dims)
    return v.amin(dim=dim).amin(dim=0), v.amax(dim=dim).amax(dim=0)


_SCRATCH = threading.local()


def _scratch(x: Tensor) -> Tensor:
    """A work buffer shaped like ``x``.  On CPU one grow-only buffer per thread is reused:
    a fresh multi-MB allocation page-faults on every call and cost more than all the
    arithmetic (measured 1.6 ms of 3.7 ms for 2M values).  Memory held: one buffer the
    size of the largest tensor summarised on that thread.  Other devices have caching
    allocators, so they get a plain ``empty``."""
    if x.device.type != "cpu":
        return torch.empty(x.shape, dtype=x.dtype, device=x.device)
    buf = getattr(_SCRATCH, "buf", None)
    if buf is None or buf.dtype != x.dtype or buf.numel() < x.numel():
        buf = torch.empty(x.numel(), dtype=x.dtype)
        _SCRATCH.buf = buf
    return buf[: x.numel()].view(x.shape)


def release_scratch() -> None:
    """Free the calling thread's CPU work buffer (it is re-created on demand)."""
    _SCRATCH.buf = None


def _check_edges(edges: Tensor, device: torch.device) -> Tensor:
    if not isinstance(edges, Tensor) or edges.ndim != 1 or edges.numel() < 2:
        raise ConfigError("'edges' must be a 1-d tensor of at least 2 increasing values")
    e = edges.detach().to(device=device, dtype=torch.float64)
    return e


def _histogram(x: Tensor, edges: Tensor, max_values: int | None) -> Tensor:
    """Counts ``[underflow, bins..., overflow]`` of the finite values of a (chunked)
    subsample of ``x``; non-finite values are dropped."""
    flat = _subsample(x.reshape(-1), max_values)
    n_bins = edges.numel() - 1
    drop = n_bins + 2  # index of the discarded bin for non-finite values
    if edges.device.type == "cpu" and _is_uniform(edges):
        # Evenly spaced edges: bin index by arithmetic (~4x faster than a binary search).
        # Adding x*0 turns every non-finite value (inf included) into NaN -> dropped.
        lo, width = float(edges[0]), float(edges[-1] - edges[0]) / n_bins
        pos = (flat - lo).mul_(1.0 / width).add_(flat * 0).floor_().clamp_(-1, n_bins).add_(1)
        idx = pos.nan_to_num_(nan=float(drop)).long()
    else:
        idx = torch.searchsorted(edges.to(flat.dtype), flat, right=True)
        idx = torch.where(torch.isfinite(flat), idx, torch.full_like(idx, drop))
    if idx.device.type == "cpu":
        counts = torch.bincount(idx, minlength=drop + 1).to(torch.float64)
    else:  # bincount sizes its output from a device max: a host sync; index_add_ is not
        counts = torch.zeros(drop + 1, dtype=torch.float64, device=idx.device)
        counts.index_add_(0, idx, torch.ones(idx.shape, dtype=torch.float64, device=idx.device))
    return counts[:-1]


_CHUNK = 64  # values per contiguous piece of the histogram subsample (256 B of float32)


def _subsample(flat: Tensor, max_values: int | None) -> Tensor:
    """At most ``max_values`` values of ``flat``: every ``step``-th contiguous chunk of
    ``_CHUNK`` values, ``step`` a prime (so the pick does not alias with power-of-two
    layouts such as channel planes).  Chunks touch few cache lines: a plain strided pick
    read most of a large tensor from memory again (~1.5 ms for 8 MB on 2 CPU threads)."""
    n = flat.numel()
    if max_values is None or n <= max_values:
        return flat
    n_chunks = n // _CHUNK
    want = max_values // _CHUNK
    if want < 1 or n_chunks < 2 * want:
        return flat[:: -(-n // max_values)].contiguous()
    step = _next_prime(-(-n_chunks // want))
    return flat[: n_chunks * _CHUNK].view(n_chunks, _CHUNK)[::step].reshape(-1)


def _next_prime(k: int) -> int:
    k = max(k, 2)
    while any(k % d == 0 for d in range(2, math.isqrt(k) + 1)):
        k += 1
    return k


def _is_uniform(edges: Tensor) -> bool:
    w = edges[1:] - edges[:-1]
    return bool((w - w[0]).abs().max() <= 1e-9 * w[0].abs())
