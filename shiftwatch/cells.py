"""Cell kernels: a tensor's per-(row, channel) sums, and the float64 table built from them.

A *cell* is one (row, channel) pair: the values of one sample in one channel.  Every
statistic of a :class:`~shiftwatch.summary.Summary` follows from per-cell sums about a
per-channel shift, combined in float64.  This module holds the kernels that compute them
(the full-size passes over the input are the whole cost of summarising) and the float64
tail; :mod:`shiftwatch.summary` owns the data structure, merging and transport.

Three table paths give the same table up to rounding:

* **dense CPU** (the common case): contiguous, every value finite.  Six full-size
  passes (shift, sum, square, sum, min, max), then ~20 small numpy operations.
* **one value per cell** (``(N, F)`` inputs of linear layers): float64 numpy directly.
* **general** (any device, NaN/inf present): branch-free torch, no host
  synchronisation; non-finite values are counted and excluded.
"""

from __future__ import annotations

import functools
import math
import threading
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import torch
from torch import Tensor

from .errors import ConfigError

#: Column names of :attr:`Summary.table <shiftwatch.summary.Summary.table>`.
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


def reduce_moments(n, mean, m2, dim: int):
    """Merge many (count, mean, M2) triples along ``dim`` (0 or 1) in one vectorised step
    (the k-way form of Chan, Golub & LeVeque 1983).  Works on torch tensors and on numpy
    arrays alike (the CPU tail runs in numpy)."""
    xp = np if isinstance(n, np.ndarray) else torch
    total = n.sum(dim)
    mu = (n * mean).sum(dim) / total.clip(min=1)
    dev = mean - (mu[None] if dim == 0 else mu[:, None])
    m2_tot = (n * dev * dev).sum(dim)
    if m2 is not None:
        m2_tot = m2_tot + m2.sum(dim)
    return total, xp.where(total > 0, mu, 0.0), m2_tot


Finisher = Callable[[], "tuple[Tensor, Tensor]"]


def table_parts(x: Tensor, cdim: int) -> tuple[Finisher, bool | None]:
    """Stage one of the table: every full-size pass over ``x``, now; the small float64
    tail is returned as a function to call later (it holds small per-cell tensors, never
    ``x``).  The monitor runs stage one in the forward hook and all layers' tails
    back to back at ``step()``, where the numpy code is warm: inside a training step each
    small call costs 2-5x its isolated time.

    Returns ``(finish, all_finite)``; ``finish()`` gives ``(table, extrema)``.
    ``all_finite`` is ``True``/``False`` where the path found out (CPU), ``None`` where
    finding out would synchronise (other devices)."""
    n_rows, n_ch = x.shape[0], x.shape[cdim]
    reduce_dims = tuple(d for d in range(1, x.ndim) if d != cdim)
    per_row = math.prod(x.shape[d] for d in reduce_dims)
    on_cpu = x.device.type == "cpu"
    if per_row == 1:
        # One value per (row, channel), e.g. (N, F) inputs of linear layers: the tensor is
        # small, so a direct float64 two-pass is both exact and cheaper than the cell path.
        v = x.reshape(n_rows, n_ch).to(torch.float64, copy=True)
        if not on_cpu:
            return (lambda: _table_single_values(v)), None
        v64 = v.numpy()
        with np.errstate(invalid="ignore"):  # inf - inf: NaN, no warning to the user
            total = float(v64.sum())
        if math.isfinite(total):  # float64 sums of float32 cannot overflow
            return (lambda: _from_numpy(*_single_values_dense(v64))), True
        return (lambda: _table_single_values(v)), False
    if on_cpu:
        dense = _dense_cpu(x, cdim, per_row)
        if dense is not None:
            return dense, True
    # Full-size passes are the cost here (each ~0.1-0.2 ms per 2M values on 2 CPU
    # threads); boolean masks are avoided because building them is ~10x slower.  One work
    # buffer serves every pass.
    shape_b = [1] * x.ndim
    shape_b[cdim] = n_ch
    chan_dims = (0, *reduce_dims)

    def rsum(t: Tensor) -> Tensor:
        return t.sum(dim=reduce_dims)

    s1, s2, nf, shift, lo_c, hi_c = _cells_general(
        x, cdim, reduce_dims, per_row, shape_b, chan_dims, rsum
    )
    s1, s2, nf = (t.reshape(n_rows, n_ch) for t in (s1, s2, nf))
    parts = (s1, s2, nf, shift.reshape(n_ch).to(torch.float64),
             lo_c.to(torch.float64), hi_c.to(torch.float64))
    if on_cpu:
        # ~40 small float64 operations: numpy costs ~1 us each where torch costs ~7 us
        return (lambda: _from_numpy(*_finish(*(t.numpy() for t in parts), per_row))), False
    return (lambda: _finish(*parts, per_row)), None


