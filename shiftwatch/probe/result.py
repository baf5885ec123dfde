"""Result objects of the probe and their JSON form.

The JSON layout (``schema`` 1) is documented in ``README.md``.  Floats that are not
finite are written as ``null``; batch sizes are object keys, hence strings (``"2"``).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

from torch import nn

from .analysis import BatchSizeStats, RunningStatsCheck, SpreadStats

__all__ = ["SCHEMA", "LayerReport", "ProbeResult", "encode"]

SCHEMA = 1


def encode(obj: Any) -> Any:
    """Plain JSON values: dataclasses become objects, non-finite floats ``None``."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: encode(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): encode(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [encode(v) for v in obj]
    return obj


@dataclass(frozen=True)
class LayerReport:
    """What the probe found for one normalization layer.

    Attributes:
        name: qualified module name (``model.named_modules()``).
        type: class name, e.g. ``"BatchNorm2d"``.
        kind: ``"batch"``, ``"group"``, ``"layer"`` or ``"instance"``.
        sample_shape: input shape without the batch axis (first call).
        rows: rows of the moment table (samples; LayerNorm: leading positions).
        calls: calls over all batches (more than the number of batches when the module
            is used several times per forward).
        eps: the layer's ``eps``.
        batch_sizes: BatchNorm only: per batch size, :class:`BatchSizeStats`.
        skipped_batch_sizes: batch sizes not evaluated and why.
        smallest_batch_size: smallest evaluated size from which on every evaluated size is
            within tolerance (``None``: none is).
        statistics: non-BatchNorm layers: spread across samples of the layer's own
            per-sample statistics (independent of the batch size).
        alternatives: channel-first inputs: the same spread for layer, instance and group
            normalization of this input.
        running_stats: BatchNorm with running statistics: comparison with the data.
        recalibration: ``{"before": ..., "after": ...}`` when recalibration was asked.
        notes: anything the numbers need beside them.
    """

    name: str
    type: str
    kind: str
    sample_shape: tuple[int, ...]
    rows: int
    calls: int
    eps: float
    batch_sizes: dict[int, BatchSizeStats] | None = None
    skipped_batch_sizes: dict[int, str] = field(default_factory=dict)
    smallest_batch_size: int | None = None
    statistics: SpreadStats | None = None
    alternatives: list[SpreadStats] = field(default_factory=list)
    running_stats: RunningStatsCheck | None = None
    recalibration: dict[str, RunningStatsCheck | None] | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def batch_dependent(self) -> bool:
        """Whether the layer normalizes with statistics of the whole batch in training."""
        return self.kind == "batch"

    def to_dict(self) -> dict[str, Any]:
        out = encode(self)
        out["sample_shape"] = list(self.sample_shape)
        out["batch_dependent"] = self.batch_dependent
        return out


@dataclass(frozen=True)
class ProbeResult:
    """Result of :func:`~shiftwatch.probe.probe_normalization`.

    Attributes:
        layers: one :class:`LayerReport` per normalization layer, in forward order.
        samples: input samples used; batches: batches run.
        batch_sizes: the batch sizes asked for.
        draws: random sub-batches per batch size; seed: their seed.
        tolerance: KL (nats per channel) the ``quantile`` of sub-batches must stay under.
        quantile: 0.9 by default.
        recalibrated_in_place: ``None`` when not recalibrated, else whether in place.
        notes: remarks that concern the whole run.
        recalibrated_model: the recalibrated copy (or the model itself when recalibrated in
            place), or ``None``.  Not part of :meth:`to_dict`.
    """

    layers: list[LayerReport]
    samples: int
    batches: int
    batch_sizes: tuple[int, ...]
    draws: int
    seed: int
    tolerance: float
    quantile: float
    recalibrated_in_place: bool | None = None
    notes: list[str] = field(default_factory=list)
    recalibrated_model: nn.Module | None = field(default=None, repr=False, compare=False)

    @property
    def recommended_batch_size(self) -> int | None:
        """The largest of the BatchNorm layers' :attr:`LayerReport.smallest_batch_size`:
        the smallest evaluated batch size at which every BatchNorm layer is within
        tolerance.  ``None`` when there is no BatchNorm layer or some layer is within
        tolerance at no evaluated size.  A statistics-side indicator, not a promise about
        accuracy (see README.md)."""
        bn = [lr for lr in self.layers if lr.batch_sizes]
        if not bn or any(lr.smallest_batch_size is None for lr in bn):
            return None
        return max(lr.smallest_batch_size for lr in bn)  # type: ignore[type-var]

    @property
    def stale_layers(self) -> list[str]:
        """Names of BatchNorm layers whose running statistics do not match the data."""
        return [lr.name for lr in self.layers if lr.running_stats and lr.running_stats.stale]

    def layer(self, name: str) -> LayerReport:
        for lr in self.layers:
            if lr.name == name:
                return lr
        names = ", ".join(lr.name for lr in self.layers)
        raise KeyError(f"no probed layer named {name!r}; layers: {names}")

    def to_dict(self) -> dict[str, Any]:
        """The JSON document described in README.md."""
        return {
            "schema": SCHEMA,
            "samples": self.samples,
            "batches": self.batches,
            "batch_sizes_requested": list(self.batch_sizes),
            "draws": self.draws,
            "seed": self.seed,
            "tolerance": {
                "kl_nats_per_channel": self.tolerance,
                "quantile": self.quantile,
                "basis": "common practice, no source: about the distortion BatchNorm gets "
                "at batch size 32 on independent values; see README.md",
            },
            "recommended_batch_size": self.recommended_batch_size,
            "stale_layers": self.stale_layers,
            "recalibrated": None if self.recalibrated_in_place is None
            else ("in_place" if self.recalibrated_in_place else "copy"),
            "notes": list(self.notes),
            "layers": [lr.to_dict() for lr in self.layers],
        }

    def to_text(self) -> str:
        """A readable table (see :func:`shiftwatch.probe.text.render`)."""
        from .text import render

        return render(self)

    def __str__(self) -> str:
        return self.to_text()
