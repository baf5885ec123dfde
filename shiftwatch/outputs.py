"""A scored sample on its way out: the event-log step record and the TensorBoard writes.

Both are built from what :func:`shiftwatch.compare.compare_all` returned for one sampled
step and phase; nothing here computes a statistic.  The record's layout is the schema-1
``step`` record of the README (event-log schema); the TensorBoard tags are those of
:mod:`shiftwatch.sinks.tags`.  This module does not import TensorBoard:
:class:`TensorBoardOutput` is handed an open sink.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from torch import Tensor

from .capture import PHASES
from .compare import Layout
from .divergence import METRICS, MOMENT_METRICS

__all__ = ["TensorBoardOutput", "comparisons_of", "step_record"]

_TB_STATS = ("mean", "std")  # layer statistics written as TensorBoard scalars


def comparisons_of(phase: str) -> tuple[str, ...]:
    """Comparisons a step record of ``phase`` carries (``vs_train``: val records only)."""
    return ("previous", "reference", "train") if phase == "val" else ("previous", "reference")


def step_record(
    names: Sequence[str],
    phase: str,
    step: int,
    stats: Mapping[str, np.ndarray],
    results: Mapping[str, tuple[dict, dict]],
    *,
    train_step: int | None = None,
) -> dict[str, Any]:
    """The ``step`` record of one sampled step and phase.

    Args:
        names: layer names, in layout order.
        stats: :func:`~shiftwatch.compare.layer_stats` of the sample.
        results: comparison name (``"previous"``, ``"reference"``, ``"train"``) ->
            ``(layer, channel)`` as :func:`~shiftwatch.compare.compare_all` returns them;
            a comparison missing here is written as ``null``.
        train_step: for val records, the step of the training sample ``vs_train``
            compares with (``None``: none yet).
    """
    s = {k: v.tolist() for k, v in stats.items()}
    layers: dict[str, Any] = {}
    conv = {a: (r[0]["value"].tolist(), r[0]["noise"].tolist(), r[0]["ratio"].tolist(),
                {k: v.tolist() for k, v in r[1].items()}) for a, r in results.items()}
    for j, name in enumerate(names):
        entry: dict[str, Any] = {
            "count": s["count"][j], "nonfinite": s["nonfinite"][j], "mean": s["mean"][j],
            "std": s["std"][j], "min": s["min"][j], "max": s["max"][j],
            "vs_previous": None, "vs_reference": None,
        }
        if phase == "val":
            entry["vs_train"] = None
        channels: dict[str, Any] = {}
        for against, (val, noi, rat, ch) in conv.items():
            entry[f"vs_{against}"] = {
                m: {"value": val[i][j], "noise": noi[i][j], "ratio": rat[i][j]}
                for i, m in enumerate(METRICS)
            }
            channels[f"vs_{against}"] = {
                m: {"mean": ch["mean_value"][i][j], "max": ch["max_value"][i][j],
                    "max_ratio": ch["max_ratio"][i][j],
                    "worst": [c for c in ch["top"][i][j] if c >= 0]}
                for i, m in enumerate(MOMENT_METRICS)
            }
        if channels:
            entry["channels"] = channels
        layers[name] = entry
    record: dict[str, Any] = {"kind": "step", "step": step, "phase": phase}
    if phase == "val":
        record["train_step"] = train_step
    record["layers"] = layers
    return record


class TensorBoardOutput:
    """Writes each sampled step to an open
    :class:`~shiftwatch.sinks.tensorboard.TensorBoardSink`: ratio scalars of every
    comparison, layer mean and std, the histogram from the sample's own counts, the
    alerts as text, and the custom-scalars layout (rewritten when a phase first
    appears).

    Everything is taken from the arrays the step was scored into (no record dicts are
    walked): the tags of a phase are built once as arrays in the order of those arrays.
    A scalar that is NaN (no data, or a metric not available yet) is not written.

    Args:
        sink: the open sink (closed by :meth:`close`).
    """

    def __init__(self, sink: Any) -> None:
        self.sink = sink
        self._tags: dict[tuple[str, tuple[str, ...]], np.ndarray] = {}
        self._hist_tags: dict[str, list[str]] = {}
        self._phases: tuple[str, ...] = ()

    def _scalar_tags(self, phase: str, names: Sequence[str], against: tuple[str, ...]):
        """Tags in the order of :meth:`write`'s value vector: the layer statistics
        ``(len(_TB_STATS), L)``, then per comparison the ratios ``(len(METRICS), L)``."""
        from .sinks.tensorboard import scalar_tag, stat_tag

        key = (phase, against)
        tags = self._tags.get(key)
        if tags is None:
            ordered = [stat_tag(phase, k, n) for k in _TB_STATS for n in names]
            ordered += [scalar_tag(phase, a, m, n) for a in against for m in METRICS
                        for n in names]
            tags = self._tags[key] = np.array(ordered, dtype=object)
        return tags

    def write(
        self,
        phase: str,
        step: int,
        layout: Layout,
        edges: Sequence[Tensor | None],
        flat: np.ndarray,
        stats: Mapping[str, np.ndarray],
        results: Mapping[str, tuple[dict, dict]],
        alerts: Sequence[Any],
    ) -> None:
        """One sampled step of ``phase``: ``flat`` the host sample, ``stats`` its
        :func:`~shiftwatch.compare.layer_stats`, ``results`` comparison name ->
        ``(layer, channel)`` as :func:`~shiftwatch.compare.compare_all` returned them
        (absent: not available at this step), ``edges`` each layer's histogram edges (the
        ones its counts were made with; ``None``: no histogram yet), ``alerts`` the step's
        :class:`~shiftwatch.judge.Alert` objects."""
        from .sinks.tensorboard import HistogramData, histogram_tag

        names = layout.names
        if phase not in self._phases:
            self._phases = tuple(p for p in PHASES if p in (*self._phases, phase))
            self.sink.write_layout(METRICS, names, self._phases,
                                   against={p: comparisons_of(p) for p in self._phases})
        against = tuple(a for a in comparisons_of(phase) if a in results)
        tags = self._scalar_tags(phase, names, against)
        values = np.concatenate([np.stack([stats[k] for k in _TB_STATS]).ravel(),
                                 *(results[a][0]["ratio"].ravel() for a in against)])
        keep = ~np.isnan(values)
        scalars = dict(zip(tags[keep].tolist(), values[keep].tolist(), strict=True))
        hists = {}
        hist = layout.split(flat).hist
        drawn = [i for i in np.flatnonzero(hist.sum(1) > 0).tolist() if edges[i] is not None]
        if drawn:
            htags = self._hist_tags.get(phase)
            if htags is None:
                htags = self._hist_tags[phase] = [histogram_tag(phase, n) for n in names]
            n_, mean_, m2_, lo_, hi_ = (stats[k].tolist() for k in ("count", "mean", "m2",
                                                                     "min", "max"))
            for i in drawn:
                n, mean = n_[i], mean_[i]
                hists[htags[i]] = HistogramData.trusted(
                    edges=tuple(edges[i].tolist()),
                    counts=tuple(hist[i].tolist()), min=lo_[i], max=hi_[i], num=n,
                    sum=n * mean, sum_squares=m2_[i] + n * mean * mean)
        self.sink.write_step(step, phase, scalars, hists)
        for a in alerts:
            self.sink.write_alert(step, f"**{a.severity}** {a.message}")

    def close(self) -> None:
        self.sink.close()