def _from_numpy(table: np.ndarray, extrema: np.ndarray) -> tuple[Tensor, Tensor]:
    return torch.from_numpy(table), torch.from_numpy(extrema)


def _dense_cpu(x: Tensor, cdim: int, per_row: int) -> Finisher | None:
    """Stage one for a contiguous CPU tensor in which every value is finite, in six
    full-size passes: shift by the channel's first value of row 0, per-cell sum, square
    in place and sum, and the layer's min and max.  Returns ``None`` when the input is not
    contiguous in a supported layout, or holds a NaN/inf (then the min or the max is not
    finite), so the general path runs instead.  Looking at them is no device
    synchronisation on CPU: the data is on the host already.

    Each torch call costs ~5-15 us of dispatch when a training step has just evicted the
    caches, so this path keeps their number small."""
    if not x.is_contiguous() or cdim not in (1, x.ndim - 1):
        return None
    n, c = x.shape[0], x.shape[cdim]
    if cdim == 1:
        v, red = x.view(n, c, per_row), 2
        first = v[0, :, :1]  # (C, 1): broadcasts against (N, C, L)
    else:
        v, red = x.view(n, per_row, c), 1
        first = v[0, :1, :]  # (1, C)
    lo, hi = x.min(), x.max()  # NaN propagates; inf stays: both finite iff all values are
    lo_f, hi_f = float(lo), float(hi)
    if not (math.isfinite(lo_f) and math.isfinite(hi_f)):
        return None  # exact exclusion of NaN/inf needed: the general path
    shift = first.numpy().reshape(-1).astype(np.float64)  # a copy
    d = torch.sub(v, first, out=_scratch(v))
    s1 = d.sum(red)
    # squares in place, then a cascade sum: torch.linalg.vector_norm would be one pass
    # fewer but accumulates naively (measured 2e-5 relative error at 65,536 values per
    # cell against 2e-7 here)
    s2 = d.square_().sum(red)

    cells = DenseCells(s1, s2, shift, per_row, lo_f, hi_f)

    def finish() -> tuple[Tensor, Tensor]:
        (done,) = finish_dense_many([cells])
        return done

    # what finish_dense_many needs to run this tail together with other layers' tails
    finish.dense = cells  # type: ignore[attr-defined]
    return finish


@dataclass(frozen=True)
class DenseCells:
    """Stage-one result of the dense CPU path: per-cell sums ``s1`` and sums of squares
    ``s2`` ``(N, C)`` (float32) about the per-channel ``shift`` ``(C,)``, ``per_row``
    finite values per cell, and the layer's finite ``lo``/``hi``."""

    s1: Tensor
    s2: Tensor
    shift: np.ndarray
    per_row: int
    lo: float
    hi: float


