"""Merging layer summaries across processes (torch.distributed, DDP).

Under data parallelism every process (rank) sees a slice of the global batch.  To get
metrics that do not depend on how many processes share the batch, every rank's summaries
are merged into the summary of the whole global batch *before* any metric is computed.
:class:`SummaryReducer` does that on the packed flat float64 tensor the monitor builds
from all layers' summaries (:meth:`shiftwatch.summary.Summary.pack`, concatenated in layer
order), on the tensors' own device, before the one host transfer.

Method: one ``all_gather`` of the packed tensors, then an exact local merge.
-----------------------------------------------------------------------------
Each rank sends its packed tensor (plus one layout fingerprint value) and receives every
rank's; it then merges the ``W`` copies itself: counts, non-finite counts and histogram
counts add; means and ``M2`` use the k-way form of Chan et al.'s update (Chan, Golub &
LeVeque, 1983)::

    n = sum n_i,   mean = sum n_i mean_i / n,   M2 = sum M2_i + sum n_i (mean_i - mean)^2

and min/max take the minimum/maximum.  All ranks run the same float64 operations on the
same gathered tensor in rank order, so they hold bit-identical merged summaries and reach
identical rule decisions.

Why not one ``all_reduce(SUM)`` of power sums ``(n, n*mean, M2 + n*mean^2)``?  Sums of
power sums merge, but turning them back into ``M2 = S2 - S1^2/n`` cancels digits: the
relative error of ``M2`` is about ``eps * (mean/sd)^2``.  For the layer-wide moments of an
input with mean 1e4 and std 1 that is fine in float64 (measured 2e-8 relative,
``eps = 1.1e-16`` times ``1e8``), but the summaries also keep the ``M2`` of *row means*,
whose spread is ``sd / sqrt(values per row)``: with 1024 values per row the same input gave
1.2e-4 relative error (mean 1e6: 0.5), which breaks the 1e-5 agreement this module
promises.  Min and max would also need a second collective (``MAX``).  The gather is
exact whatever the offset and needs one collective.

Cost per sampled step and phase, with ``P`` = total packed length (for each layer
``9 * (channels + 1) + 2`` values, plus ``bins + 2`` once histograms are on; see
:meth:`Summary.packed_size`) and ``W`` = world size:

* collectives: **1** ``all_gather`` (plus, once per run and layout, a 16-byte
  ``all_gather`` comparing the ranks' layouts; edges: one ``broadcast`` when they are fixed);
* bytes: each rank contributes ``8 * (P + 1)`` bytes and receives ``8 * W * (P + 1)``
  (a ring all-gather moves ``8 * (W - 1) * (P + 1)`` bytes in and out of each rank;
  a ring all-reduce of the same tensor would move ``2 * 8 * (W - 1) / W * (P + 1)``, so
  the gather carries ``W / 2`` times the bytes of an all-reduce: equal at ``W = 2``).

:class:`~shiftwatch.monitor.ShiftMonitor` packs both phases (train and val) of a sampled
step into one tensor, so there ``P`` is twice one phase's length; see ``README.md``
for measured figures.

Runs without an initialised process group (or with one process) pay one
``is_initialized()`` check and nothing else: :meth:`SummaryReducer.reduce` returns its
input tensor unchanged.

Requirement: every rank must reduce the same layout (the same layers, channels and
histogram sizes, in the same order) at the same sampled steps.  A layout that differs
only in content is detected (a fingerprint travels with the data) and raises
:class:`~shiftwatch.errors.ConfigError` on every rank; a different *total length* makes
the collective itself fail or wait for the process-group timeout.  Histograms that were
subsampled on the device (``max_hist_values``) merge each rank's subsample, which is
statistically but not bit-for-bit the subsample one process would have taken.
"""

from __future__ import annotations

import hashlib
import struct
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor

from .errors import ConfigError
from .summary import FIELDS, Summary, merge_tables

__all__ = [
    "CommStats",
    "PackLayout",
    "SummaryReducer",
    "distributed_active",
    "merge_tables",
    "rank_and_world",
]

