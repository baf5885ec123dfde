"""``probe_normalization``: the probe's entry point.

One forward pass over the given batches (eval mode, no grad, hooks removed afterwards)
records the moments of every normalization layer's input; everything else is computed
from those tables.  Recalibration, when asked, runs its own passes
(:mod:`shiftwatch.probe.recalibrate`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

from torch import nn

from ..errors import ConfigError
from .analysis import (
    KL_TOLERANCE,
    BatchSizeStats,
    SpreadStats,
    alternative_group_counts,
    batch_size_sensitivity,
    draw_subbatches,
    per_sample_spread,
    running_stats_check,
)
from .capture import Capture, Forward, as_batches, capture_inputs, find_norm_layers, reiterable
from .moments import SampleMoments, norm_kind
from .recalibrate import recalibrate as _recalibrate
from .result import LayerReport, ProbeResult

__all__ = ["DEFAULT_BATCH_SIZES", "KL_TOLERANCE", "probe_normalization"]

#: Batch sizes evaluated by default.
DEFAULT_BATCH_SIZES: tuple[int, ...] = (2, 4, 8, 16, 32)


def _check_options(batch_sizes: Sequence[int], draws: int, tolerance: float, quantile: float,
                   group_counts: Sequence[int] | None, max_samples: int | None) -> tuple[int, ...]:
    try:
        sizes = tuple(sorted({int(b) for b in batch_sizes}))
        ok = bool(sizes) and all(float(b) == int(b) for b in batch_sizes)
    except (TypeError, ValueError):
        ok, sizes = False, ()
    if not ok or sizes[0] < 2:
        raise ConfigError(
            f"'batch_sizes' must be a non-empty list of integers >= 2 (got {batch_sizes!r}); "
            "a batch of 1 has no variance"
        )
    if not isinstance(draws, int) or draws < 16:
        raise ConfigError(f"'draws' must be an integer >= 16 (got {draws!r}); 256 is the default")
    if not (isinstance(tolerance, (int, float)) and math.isfinite(tolerance) and tolerance > 0):
        raise ConfigError(f"'tolerance' must be a positive number of nats (got {tolerance!r})")
    if not (isinstance(quantile, float) and 0 < quantile < 1):
        raise ConfigError(f"'quantile' must be a float in (0, 1) (got {quantile!r})")
    if group_counts is not None and any(not isinstance(g, int) or g < 2 for g in group_counts):
        raise ConfigError(f"'group_counts' must be integers >= 2 (got {group_counts!r})")
    if max_samples is not None and (not isinstance(max_samples, int) or max_samples < 1):
        raise ConfigError(f"'max_samples' must be a positive integer or None (got {max_samples!r})")
    return sizes


def _alternatives(m: SampleMoments, eps: float, group_counts: Sequence[int] | None,
                  own: str, own_groups: int) -> list[SpreadStats]:
    """Layer, group and instance normalization of a channel-first input ``m``, except the
    layer's own (``own``/``own_groups``)."""
    c = m.channels
    out = []
    wanted = [("layer", 1)] + [("group", g) for g in alternative_group_counts(
        c, None if group_counts is None else tuple(group_counts))] + [("instance", c)]
    for norm, g in wanted:
        if (norm, g) == (own, own_groups) or (own == "group" and g == own_groups):
            continue
        grouped = m.grouped(g)
        if grouped.count < 2:
            continue  # one value per group: no variance to normalize by
        out.append(per_sample_spread(grouped, norm=norm, eps=eps))
    return out


def _batch_sizes(m: SampleMoments, sizes: tuple[int, ...], *, eps: float, tolerance: float,
                 quantile: float, draws: int, seed: int, index_cache: dict[int, Any],
                 ) -> tuple[dict[int, BatchSizeStats], dict[int, str], int | None]:
    n = m.rows
    usable = [b for b in sizes if 2 * b <= n]
    skipped = {b: f"needs at least {2 * b} samples (2 x b) in the pool (got {n})"
               for b in sizes if 2 * b > n}
    if not usable:
        return {}, skipped, None
    largest = max(usable)
    key = (n, largest)
    if key not in index_cache:
        index_cache[key] = draw_subbatches(n, largest, draws, seed)
    index = index_cache[key]
    stats = {b: batch_size_sensitivity(m, index, b, eps=eps, tolerance=tolerance,
                                       quantile=quantile) for b in usable}
    smallest = None
    for b in reversed(usable):
        if not stats[b].within_tolerance:
            break
        smallest = b
    return stats, skipped, smallest


