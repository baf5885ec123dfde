"""Compare: all watched layers of one sampled step scored in one vectorised pass.

The monitor packs every layer's :class:`~shiftwatch.summary.Summary` into one flat float64
tensor (:class:`Layout` fixes the order and sizes), moves it to the host once, and this
module scores it against another flat of the same layout (the previous sample or the
reference) with :func:`shiftwatch.divergence.moment_scores` and
:func:`~shiftwatch.divergence.hist_scores` called once each for all layers and channels.

Histogram edges differ per layer (each is fixed from that layer's data), while
``hist_scores`` takes one edge vector.  All edges here are evenly spaced with the same bin
count, so each layer is mapped affinely onto ``[0, 1]``: the bin proportions (and so
``hist_kl``, ``js``, ``psi``) do not change, and ``w1`` is scaled back exactly because the
Wasserstein-1 distance scales with the axis (``w1`` is reported in reference standard
deviations, which scale the same way).
"""

from __future__ import annotations

import functools
import weakref
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import torch
from torch import Tensor

from .divergence import (
    HIST_METRICS,
    METRICS,
    MOMENT_METRICS,
    Score,
    hist_scores,
    moment_scores,
    spread_terms,
)
from .judge import Observation
from .summary import FIELDS, Summary

__all__ = ["Layout", "Parts", "compare_all", "edges_from_sample", "merge_flats"]

_F = len(FIELDS)
_IX = {k: i for i, k in enumerate(FIELDS)}
_TOP = 3  # worst channels listed per metric


@dataclass
class Parts:
    """Views of one flat sample: ``table (R, F)`` (all layers' rows stacked; channel rows
    then the layer row of each layer), ``extrema (L, 2)``, ``hist (L, B + 2)``."""

    table: np.ndarray
    extrema: np.ndarray
    hist: np.ndarray
    _spread: dict | None = field(default=None, repr=False)

    def layer_table(self, layout: Layout) -> np.ndarray:
        return self.table[layout.layer_rows]

    def spread(self) -> dict[str, np.ndarray]:
        """:func:`~shiftwatch.divergence.spread_terms` of the table's rows (computed on
        first use and kept: a sample is scored as the current one, then as the previous
        one, and the reference for many steps)."""
        if self._spread is None:
            self._spread = spread_terms(self.table)
        return self._spread