_WIDTH = len(FIELDS)
_IX = {name: i for i, name in enumerate(FIELDS)}


def distributed_active(group=None) -> bool:
    """True when torch.distributed is available, initialised and has more than one rank."""
    import torch.distributed as dist

    if not (dist.is_available() and dist.is_initialized()):
        return False
    return dist.get_world_size(group) > 1


def rank_and_world(group=None) -> tuple[int, int]:
    """``(global rank, world size)``; ``(0, 1)`` without an initialised process group."""
    import torch.distributed as dist

    if not (dist.is_available() and dist.is_initialized()):
        return 0, 1
    return dist.get_rank(), dist.get_world_size(group)


@dataclass(frozen=True)
class PackLayout:
    """Shape of a packed multi-layer tensor: per layer, its channel count and its
    histogram length (``bins + 2``, or 0 without a histogram)."""

    channels: tuple[int, ...]
    hist_sizes: tuple[int, ...]

    def __post_init__(self) -> None:
        if len(self.channels) != len(self.hist_sizes):
            raise ConfigError(
                f"'hist_sizes' must have one entry per layer ({len(self.channels)}; "
                f"got {len(self.hist_sizes)})"
            )
        if any(c < 1 for c in self.channels) or any(h < 0 for h in self.hist_sizes):
            raise ConfigError("'channels' must be >= 1 and 'hist_sizes' >= 0 for every layer")

    @classmethod
    def of(cls, summaries: Sequence[Summary]) -> PackLayout:
        """The layout of ``torch.cat([s.pack() for s in summaries])``."""
        return cls(
            tuple(s.channels for s in summaries),
            tuple(0 if s.hist is None else s.hist.numel() for s in summaries),
        )

    @property
    def size(self) -> int:
        """Total packed length (float64 values)."""
        pairs = zip(self.channels, self.hist_sizes, strict=True)
        return sum((c + 1) * _WIDTH + 2 + h for c, h in pairs)

    @property
    def fingerprint(self) -> float:
        """A float64-exact integer (< 2**52) identifying the layout."""
        raw = struct.pack(f"<{2 * len(self.channels)}q", *self.channels, *self.hist_sizes)
        return float(int.from_bytes(hashlib.sha1(raw).digest()[:6], "little"))


def _comm_device(device: torch.device, group) -> torch.device:
    """Where a collective's tensors must live: NCCL needs the current CUDA device, other
    backends (gloo) take the tensor where it is."""
    import torch.distributed as dist

    if dist.get_backend(group) == "nccl" and device.type != "cuda":
        return torch.device("cuda", torch.cuda.current_device())
    return device


@dataclass
class _Index:
    table: Tensor  # (R * WIDTH,) positions of table entries
    lo: Tensor  # (L,) positions of minima
    hi: Tensor  # (L,) positions of maxima
    hist: Tensor  # (H,) positions of histogram counts


def _build_index(layout: PackLayout, device: torch.device) -> _Index:
    table, lo, hi, hist = [], [], [], []
    off = 0
    for c, h in zip(layout.channels, layout.hist_sizes, strict=True):
        k = (c + 1) * _WIDTH
        table.append(torch.arange(off, off + k))
        lo.append(off + k)
        hi.append(off + k + 1)
        hist.append(torch.arange(off + k + 2, off + k + 2 + h))
        off += k + 2 + h
    return _Index(
        torch.cat(table).to(device),
        torch.tensor(lo, device=device),
        torch.tensor(hi, device=device),
        torch.cat(hist).to(device),
    )


@dataclass
class CommStats:
    """What this rank's reducer has done so far (counted per call, not measured on the
    wire): collectives issued, payload bytes contributed and bytes received."""

    collectives: int = 0
    bytes_sent: int = 0
    bytes_received: int = 0
    by_kind: dict[str, int] = field(default_factory=dict)

    def _add(self, kind: str, sent: int, received: int) -> None:
        self.collectives += 1
        self.bytes_sent += sent
        self.bytes_received += received
        self.by_kind[kind] = self.by_kind.get(kind, 0) + 1


