"""Exact recalibration of BatchNorm running statistics from given batches.

PyTorch updates running statistics with a momentum average of batch statistics, and even
with ``momentum=None`` (a cumulative average) the running variance is the average of the
batches' own variances, which misses the spread of the batch means.  Here each layer gets
the population statistics of its inputs over all given samples instead: the mean, and the
unbiased variance (``M2 / (n - 1)`` over all ``n`` values of a channel), as BatchNorm's
definition of the running variance uses the unbiased estimate.  Every sample has the same
weight whatever the batch sizes.

Layers are set one at a time in the order the forward calls them, each from its inputs
with all earlier layers already recalibrated, so the result is a fixed point: running the
recalibrated model over the same batches (eval mode) gives every layer inputs whose
statistics equal its running statistics.  Cost: one forward pass over the batches per
BatchNorm layer (each pass stops right after the layer it serves when that layer is
called once per forward), plus one pass before and one after for the report.
"""

from __future__ import annotations

import copy
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from ..errors import ConfigError
from .analysis import KL_TOLERANCE, RunningStatsCheck, running_stats_check
from .capture import Forward, capture_inputs, find_norm_layers, reiterable
from .moments import norm_kind

__all__ = ["RecalibrationResult", "recalibrate"]


@dataclass(frozen=True)
class RecalibrationResult:
    """Attributes:
        model: the recalibrated model (the same object when recalibrated in place).
        in_place: whether ``model`` is the caller's model.
        before, after: per layer name, running statistics vs the data before and after.
        skipped: per layer name, why it was not recalibrated.
    """

    model: nn.Module
    in_place: bool
    before: dict[str, RunningStatsCheck]
    after: dict[str, RunningStatsCheck]
    skipped: dict[str, str]

    def to_dict(self) -> dict[str, Any]:
        from .result import encode  # local: result imports this module

        return {
            "in_place": self.in_place,
            "layers": {
                name: {"before": encode(self.before[name]), "after": encode(self.after.get(name))}
                for name in self.before
            },
            "skipped": dict(self.skipped),
        }


def _with_running_stats(model: nn.Module) -> list[tuple[str, nn.Module]]:
    return [
        (name, m)
        for name, m in find_norm_layers(model)
        if norm_kind(m) == "batch" and m.running_mean is not None and m.running_var is not None
    ]


def recalibrate(
    model: nn.Module,
    batches: Iterable[Any],
    *,
    in_place: bool = False,
    forward: Forward | None = None,
    max_samples: int | None = None,
    tolerance: float = KL_TOLERANCE,
    progress: bool | None = None,
) -> RecalibrationResult:
    """Set every BatchNorm layer's running statistics to the population statistics of its
    inputs over ``batches``, and report the mismatch before and after.

    Args:
        model: the model; left unchanged unless ``in_place`` (a deep copy is recalibrated).
        batches: iterable of input batches (tensors, ``(input, target)`` tuples, or anything
            ``forward`` accepts); iterated several times (a generator is read into a list).
            Use a deterministic loader: random augmentation changes the inputs between
            passes and the result is then no longer exact.
        in_place: recalibrate ``model`` itself.
        forward: ``forward(model, batch)``; default ``model(batch)`` or ``model(batch[0])``.
        max_samples: stop reading batches once this many samples were used.
        tolerance: KL (nats per channel) above which a layer is reported stale.
        progress: progress lines on stderr (``None``: only when stderr is a terminal).

    Returns:
        :class:`RecalibrationResult`.  ``after`` measured on the same batches is zero up to
        rounding by construction; measure on held-out data to judge the recalibration.

    Raises:
        ConfigError: no BatchNorm layer with running statistics, the model cannot be
            copied, or a forward fails (see :func:`~shiftwatch.probe.capture.capture_inputs`).
    """
    batches = reiterable(batches)
    layers = _with_running_stats(model)
    if not layers:
        raise ConfigError(
            "'model' has no BatchNorm layer with running statistics (track_running_stats="
            "True); there is nothing to recalibrate"
        )
    if in_place:
        target = model
    else:
        try:
            target = copy.deepcopy(model)
        except Exception as exc:
            raise ConfigError(
                f"could not copy 'model' to recalibrate it ({type(exc).__name__}: {exc}); "
                "pass in_place=True to recalibrate the model itself"
            ) from exc
        layers = _with_running_stats(target)
    by_name = dict(layers)
    opts = {"forward": forward, "max_samples": max_samples, "progress": progress}

    first = capture_inputs(target, batches, layers, label="recalibrate: before", **opts)
    before = {
        name: running_stats_check(first.moments[name], by_name[name].running_mean,
                                  by_name[name].running_var, eps=by_name[name].eps,
                                  tolerance=tolerance)
        for name in first.order if name in first.moments
    }
    skipped = {name: "not called by the forward" for name, _ in layers if name not in before}
    for k, name in enumerate(first.order):
        if name not in first.moments:
            continue
        if k == 0:
            moments = first.moments[name]  # nothing runs before the first layer
        else:
            once = first.calls[name] == first.batches
            cap = capture_inputs(
                target, batches, [(name, by_name[name])], stop_after=name if once else None,
                label=f"recalibrate {k + 1}/{len(first.order)}", **opts,
            )
            moments = cap.moments[name]
        mean, var = moments.pooled(unbiased=True)
        layer = by_name[name]
        with torch.no_grad():
            layer.running_mean.copy_(mean.to(layer.running_mean.dtype))
            layer.running_var.copy_(var.to(layer.running_var.dtype))
    last = capture_inputs(target, batches, layers, label="recalibrate: after", **opts)
    after = {
        name: running_stats_check(last.moments[name], by_name[name].running_mean,
                                  by_name[name].running_var, eps=by_name[name].eps,
                                  tolerance=tolerance)
        for name in before if name in last.moments
    }
    return RecalibrationResult(target, in_place, before, after, skipped)