@dataclass(eq=False)
class Layout:
    """Order and sizes of the packed flat tensor: for each layer, in order, its
    ``Summary.pack()`` (table, extrema) followed by ``bins + 2`` histogram counts (zeros
    while the layer has no histogram edges yet)."""

    names: tuple[str, ...]
    channels: tuple[int, ...]
    bins: int
    _placeholders: dict = field(default_factory=dict, repr=False)
    _splits: dict = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self.names, self.channels = tuple(self.names), tuple(int(c) for c in self.channels)
        hs = self.bins + 2
        table_ix, ext_ix, hist_ix, layer_rows = [], [], [], []
        off = row = 0
        for c in self.channels:
            k = (c + 1) * _F
            table_ix.append(np.arange(off, off + k).reshape(c + 1, _F))
            ext_ix.append([off + k, off + k + 1])
            hist_ix.append(np.arange(off + k + 2, off + k + 2 + hs))
            layer_rows.append(row + c)
            off += k + 2 + hs
            row += c + 1
        self.size = off
        self._table = np.concatenate(table_ix) if table_ix else np.zeros((0, _F), int)
        self._ext = np.array(ext_ix, int).reshape(-1, 2)
        self._hist = np.array(hist_ix, int).reshape(-1, hs)
        self.layer_rows = np.array(layer_rows, int)
        # channel rows of all layers, concatenated: layer j owns one contiguous segment
        ch = np.array(self.channels, int)
        self.chan_rows = np.concatenate(
            [np.arange(r - c, r) for r, c in zip(self.layer_rows, ch, strict=True)]
        ) if len(ch) else np.zeros(0, int)
        self.chan_seg = np.repeat(np.arange(len(ch)), ch)
        self.chan_starts = np.concatenate([[0], np.cumsum(ch)[:-1]]).astype(int)

    @property
    def hist_sizes(self) -> tuple[int, ...]:
        """Histogram length per layer (``bins + 2``), as :mod:`shiftwatch.distributed`
        layouts describe it."""
        return (self.bins + 2,) * len(self.names)

    def split(self, flat: np.ndarray) -> Parts:
        """The parts of a host flat.  While the flat is alive its split is remembered
        (by identity, with a weak reference: the entry goes when the flat does), so a
        sample split again at later steps (as the previous sample, as the reference)
        keeps its cached :meth:`Parts.spread`.  Memory: the parts of the flats still
        alive, which the monitor bounds (per phase the current and previous sample, and
        the reference).  A flat must not be modified in place once split."""
        key = id(flat)
        hit = self._splits.get(key)
        if hit is not None and hit[0]() is flat:
            return hit[1]
        parts = Parts(flat[self._table], flat[self._ext], flat[self._hist])
        self._splits[key] = (weakref.ref(flat), parts)
        weakref.finalize(flat, self._splits.pop, key, None)
        return parts

    def empty(self) -> np.ndarray:
        """A host flat holding no data (counts 0, extrema +inf/-inf)."""
        flat = np.zeros(self.size)
        flat[self._ext[:, 0]], flat[self._ext[:, 1]] = np.inf, -np.inf
        return flat

    def pack(self, summaries: Sequence[Summary | None], device: torch.device) -> Tensor:
        """One flat float64 tensor on ``device`` from per-layer summaries (``None``: the
        layer saw no data).  One ``torch.cat``; no host synchronisation."""
        parts: list[Tensor] = []
        for i, s in enumerate(summaries):
            if s is None:
                parts.append(self._placeholder(i, device))
                continue
            if s.device != device:
                s = s.to(device)
            parts.append(s.table.reshape(-1))
            parts.append(s.extrema)
            parts.append(s.hist if s.hist is not None else self._placeholder(-1, device))
        return torch.cat(parts)

    def _placeholder(self, i: int, device: torch.device) -> Tensor:
        key = (i, str(device))
        t = self._placeholders.get(key)
        if t is None:
            hs = self.bins + 2
            if i < 0:  # a histogram slot only
                t = torch.zeros(hs, dtype=torch.float64, device=device)
            else:
                k = (self.channels[i] + 1) * _F
                t = torch.zeros(k + 2 + hs, dtype=torch.float64)
                t[k], t[k + 1] = float("inf"), float("-inf")
                t = t.to(device)
            self._placeholders[key] = t
        return t

    def unpack(self, flat: np.ndarray, edges: Sequence[Tensor | None]) -> list[Summary]:
        """Per-layer :class:`Summary` objects (CPU, float64) from a host flat."""
        out, p = [], self.split(flat)
        start = 0
        for i, c in enumerate(self.channels):
            table = torch.from_numpy(p.table[start : start + c + 1].copy())
            start += c + 1
            e = edges[i]
            hist = None if e is None else torch.from_numpy(p.hist[i].copy())
            out.append(Summary(table, torch.from_numpy(p.extrema[i].copy()), hist,
                               None if e is None else e.detach().cpu().double()))
        return out


def merge_flats(a: np.ndarray, b: np.ndarray, layout: Layout) -> np.ndarray:
    """Exact merge of two host flats of one layout (the summary of both samples)."""
    pa, pb = layout.split(a), layout.split(b)
    dummy = torch.zeros(2, dtype=torch.float64)
    # Summary.merge is row-wise: one call merges every row of every layer
    ta = Summary(torch.from_numpy(pa.table), dummy)
    tb = Summary(torch.from_numpy(pb.table), dummy)
    out = np.empty(layout.size)
    out[layout._table] = ta.merge(tb).table.numpy()
    out[layout._ext[:, 0]] = np.minimum(pa.extrema[:, 0], pb.extrema[:, 0])
    out[layout._ext[:, 1]] = np.maximum(pa.extrema[:, 1], pb.extrema[:, 1])
    out[layout._hist] = pa.hist + pb.hist
    return out