def _report(name: str, module: nn.Module, cap: Capture, sizes: tuple[int, ...], *,
            opts: dict[str, Any], index_cache: dict[int, Any]) -> LayerReport:
    kind = norm_kind(module)
    base = {"name": name, "type": type(module).__name__, "kind": kind, "eps": float(module.eps)}
    if name not in cap.moments:
        return LayerReport(sample_shape=(), rows=0, calls=0,
                           notes=["not called by the forward on these batches"], **base)
    m = cap.moments[name]
    base.update(sample_shape=cap.sample_shape.get(name, ()), rows=m.rows, calls=cap.calls[name])
    notes = []
    if cap.calls[name] > cap.batches:
        notes.append(f"called {cap.calls[name]} times in {cap.batches} batches: the inputs of "
                     "all calls are pooled as if they were separate samples")
    if not m.is_finite():
        notes.append("input holds NaN or infinite values: not analysed; fix the model or the "
                     "data first (shiftwatch's monitor counts non-finite values per layer)")
        return LayerReport(notes=notes, **base)
    eps, tol = float(module.eps), opts["tolerance"]
    fields: dict[str, Any] = {}
    if kind != "layer":
        flat = int((m.pooled()[1] < eps).sum())
        if flat:
            notes.append(f"{flat} of {m.channels} channels have a variance below eps={eps:g} "
                         "(constant or dead inputs): their errors read about 0")
    if kind == "batch":
        stats, skipped, smallest = _batch_sizes(
            m, sizes, eps=eps, tolerance=tol, quantile=opts["quantile"], draws=opts["draws"],
            seed=opts["seed"], index_cache=index_cache)
        fields.update(batch_sizes=stats, skipped_batch_sizes=skipped, smallest_batch_size=smallest)
        fields["alternatives"] = _alternatives(m, eps, opts["group_counts"], "batch", 0)
        if module.running_mean is not None and module.running_var is not None:
            fields["running_stats"] = running_stats_check(
                m, module.running_mean, module.running_var, eps=eps, tolerance=tol)
        else:
            notes.append("no running statistics (track_running_stats=False): eval mode "
                         "normalizes with batch statistics too, so the inputs of later layers "
                         "depend on the loader's batch size")
    elif kind == "layer":
        fields["statistics"] = per_sample_spread(m, norm="layer", eps=eps)
    else:
        groups = module.num_groups if kind == "group" else m.channels
        own = m.grouped(groups)
        if own.count >= 2:
            fields["statistics"] = per_sample_spread(own, norm=kind, eps=eps)
        else:
            notes.append("one value per normalization group: the layer outputs its bias only")
        fields["alternatives"] = _alternatives(m, eps, opts["group_counts"], kind, groups)
        if kind == "instance" and getattr(module, "track_running_stats", False):
            notes.append("track_running_stats=True: in eval mode this layer normalizes with "
                         "running statistics, not per-sample ones")
    return LayerReport(notes=notes, **base, **fields)