def finish_dense_many(cells: list[DenseCells]) -> list[tuple[Tensor, Tensor]]:
    """``(table, extrema)`` of each entry, the same as its own tail (up to rounding), with
    the float64 arithmetic of all entries of one row count done together: the channels of
    all layers side by side, the per-layer parts by segment sums.  At ``step()`` this
    replaces ~25 small numpy calls per layer by ~40 in all (each costs ~5-15 us there)."""
    out: list[tuple[Tensor, Tensor] | None] = [None] * len(cells)
    groups: dict[int, list[int]] = {}
    for i, c in enumerate(cells):
        groups.setdefault(c.s1.shape[0], []).append(i)
    for ix in groups.values():
        part = [cells[i] for i in ix]
        for i, c, table in zip(ix, part, _finish_dense_segments(part), strict=True):
            out[i] = (torch.from_numpy(table),
                      torch.tensor([c.lo, c.hi], dtype=torch.float64))
    return out  # type: ignore[return-value]


def _finish_dense_segments(part: list[DenseCells]) -> list[np.ndarray]:
    """Per layer, the float64 table from per-cell sums ``s1`` and sums of squares ``s2``
    ``(N, C_j)`` about the per-channel ``shift`` when every cell holds ``per_row`` finite
    values, for layers of one row count ``N`` side by side: layer ``j`` owns channel
    columns ``starts[j]:starts[j] + C_j`` and layer column ``Ctot + j`` (each row's
    channels merged), so one set of reductions over rows fills every table.  Equal cell
    counts turn the Chan merges of :func:`_finish` into plain means: a channel's mean is
    the mean of its cell means, and so on.  (Sums divided by counts rather than
    ``ndarray.mean``, whose Python wrapper costs more than the arithmetic here.)"""
    n_rows = part[0].s1.shape[0]
    ch, pr, starts, pr_c, w, order, cuts = _segments(
        tuple(c.s1.shape[1] for c in part), tuple(float(c.per_row) for c in part))
    c_tot, n_l = int(ch.sum()), len(part)
    s1 = torch.cat([c.s1 for c in part], 1).numpy().astype(np.float64)
    s2 = torch.cat([c.s2 for c in part], 1).numpy().astype(np.float64)
    shift = np.concatenate([c.shift for c in part])
    big_m = np.empty((n_rows, c_tot + n_l))
    big_m2 = np.empty((n_rows, c_tot + n_l))
    m, m2 = big_m[:, :c_tot], big_m2[:, :c_tot]
    np.add(s1 / pr_c, shift, out=m)
    np.maximum(s2 - s1 * s1 / pr_c, 0.0, out=m2)
    m_r = np.add.reduceat(m, starts, axis=1) / ch  # (N, L): each row's layer mean
    dev = m - np.repeat(m_r, ch, axis=1)
    big_m[:, c_tot:] = m_r
    big_m2[:, c_tot:] = (np.add.reduceat(m2, starts, axis=1)
                         + pr * np.add.reduceat(dev * dev, starts, axis=1))
    mean = big_m.sum(0) / n_rows
    dev = big_m - mean
    ss = np.einsum("ij,ij->j", dev, dev)
    v = big_m2 / w
    row_var = v.sum(0) / n_rows
    dv = v - row_var
    cols = {
        "n": n_rows * w, "mean": mean, "m2": big_m2.sum(0) + w * ss, "nonfinite": 0.0,
        "rows": float(n_rows), "row_mean": mean, "row_mean_m2": ss,
        "row_var": row_var, "row_var_m2": np.einsum("ij,ij->j", dv, dv),
    }
    table = np.empty((c_tot + n_l, len(FIELDS)))
    for k, name in enumerate(FIELDS):
        table[:, k] = cols[name]
    return np.split(table[order], cuts)