def layer_stats(p: Parts, layout: Layout) -> dict[str, np.ndarray]:
    """Layer-wide count, non-finite count, mean, std (population), min, max ``(L,)``."""
    t = p.layer_table(layout)
    n = t[:, _IX["n"]]
    var = np.where(n > 0, np.maximum(t[:, _IX["m2"]], 0) / np.maximum(n, 1), np.nan)
    mean = np.where(n > 0, t[:, _IX["mean"]], np.nan)
    lo = np.where(np.isfinite(p.extrema[:, 0]), p.extrema[:, 0], np.nan)
    hi = np.where(np.isfinite(p.extrema[:, 1]), p.extrema[:, 1], np.nan)
    return {"count": n, "nonfinite": t[:, _IX["nonfinite"]], "mean": mean,
            "std": np.sqrt(var), "min": lo, "max": hi, "m2": t[:, _IX["m2"]]}


def edges_from_sample(stats: dict[str, np.ndarray], *, k: float = 4.0):
    """Robust histogram range per layer from one sample: ``mean +- k std`` clipped to
    the observed ``[min, max]`` (so one-sided inputs such as ReLU outputs keep their hard
    edge), widened when degenerate.  Returns ``(lo, hi)`` arrays; NaN where the layer
    had no finite value.  ``k = 4``: common practice, no source (values beyond it land
    in the underflow/overflow bins, which every histogram metric counts)."""
    mean, std = stats["mean"], stats["std"]
    lo = np.maximum(mean - k * std, stats["min"])
    hi = np.minimum(mean + k * std, stats["max"])
    pad = np.maximum(1e-3 * np.abs(mean), 1e-6)
    bad = ~(hi - lo > pad)
    lo, hi = np.where(bad, mean - pad, lo), np.where(bad, mean + pad, hi)
    return lo, hi


def _nan_where(a: np.ndarray, ok: np.ndarray) -> np.ndarray:
    return np.where(ok, a, np.nan)


_E_ABS_Z = float(np.sqrt(2.0 / np.pi))