class SummaryReducer:
    """Merges packed summaries across the ranks of a process group.

    Args:
        group: a ``torch.distributed`` process group, or ``None`` for the default
            (world) group.  Whether the reducer is active is decided at each call, so
            one can be built before ``init_process_group`` (Lightning sets up the
            process group after callbacks are constructed).

    Every rank of the group must call each method the same number of times, in the
    same order (they are collectives).
    """

    def __init__(self, *, group=None) -> None:
        self.group = group
        self.stats = CommStats()
        self._index: dict[tuple[PackLayout, torch.device], _Index] = {}
        self._seen: set[PackLayout] = set()

    @property
    def active(self) -> bool:
        """True when calls communicate (initialised process group of > 1 rank)."""
        return distributed_active(self.group)

    @property
    def rank(self) -> int:
        return rank_and_world(self.group)[0]

    @property
    def world_size(self) -> int:
        return rank_and_world(self.group)[1]

    def __call__(self, flat: Tensor, layout: Any) -> Tensor:
        """``reducer(flat, layout)``: the form :class:`~shiftwatch.monitor.ShiftMonitor`
        calls; ``layout`` is a :class:`PackLayout` or any object with ``channels`` and
        ``hist_sizes`` (the monitor's :class:`~shiftwatch.compare.Layout`)."""
        return self.reduce(flat, layout)

    def reduce(self, flat: Tensor, layout: Any) -> Tensor:
        """Merge ``flat`` (this rank's packed summaries, float64, 1-d) with every other
        rank's; returns a tensor of the same layout on the same device holding the
        summaries of all ranks' data together.  Without an active group, returns
        ``flat`` itself.

        The first time a layout is used, the ranks also compare (size, fingerprint) in one
        tiny all_gather, so ranks that learned different layouts get a
        :class:`~shiftwatch.errors.ConfigError` instead of a collective that aborts."""
        if not self.active:
            return flat
        import torch.distributed as dist

        if not isinstance(layout, PackLayout):
            layout = PackLayout(tuple(layout.channels), tuple(layout.hist_sizes))
        if layout not in self._seen:
            self._handshake(layout, flat.device)
            self._seen.add(layout)
        if flat.dtype != torch.float64 or flat.ndim != 1 or flat.numel() != layout.size:
            raise ConfigError(
                f"'flat' must be a 1-d float64 tensor of {layout.size} values for this "
                f"layout (got {tuple(flat.shape)} {flat.dtype}); pack with Summary.pack()"
            )
        world = dist.get_world_size(self.group)
        device = _comm_device(flat.device, self.group)
        header = torch.full((1,), layout.fingerprint, dtype=torch.float64, device=device)
        send = torch.cat([header, flat.to(device)])
        recv = torch.empty(world * send.numel(), dtype=torch.float64, device=device)
        gather = getattr(dist, "all_gather_single", None) or dist.all_gather_into_tensor
        gather(recv, send, group=self.group)
        self.stats._add("all_gather", send.numel() * 8, recv.numel() * 8)
        rows = recv.view(world, send.numel())
        prints = rows[:, 0].tolist()  # W floats to the host: tiny, and makes a mismatch loud
        if any(p != prints[0] for p in prints):
            raise ConfigError(
                "ranks packed different summary layouts (layers, channels or histogram "
                f"bins differ; fingerprints {prints}); every rank must summarise the same "
                "layers at the same sampled steps: check that all ranks run the same model "
                "and monitor options"
            )
        return self._merge(rows[:, 1:], layout).to(flat.device)

    def _handshake(self, layout: PackLayout, device: torch.device) -> None:
        import torch.distributed as dist

        world = dist.get_world_size(self.group)
        device = _comm_device(device, self.group)
        mine = torch.tensor([float(layout.size), layout.fingerprint], dtype=torch.float64,
                            device=device)
        every = torch.empty(2 * world, dtype=torch.float64, device=device)
        gather = getattr(dist, "all_gather_single", None) or dist.all_gather_into_tensor
        gather(every, mine, group=self.group)
        self.stats._add("handshake", 16, 16 * world)
        pairs = every.view(world, 2).tolist()
        if any(p != pairs[0] for p in pairs):
            sizes = [int(p[0]) for p in pairs]
            raise ConfigError(
                "ranks packed different summary layouts (packed sizes per rank: "
                f"{sizes}); every rank must summarise the same layers with the same "
                "channels at the same sampled steps: check that all ranks run the same "
                "model and monitor options, and that every watched layer runs on every rank"
            )

    def _merge(self, rows: Tensor, layout: PackLayout) -> Tensor:
        key = (layout, rows.device)
        ix = self._index.get(key)
        if ix is None:
            ix = self._index[key] = _build_index(layout, rows.device)
        out = torch.empty(rows.shape[1], dtype=torch.float64, device=rows.device)
        tables = rows[:, ix.table].view(rows.shape[0], -1, _WIDTH)
        out[ix.table] = merge_tables(tables).reshape(-1)
        out[ix.lo] = rows[:, ix.lo].amin(0)
        out[ix.hi] = rows[:, ix.hi].amax(0)
        if ix.hist.numel():
            out[ix.hist] = rows[:, ix.hist].sum(0)
        return out

    def reduce_summaries(self, summaries: Sequence[Summary]) -> list[Summary]:
        """Convenience wrapper: pack, :meth:`reduce`, unpack (edges kept).  Returns the
        input summaries unchanged without an active group."""
        if not self.active or not summaries:
            return list(summaries)
        layout = PackLayout.of(summaries)
        flat = torch.cat([s.pack() for s in summaries])
        merged = self.reduce(flat, layout)
        out, off = [], 0
        for s in summaries:
            k = Summary.packed_size(s.channels, s.bins)
            out.append(Summary.unpack(merged[off : off + k], s.channels, s.edges))
            off += k
        return out

    def broadcast(self, tensor: Tensor, *, src: int = 0) -> Tensor:
        """Give every rank rank ``src``'s values of ``tensor`` (e.g. histogram edges
        when a reference is set).  Returns a new tensor; ``tensor`` itself without an
        active group."""
        if not self.active:
            return tensor
        import torch.distributed as dist

        out = tensor.detach().to(_comm_device(tensor.device, self.group), copy=True).contiguous()
        dist.broadcast(out, src=src, group=self.group)
        nbytes = out.numel() * out.element_size()
        self.stats._add("broadcast", nbytes, nbytes)
        return out.to(tensor.device)

    def sum(self, tensor: Tensor) -> Tensor:
        """Element-wise sum over ranks (one ``all_reduce(SUM)``; exact for integer
        tensors such as non-finite counts).  Returns a new tensor on ``tensor``'s device;
        ``tensor`` itself without an active group."""
        if not self.active:
            return tensor
        import torch.distributed as dist

        out = tensor.detach().to(_comm_device(tensor.device, self.group), copy=True).contiguous()
        dist.all_reduce(out, op=dist.ReduceOp.SUM, group=self.group)
        nbytes = out.numel() * out.element_size()
        self.stats._add("all_reduce", nbytes, nbytes)
        return out.to(tensor.device)

    def any(self, flag: bool) -> bool:
        """True on every rank when ``flag`` is true on any rank (one ``all_reduce(MAX)``
        of one value); ``flag`` itself without an active group.  Use it for decisions a
        rank takes from local data alone (merged summaries give identical decisions)."""
        if not self.active:
            return bool(flag)
        import torch.distributed as dist

        device = _comm_device(torch.device("cpu"), self.group)
        t = torch.tensor([1.0 if flag else 0.0], device=device)
        dist.all_reduce(t, op=dist.ReduceOp.MAX, group=self.group)
        self.stats._add("all_reduce", 4, 4)
        return bool(t.item() > 0)