def probe_normalization(
    model: nn.Module,
    batches: Iterable[Any],
    *,
    batch_sizes: Sequence[int] = DEFAULT_BATCH_SIZES,
    tolerance: float = KL_TOLERANCE,
    quantile: float = 0.9,
    draws: int = 256,
    seed: int = 0,
    group_counts: Sequence[int] | None = None,
    recalibrate: bool = False,
    in_place: bool = False,
    forward: Forward | None = None,
    max_samples: int | None = None,
    progress: bool | None = None,
) -> ProbeResult:
    """Probe every normalization layer of ``model`` on ``batches``.

    Args:
        model: any ``nn.Module``; run in eval mode under ``torch.no_grad`` and left as it
            was (training flags restored, hooks removed) unless ``recalibrate`` and
            ``in_place`` are both set.
        batches: iterable of input batches: tensors, ``(input, target)`` tuples (a
            DataLoader), or anything ``forward`` accepts; a single tensor is one batch.
            Tensors are moved to the model's device.  How the data is split into batches
            does not matter: sub-batches are drawn from all samples pooled.
        batch_sizes: batch sizes to evaluate (each needs at least twice as many samples).
        tolerance: KL, nats per channel, that the ``quantile`` of sub-batches must stay
            under for a batch size to count as within tolerance; also the KL above which
            running statistics are called stale.  See :data:`KL_TOLERANCE`.
        quantile: share of sub-batches that must stay under ``tolerance``.
        draws: random sub-batches per batch size.
        seed: seed of the sub-batch draws (results are deterministic for a seed).
        group_counts: group counts tried as alternatives (default 2, 4, 8, 16, 32; only
            those dividing the channel count).
        recalibrate: also recompute BatchNorm running statistics exactly from ``batches``
            (see :func:`~shiftwatch.probe.recalibrate.recalibrate`); on a deep copy, which
            is returned as ``result.recalibrated_model``, unless ``in_place``.
        in_place: recalibrate ``model`` itself.
        forward: ``forward(model, batch)`` runs one batch; default ``model(batch)`` for a
            tensor and ``model(batch[0])`` for a tuple or list.
        max_samples: stop reading batches once this many samples were used.
        progress: progress lines on stderr; ``None`` shows them only on a terminal.

    Returns:
        :class:`~shiftwatch.probe.result.ProbeResult`.

    Raises:
        ConfigError: a bad option, no normalization layer, too few samples (fewer than
            twice the smallest batch size), or the model rejected a batch.
        UnsupportedInputError: a batch or layer input of an unusable type.
    """
    sizes = _check_options(batch_sizes, draws, tolerance, quantile, group_counts, max_samples)
    if in_place and not recalibrate:
        raise ConfigError("'in_place' only applies with recalibrate=True; set both or neither")
    layers = find_norm_layers(model)
    batches = reiterable(batches) if recalibrate else as_batches(batches)
    cap = capture_inputs(model, batches, layers, forward=forward, max_samples=max_samples,
                         progress=progress, label="probe")
    need = 2 * sizes[0] if any(norm_kind(m) == "batch" for _, m in layers) else 2
    pool = min((cap.moments[n].rows for n, m in layers
                if n in cap.moments and norm_kind(m) == "batch"), default=cap.samples)
    if pool < need:
        raise ConfigError(
            f"'batches' must hold at least {need} samples (twice the smallest batch size "
            f"{sizes[0]}, so that sub-batches differ) but gave {pool}; pass more batches or "
            "smaller batch sizes"
        )
    opts = {"tolerance": float(tolerance), "quantile": quantile, "draws": draws, "seed": seed,
            "group_counts": group_counts}
    cache: dict[int, Any] = {}
    modules = dict(layers)
    order = cap.order + [n for n, _ in layers if n not in cap.calls]
    reports = [_report(n, modules[n], cap, sizes, opts=opts, index_cache=cache) for n in order]
    recal, notes = None, []
    if recalibrate and not any(r.running_stats is not None for r in reports):
        notes.append("recalibration asked, but no BatchNorm layer with running statistics "
                     "was called: nothing was recalibrated")
    elif recalibrate:
        recal = _recalibrate(model, batches, in_place=in_place, forward=forward,
                             max_samples=max_samples, tolerance=float(tolerance),
                             progress=progress)
        reports = [
            r if r.name not in recal.before else LayerReport(**{
                **{f: getattr(r, f) for f in r.__dataclass_fields__},
                "recalibration": {"before": recal.before[r.name],
                                  "after": recal.after.get(r.name)},
            })
            for r in reports
        ]
    return ProbeResult(
        layers=reports, samples=cap.samples, batches=cap.batches, batch_sizes=sizes,
        draws=draws, seed=seed, tolerance=float(tolerance), quantile=quantile,
        recalibrated_in_place=None if recal is None else recal.in_place, notes=notes,
        recalibrated_model=None if recal is None else recal.model,
    )