def compare_all(
    cur: Parts,
    others: Sequence[Parts],
    layout: Layout,
    ranges: np.ndarray,
    *,
    pool: Parts | None = None,
) -> list[tuple[dict[str, np.ndarray], dict[str, np.ndarray]]]:
    """Score ``cur`` against each of ``others`` for every layer and channel, in one
    vectorised call of each scorer (the comparisons are stacked on a leading axis).

    Args:
        others: the samples to compare with (e.g. previous sample, reference).
        ranges: ``(L, 2)`` histogram ``[lo, hi]`` per layer (NaN: no edges yet).
        pool: a further sample for the pooled noise model of every comparison (the
            reference; when it is also one of ``others`` its rows weigh twice in the
            dof-weighted pooling, which changes little because it already holds many
            more rows than one batch).

    Returns:
        Per entry of ``others``: ``(layer, channel)``; ``layer`` maps ``value``/``noise``/
        ``ratio`` to ``(len(METRICS), L)`` arrays, NaN where unavailable; ``channel`` maps
        ``max_ratio``, ``worst``, ``worst_value``, ``worst_noise``, ``max_value``,
        ``argmax_value``, ``mean_value`` to ``(len(MOMENT_METRICS), L)`` arrays and
        ``top`` to ``(len(MOMENT_METRICS), L, 3)`` channel indices (worst first, -1 pads).
    """
    k_o = len(others)
    lr, L = layout.layer_rows, len(layout.names)
    ct = np.broadcast_to(cur.table, (k_o, *cur.table.shape))
    ot = np.stack([o.table for o in others])
    n_c, n_o = ct[..., _IX["n"]], ot[..., _IX["n"]]
    ok_rows = (n_c > 0) & (n_o > 0)  # (K, R)
    # each sample's spread terms once (cached on its Parts), not once per comparison;
    # the current sample and the pool enter with their own (R, F) rows, broadcast
    # against the (K, R, F) stack of the others only where they meet
    sp_o = [o.spread() for o in others]
    spread = [cur.spread(), {k: np.stack([s[k] for s in sp_o]) for k in sp_o[0]}]
    if pool is not None:
        spread.append(pool.spread())
    ms = moment_scores(cur.table, ot, pool=[] if pool is None else [pool.table],
                       spread=spread)
    mv = np.stack([ms[m].value for m in MOMENT_METRICS], 1)  # (K, 3, R)
    mn = np.stack([ms[m].noise for m in MOMENT_METRICS], 1)
    mr = Score(mv, mn).ratio
    ok_l = ok_rows[:, lr]  # (K, L)
    nm, k = len(METRICS), len(MOMENT_METRICS)
    value, noise, ratio = (np.full((k_o, nm, L), np.nan) for _ in range(3))
    okb = ok_l[:, None, :]
    value[:, :k], noise[:, :k], ratio[:, :k] = (
        _nan_where(a[..., lr], okb) for a in (mv, mn, mr)
    )

    # histogram metrics, each layer mapped onto [0, 1]
    lo, hi = ranges[:, 0], ranges[:, 1]
    ch, oh = np.broadcast_to(cur.hist, (k_o, *cur.hist.shape)), np.stack([o.hist for o in others])
    hn_c, hn_o = ch.sum(-1), oh.sum(-1)
    ok_h = ok_l & np.isfinite(lo) & (hn_c > 0) & (hn_o > 0)
    if ok_h.any():
        width = np.where(np.isfinite(lo), hi - lo, 1.0)
        base = np.where(np.isfinite(lo), lo, 0.0)[:, None]
        tc, to = ct[:, lr], ot[:, lr]
        var_c = np.maximum(tc[..., _IX["m2"]], 0) / np.maximum(tc[..., _IX["n"]], 1)
        var_o = np.maximum(to[..., _IX["m2"]], 0) / np.maximum(to[..., _IX["n"]], 1)
        # the design effect the moment noise model used, recovered from the mean_shift
        # noise floor: noise = E|Z| sqrt(deff (v_c/n_c + v_o/n_o)) / s_o
        se2 = (noise[:, 0] * np.sqrt(np.maximum(var_o, 1e-300)) / _E_ABS_Z) ** 2
        ind = var_c / np.maximum(tc[..., _IX["n"]], 1) + var_o / np.maximum(to[..., _IX["n"]], 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            deff = np.where(ind > 0, se2 / ind, 1.0)
        deff = np.where(np.isfinite(deff), np.maximum(deff, 1.0), 1.0)
        frac = np.where(n_c[:, lr] > 0, hn_c / np.maximum(n_c[:, lr], 1), 1.0)
        deff_h = np.maximum(1.0, 1.0 + (deff - 1.0) * frac)
        unit = _unit_edges(layout.bins)
        hs = hist_scores(
            ch, oh, unit,
            cur_extrema=(cur.extrema - base) / width[:, None],
            ref_extrema=(np.stack([o.extrema for o in others]) - base) / width[:, None],
            ref_std=np.sqrt(var_o) / width, deff=deff_h,
        )
        for j, m in enumerate(HIST_METRICS):
            value[:, k + j] = _nan_where(hs[m].value, ok_h)
            noise[:, k + j] = _nan_where(hs[m].noise, ok_h)
            ratio[:, k + j] = _nan_where(hs[m].ratio, ok_h)

    # per-channel views: channel rows of each layer are one contiguous segment, so
    # segment reductions (reduceat) give per-layer maxima without sorting
    crow, starts, seg = layout.chan_rows, layout.chan_starts, layout.chan_seg
    ok_c = ok_rows[:, crow][:, None, :]  # (K, 1, Rc)
    kx, mx = np.arange(k_o)[:, None, None], np.arange(k)[None, :, None]  # (K, 3, L) picks
    r_c = np.where(ok_c, mr[..., crow], -np.inf)  # (K, 3, Rc)
    v_c = np.where(ok_c, mv[..., crow], -np.inf)
    pos = np.arange(crow.size)
    worst, max_r = _seg_argmax(r_c, starts, seg, pos)
    amax_v, max_v = _seg_argmax(v_c, starts, seg, pos)
    any_ch = np.isfinite(max_r)
    cnt = np.maximum(np.add.reduceat(np.broadcast_to(ok_c, r_c.shape).astype(float),
                                     starts, axis=-1), 1)
    mean_v = np.add.reduceat(np.where(ok_c, mv[..., crow], 0.0), starts, axis=-1) / cnt
    # top channels: the argmax again with the ones found masked out
    top, found, masked = [np.where(any_ch, worst, -1)], worst, r_c.copy()
    for _ in range(_TOP - 1):
        np.put_along_axis(masked, found, -np.inf, -1)  # found: always a valid position
        found, m = _seg_argmax(masked, starts, seg, pos)
        top.append(np.where(np.isfinite(m), found, -1))
    top = np.stack(top, -1)  # (K, 3, L, 3) channel-row positions, -1 pads
    top = np.where(top >= 0, top - starts[:, None], -1)
    worst_row = crow[worst]  # (K, 3, L) table rows of the worst channels
    worst_v, worst_n = mv[kx, mx, worst_row], mn[kx, mx, worst_row]
    out = []
    for i in range(k_o):
        channel = {
            "max_ratio": _nan_where(max_r[i], any_ch[i]),
            "worst": worst[i] - starts,
            "worst_value": _nan_where(worst_v[i], any_ch[i]),
            "worst_noise": _nan_where(worst_n[i], any_ch[i]),
            "max_value": _nan_where(max_v[i], any_ch[i]),
            "argmax_value": amax_v[i] - starts,
            "mean_value": _nan_where(mean_v[i], any_ch[i]),
            "top": top[i],
        }
        out.append(({"value": value[i], "noise": noise[i], "ratio": ratio[i]}, channel))
    return out


@functools.lru_cache(maxsize=8)
def _unit_edges(bins: int) -> np.ndarray:
    """``bins + 1`` evenly spaced edges on ``[0, 1]`` (read only; shared)."""
    e = np.linspace(0.0, 1.0, bins + 1)
    e.flags.writeable = False
    return e


def _seg_argmax(a: np.ndarray, starts: np.ndarray, seg: np.ndarray, pos: np.ndarray):
    """Per segment of the last axis: ``(position of the first maximum, maximum)``; a
    segment of ``-inf`` only gives its first position and ``-inf``."""
    mx = np.fmax.reduceat(a, starts, axis=-1)  # (..., L)
    hit = a == mx[..., seg]
    first = np.minimum.reduceat(np.where(hit, pos, pos.size), starts, axis=-1)
    return np.where(first < pos.size, first, starts), mx


def observation(
    step: int,
    phase: str,
    layout: Layout,
    stats: dict[str, np.ndarray],
    results: dict[str, tuple[dict, dict]],
) -> Observation:
    """Bundle a step's scores for :class:`~shiftwatch.judge.Judge`."""
    present = (stats["count"] + stats["nonfinite"]) > 0
    std = np.where(stats["count"] >= 2, stats["std"], np.nan)
    return Observation(
        step=step, phase=phase, layers=layout.names, present=present,
        nonfinite=stats["nonfinite"], std=std,
        value={a: r[0]["value"] for a, r in results.items()},
        noise={a: r[0]["noise"] for a, r in results.items()},
        ratio={a: r[0]["ratio"] for a, r in results.items()},
        channel={a: r[1] for a, r in results.items()},
    )
