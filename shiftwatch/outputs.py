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

from .capture import PHASES
from .compare import Layout, layer_stats
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
    appears).  Tags are built once per phase.

    Args:
        sink: the open sink (closed by :meth:`close`).
        bins: histogram bins per layer (the edges are ``bins + 1`` evenly spaced values
            over each layer's range).
    """

    def __init__(self, sink: Any, bins: int) -> None:
        self.sink, self.bins = sink, bins
        self._tags: dict[str, dict] = {}
        self._phases: tuple[str, ...] = ()

    def write(
        self,
        phase: str,
        step: int,
        layout: Layout,
        ranges: np.ndarray,
        flat: np.ndarray,
        record: Mapping[str, Any],
        alerts: Sequence[Any],
    ) -> None:
        """One sampled step of ``phase``: ``record`` from :func:`step_record`, ``flat`` the
        host sample it was scored from, ``ranges`` the ``(L, 2)`` histogram ranges (NaN:
        no edges yet), ``alerts`` the step's :class:`~shiftwatch.rules.Alert` objects."""
        from .sinks.tensorboard import HistogramData, histogram_tag, scalar_tag, stat_tag

        if phase not in self._phases:
            self._phases = tuple(p for p in PHASES if p in (*self._phases, phase))
            self.sink.write_layout(METRICS, layout.names, self._phases,
                                   against={p: comparisons_of(p) for p in self._phases})
        tags = self._tags.get(phase)
        if tags is None:
            tags = self._tags[phase] = {
                "ratio": {(a, m, n): scalar_tag(phase, a, m, n) for a in comparisons_of(phase)
                          for m in METRICS for n in layout.names},
                "stat": {(k, n): stat_tag(phase, k, n) for k in _TB_STATS
                         for n in layout.names},
                "hist": {n: histogram_tag(phase, n) for n in layout.names},
            }
        scalars: dict[str, float] = {}
        for name, entry in record["layers"].items():
            for k in _TB_STATS:
                if entry[k] is not None:
                    scalars[tags["stat"][(k, name)]] = entry[k]
            for a in comparisons_of(phase):
                vs = entry[f"vs_{a}"]
                if vs:
                    for m, d in vs.items():
                        r = d["ratio"]
                        if r == r:  # not NaN
                            scalars[tags["ratio"][(a, m, name)]] = r
        hists = {}
        p = layout.split(flat)
        m2s = layer_stats(p, layout)["m2"].tolist()
        for i, name in enumerate(layout.names):
            h = p.hist[i]
            if not np.isnan(ranges[i, 0]) and h.sum() > 0:
                e = record["layers"][name]
                n, mean, m2 = e["count"], e["mean"], m2s[i]
                hists[tags["hist"][name]] = HistogramData(
                    edges=np.linspace(*ranges[i], self.bins + 1), counts=h,
                    min=e["min"], max=e["max"], num=n, sum=n * mean, sum_squares=m2 + n * mean**2)
        self.sink.write_step(step, phase, scalars, hists)
        for a in alerts:
            self.sink.write_alert(step, f"**{a.severity}** {a.message}")

    def close(self) -> None:
        self.sink.close()
