"""The normalization probe: is BatchNorm safe at this batch size, would another
normalization be steadier, are the running statistics stale?

Given a model and a handful of input batches, :func:`probe_normalization` measures for
every normalization layer (BatchNorm 1d/2d/3d, GroupNorm, LayerNorm, InstanceNorm) from
the layer's actual inputs:

1. how far BatchNorm's batch statistics at batch size ``b`` are from the population
   statistics (random sub-batches of the real samples);
2. how much the per-sample statistics of layer, instance and group normalization vary
   across samples (these do not depend on ``b``);
3. for BatchNorm, how far the running statistics are from the data's statistics;
4. optionally, exact recalibration of the running statistics (:func:`recalibrate`).

Module layout: :mod:`.moments` (the per-sample moment table and what each normalization
computes from it), :mod:`.capture` (hooks and passes), :mod:`.analysis` (the three
measurements), :mod:`.recalibrate`, :mod:`.result` (result objects, JSON), :mod:`.text`
(tables), :mod:`.plot` (optional PNG, needs matplotlib), :mod:`.api`.
"""

from __future__ import annotations

import os

from .analysis import BatchSizeStats, RunningStatsCheck, SpreadStats
from .api import DEFAULT_BATCH_SIZES, KL_TOLERANCE, probe_normalization
from .moments import SampleMoments, layer_moments, layer_statistics, normalized_output_kl
from .recalibrate import RecalibrationResult, recalibrate
from .result import SCHEMA, LayerReport, ProbeResult


def plot_probe(result: ProbeResult, path: str | os.PathLike[str], *, dpi: int = 120) -> None:
    """Write the error-vs-batch-size PNG (needs matplotlib: ``pip install shiftwatch[plot]``);
    see :func:`shiftwatch.probe.plot.plot_probe`."""
    from .plot import plot_probe as _plot

    _plot(result, path, dpi=dpi)


__all__ = [  # sorted
    "BatchSizeStats",
    "DEFAULT_BATCH_SIZES",
    "KL_TOLERANCE",
    "LayerReport",
    "ProbeResult",
    "RecalibrationResult",
    "RunningStatsCheck",
    "SCHEMA",
    "SampleMoments",
    "SpreadStats",
    "layer_moments",
    "layer_statistics",
    "normalized_output_kl",
    "plot_probe",
    "probe_normalization",
    "recalibrate",
]