@functools.lru_cache(maxsize=64)
def _segments(channels: tuple[int, ...], per_row: tuple[float, ...]):
    """Index arithmetic of :func:`_finish_dense_segments` for one set of layers (the
    same at every sampled step): channel counts ``ch``, values per cell ``pr`` per
    layer, column ``starts``, values per cell per channel column ``pr_c`` and per table
    column ``w``, the row ``order`` that puts each layer's channel rows before its layer
    row, and the ``cuts`` between layers.  The arrays are shared: read only."""
    ch = np.array(channels)
    pr = np.array(per_row, dtype=np.float64)
    starts = np.concatenate([[0], np.cumsum(ch)[:-1]])
    c_tot = int(ch.sum())
    pr_c = np.repeat(pr, ch)
    w = np.concatenate([pr_c, pr * ch])
    order = np.concatenate([np.r_[s:s + c, c_tot + j]
                            for j, (s, c) in enumerate(zip(starts, ch, strict=True))])
    out = (ch, pr, starts, pr_c, w, order, np.cumsum(ch + 1)[:-1])
    for a in out:
        a.flags.writeable = False
    return out


def _single_values_dense(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Table and extrema of a float64 ``(N, C)`` array of finite values, one per cell:
    per channel each value is its own row; per row the channels are the values."""
    n_rows, n_ch = v.shape
    mean_c = v.sum(0) / n_rows
    dev = v - mean_c
    m2_c = np.einsum("ij,ij->j", dev, dev)
    mean_r = v.sum(1) / n_ch
    dev = np.subtract(v, mean_r[:, None], out=dev)
    var_r = np.einsum("ij,ij->i", dev, dev) / n_ch  # within-row population variances
    mean_l = mean_c.sum() / n_ch
    d_c, d_r = mean_c - mean_l, mean_r - mean_l
    m2_l = m2_c.sum() + n_rows * d_c.dot(d_c)
    row_var = var_r.sum() / n_rows
    d_v = var_r - row_var
    out = np.empty((n_ch + 1, len(FIELDS)))
    cols = {
        "n": (n_rows, n_rows * n_ch), "mean": (mean_c, mean_l), "m2": (m2_c, m2_l),
        "nonfinite": (0.0, 0.0), "rows": (n_rows, n_rows),
        "row_mean": (mean_c, mean_l), "row_mean_m2": (m2_c, d_r.dot(d_r)),
        "row_var": (0.0, row_var), "row_var_m2": (0.0, d_v.dot(d_v)),
    }
    for k, name in enumerate(FIELDS):
        ch, layer = cols[name]
        out[:n_ch, k] = ch
        out[n_ch, k] = layer
    return out, np.array([v.min(), v.max()])


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
    n_r, m_r, m2_r = reduce_moments(cnt, m_rc, m2_rc, 1)
    cat = np.concatenate if xp is np else torch.cat
    cnt = cat([cnt, n_r[:, None]], 1)
    m_rc = cat([m_rc, m_r[:, None]], 1)
    m2_rc = cat([m2_rc, m2_r[:, None]], 1)
    nf = cat([nf, nf.sum(1)[:, None]], 1)
    n, mean, m2 = reduce_moments(cnt, m_rc, m2_rc, 0)
    valid = (cnt > 0) + cnt * 0.0  # float64 in numpy and torch alike
    v_rc = m2_rc / cnt.clip(min=1)
    rows, row_mean, row_mean_m2 = reduce_moments(valid, m_rc, None, 0)
    _, row_var, row_var_m2 = reduce_moments(valid, v_rc, None, 0)
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
    n_l, mean_l, m2_l = reduce_moments(n_c, mean_c, m2_c, 0)
    valid = (n_r > 0) + n_r * 0.0  # float64 in numpy and torch alike
    rows, row_mean, row_mean_m2 = reduce_moments(valid, mean_r, None, 0)
    _, row_var, row_var_m2 = reduce_moments(valid, m2_r / n_r.clip(min=1), None, 0)
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


def check_edges(edges: Tensor, device: torch.device) -> Tensor:
    """``edges`` as float64 on ``device``; the same object when it already is (so the
    cached bin arithmetic of :func:`_uniform_params` is found again on the next call)."""
    if not isinstance(edges, Tensor) or edges.ndim != 1 or edges.numel() < 2:
        raise ConfigError("'edges' must be a 1-d tensor of at least 2 increasing values")
    if edges.dtype == torch.float64 and edges.device == device and not edges.requires_grad:
        return edges
    return edges.detach().to(device=device, dtype=torch.float64)


def _uniform_params(edges: Tensor) -> tuple[float, float] | None:
    """``(first edge, bins per unit)`` of evenly spaced CPU edges, else ``None``.  Cached
    on the tensor (keyed by its version counter, which in-place writes bump): reading it
    costs ~10 small tensor operations."""
    cached = getattr(edges, "_shiftwatch_uniform", None)
    if cached is not None and cached[0] == edges._version:
        return cached[1]
    w = edges[1:] - edges[:-1]
    uniform = bool((w - w[0]).abs().max() <= 1e-9 * w[0].abs())
    params = None
    if uniform:
        params = (float(edges[0]), (edges.numel() - 1) / float(edges[-1] - edges[0]))
    try:
        edges._shiftwatch_uniform = (edges._version, params)
    except (AttributeError, RuntimeError):  # e.g. a tensor subclass without __dict__
        pass
    return params


def histogram(x: Tensor, edges: Tensor, max_values: int | None, all_finite: bool | None) -> Tensor:
    """Counts ``[underflow, bins..., overflow]`` of the finite values of a (chunked)
    subsample of ``x``; non-finite values are dropped.  ``all_finite=True`` (known from
    the table pass) skips the non-finite handling."""
    flat = _subsample(x.reshape(-1), max_values, keep_view=bool(all_finite))
    n_bins = edges.numel() - 1
    drop = n_bins + 2  # index of the discarded bin for non-finite values
    uniform = _uniform_params(edges) if edges.device.type == "cpu" else None
    if uniform is not None:
        # Evenly spaced edges: bin index by arithmetic (~4x faster than a binary search).
        # Subtract before scaling: a fused multiply-add loses the bin in float32 when the
        # offset is large against the bin width.
        lo, per_unit = uniform
        pos = torch.sub(flat, lo).mul_(per_unit)
        if all_finite:
            # "bin index + 1"; clamping to [0, B + 1] first makes the integer conversion
            # (truncation) a floor
            idx = pos.add_(1.0).clamp_(0, n_bins + 1).long()
            return torch.bincount(idx.view(-1), minlength=drop).to(torch.float64)
        # Adding x*0 turns every non-finite value (inf included) into NaN -> dropped.
        pos = pos.add_(flat * 0).floor_().clamp_(-1, n_bins).add_(1)
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


def _subsample(flat: Tensor, max_values: int | None, *, keep_view: bool = False) -> Tensor:
    """At most ``max_values`` values of ``flat``: every ``step``-th contiguous chunk of
    ``_CHUNK`` values, ``step`` a prime (so the pick does not alias with power-of-two
    layouts such as channel planes).  Chunks touch few cache lines: a plain strided pick
    read most of a large tensor from memory again (~1.5 ms for 8 MB on 2 CPU threads).
    ``keep_view=True`` returns the chunk pick as a strided ``(K, 64)`` view (no copy) for
    callers that only read it element-wise."""
    n = flat.numel()
    if max_values is None or n <= max_values:
        return flat
    n_chunks = n // _CHUNK
    want = max_values // _CHUNK
    if want < 1 or n_chunks < 2 * want:
        return flat[:: -(-n // max_values)].contiguous()
    step = _next_prime(-(-n_chunks // want))
    picked = flat[: n_chunks * _CHUNK].view(n_chunks, _CHUNK)[::step]
    return picked if keep_view else picked.reshape(-1)


@functools.lru_cache(maxsize=256)
def _next_prime(k: int) -> int:
    k = max(k, 2)
    while any(k % d == 0 for d in range(2, math.isqrt(k) + 1)):
        k += 1
    return k
