"""TensorBoard sink: shift scalars, input histograms, alerts and a custom-scalars layout.

Importing this module needs neither TensorBoard nor ``torch.utils.tensorboard``; they are
imported when a :class:`TensorBoardSink` is built.  Tag names are defined in
:mod:`shiftwatch.sinks.tags` (re-exported here).

Cost: :meth:`TensorBoardSink.write_step` puts all scalars and histograms of a step into
one summary event.  With its own event file (``log_dir``) the sink frames the event with a
vectorised checksum (:mod:`shiftwatch.sinks.eventfile`) and writes it at once; with a
shared ``SummaryWriter`` the event goes through torch's writer, whose pure-Python checksum
costs about 0.25 us per byte in its background thread.  ``benchmarks/tensorboard_write.py``
measures both against one ``add_scalar`` call per value.
"""

from __future__ import annotations

import datetime
import os
import socket
import threading
import time
import warnings
from collections.abc import Mapping, Sequence
from types import MappingProxyType, SimpleNamespace
from typing import Any

from ..errors import ConfigError, ShiftWatchWarning
from .histogram import HistogramData
from .tags import (
    ALERT_TAG,
    COMPARISONS,
    KINDS,
    check_name,
    histogram_tag,
    layer_regex,
    layer_tag_part,
    metric_regex,
    scalar_tag,
    stat_tag,
)

__all__ = [
    "ALERT_TAG",
    "COMPARISONS",
    "KINDS",
    "HistogramData",
    "TensorBoardSink",
    "histogram_tag",
    "layer_regex",
    "layer_tag_part",
    "metric_regex",
    "scalar_tag",
    "stat_tag",
]

_EMPTY: Mapping[str, Any] = MappingProxyType({})
_LAYOUT_TAG = "custom_scalars__config__"  # fixed by TensorBoard's custom-scalars plugin


# ------------------------------------------------------------------------------ sink
_PROTOS: SimpleNamespace | None = None
_INSTALL_HINT = "pip install shiftwatch[tensorboard]"


def _protos() -> SimpleNamespace:
    """Import TensorBoard on first use; a clear ImportError when it is missing."""
    global _PROTOS
    if _PROTOS is None:
        try:
            from tensorboard.compat.proto.event_pb2 import Event
            from tensorboard.compat.proto.summary_pb2 import (
                HistogramProto,
                Summary,
                SummaryMetadata,
            )
            from tensorboard.compat.proto.tensor_pb2 import TensorProto
            from tensorboard.compat.proto.tensor_shape_pb2 import TensorShapeProto
            from tensorboard.plugins.custom_scalar import layout_pb2
            from tensorboard.plugins.text.plugin_data_pb2 import TextPluginData
            from torch.utils.tensorboard import SummaryWriter
        except ImportError as exc:
            raise ImportError(
                f"TensorBoard logging needs the tensorboard package: {_INSTALL_HINT} "
                f"(import failed: {exc})"
            ) from exc
        _PROTOS = SimpleNamespace(
            Event=Event,
            HistogramProto=HistogramProto,
            Summary=Summary,
            SummaryMetadata=SummaryMetadata,
            TensorProto=TensorProto,
            TensorShapeProto=TensorShapeProto,
            TextPluginData=TextPluginData,
            layout_pb2=layout_pb2,
            SummaryWriter=SummaryWriter,
        )
    return _PROTOS


def _check_step(step: int) -> int:
    if isinstance(step, bool) or not isinstance(step, int) or step < 0:
        raise ConfigError(f"'step' must be a non-negative int (got {step!r})")
    return step


class TensorBoardSink:
    """Writes the monitor's results as TensorBoard events.

    Args:
        log_dir: directory of the sink's own event file (one TensorBoard *run*); created
            when missing.  ``None`` (and no ``writer``) uses ``runs/<date>_<host>`` like
            ``SummaryWriter``.  Ignored when ``writer`` is given.
        writer: an existing ``torch.utils.tensorboard.SummaryWriter`` to share, e.g.
            Lightning's ``TensorBoardLogger.experiment``: events then go into its file, and
            :meth:`close` flushes it but never closes it.

    Attributes:
        writer: the shared ``SummaryWriter``, or ``None`` when the sink owns its file.
        event_file: path of the sink's own event file (``None`` with a shared writer).
        events_written, events_dropped: events written, and events lost to a write error
            or written after :meth:`close`.

    A write error (disk full, directory removed) does not stop training: the first one
    emits a :class:`~shiftwatch.errors.ShiftWatchWarning` and the sink stops writing (a
    half-written record would end the file for TensorBoard's reader anyway, and torch's
    writer thread does not recover either).

    Raises:
        ImportError: TensorBoard is not installed (names ``pip install shiftwatch[tensorboard]``).
        ConfigError: ``log_dir`` cannot be created or written.
        TypeError: ``writer`` is not a ``SummaryWriter``.
    """

    def __init__(self, log_dir: str | os.PathLike | None = None, *, writer: Any = None) -> None:
        from .eventfile import EventFileWriter

        pb = _protos()
        self._pb = pb
        self.writer = None
        self._file: EventFileWriter | None = None
        if writer is not None:
            if not isinstance(writer, pb.SummaryWriter):
                raise TypeError(
                    "'writer' must be a torch.utils.tensorboard.SummaryWriter (got "
                    f"{type(writer).__module__}.{type(writer).__name__}); pass Lightning's "
                    "TensorBoardLogger.experiment or a SummaryWriter, or leave writer=None "
                    "and give log_dir"
                )
            self.writer = writer
            self._log_dir = str(writer.get_logdir())
        else:
            if log_dir is None:
                stamp = datetime.datetime.now().strftime("%b%d_%H-%M-%S")
                log_dir = os.path.join("runs", f"{stamp}_{socket.gethostname()}")
            if not isinstance(log_dir, (str, os.PathLike)):
                raise ConfigError(
                    f"'log_dir' must be a str or os.PathLike (got {type(log_dir).__name__}); "
                    "pass a directory such as 'runs/exp1'"
                )
            self._log_dir = os.fspath(log_dir)
            try:
                self._file = EventFileWriter(self._log_dir, event_proto=pb.Event)
            except OSError as exc:
                raise ConfigError(
                    f"'log_dir' must be a directory this process can create and write "
                    f"(got '{os.path.abspath(self._log_dir)}': {type(exc).__name__}: "
                    f"{exc.strerror or exc}); choose another log_dir or fix its permissions"
                ) from exc
        self.event_file = None if self._file is None else self._file.path
        self.events_written = 0
        self.events_dropped = 0
        self._lock = threading.Lock()
        self._failed = False
        self._closed = False
        self._last_step = 0
        self._layout_key: tuple | None = None

    @property
    def log_dir(self) -> str:
        """Directory the events go to (the TensorBoard run)."""
        return self._log_dir

    @property
    def owns_writer(self) -> bool:
        """Whether the sink writes its own event file (and closes it on :meth:`close`)."""
        return self.writer is None

    # ----------------------------------------------------------------- writing
    def _emit(self, summary: Any, step: int, walltime: float | None) -> bool:
        when = time.time() if walltime is None else float(walltime)
        with self._lock:
            if self._closed or self._failed:
                if not self._failed:
                    self._fail(RuntimeError("the TensorBoard sink is closed"))
                else:
                    self.events_dropped += 1
                return False
            try:
                if self._file is not None:
                    event = self._pb.Event(wall_time=when, step=step, summary=summary)
                    self._file.write(event.SerializeToString())
                else:
                    self.writer._get_file_writer().add_summary(summary, step, when)
            except Exception as exc:  # torch's writer thread re-raises whatever it hit
                self._fail(exc)
                return False
            self.events_written += 1
            self._last_step = max(self._last_step, step)
            return True

    def _fail(self, exc: BaseException) -> None:
        self.events_dropped += 1
        if not self._failed:
            self._failed = True
            warnings.warn(
                f"shiftwatch could not write TensorBoard events to '{self._log_dir}' "
                f"({type(exc).__name__}: {exc}); training continues and TensorBoard "
                "logging stops for this run (the event log events.jsonl is separate). "
                "Free disk space or check the directory.",
                ShiftWatchWarning,
                stacklevel=4,
            )

    def write_step(
        self,
        step: int,
        phase: str,
        scalars: Mapping[str, float],
        histograms: Mapping[str, HistogramData] = _EMPTY,
        walltime: float | None = None,
    ) -> None:
        """Write one sampled step: all scalars and histograms as one summary event.

        Args:
            step: optimizer step (the x axis in TensorBoard).
            phase: ``"train"`` or ``"val"``; checked (the tags already carry it).
            scalars: tag -> value (build tags with :func:`scalar_tag` / :func:`stat_tag`).
                ``None`` values are skipped (metric not available yet); NaN and inf are
                written as they are.
            histograms: tag (see :func:`histogram_tag`) -> :class:`HistogramData`.
            walltime: Unix time of the step in seconds; now when ``None``.

        Raises:
            ConfigError: bad ``step`` or ``phase``.
            TypeError, ValueError: a tag is not a string or a value is not a number.
        """
        _check_step(step)
        check_name(phase, "phase", phase=True)
        pb = self._pb
        summary = pb.Summary()
        add = summary.value.add
        for tag, value in scalars.items():
            if value is not None:
                add(tag=tag, simple_value=float(value))
        for tag, hist in histograms.items():
            if not isinstance(hist, HistogramData):
                raise TypeError(
                    f"histogram {tag!r} must be a HistogramData (got {type(hist).__name__})"
                )
            add(tag=tag, histo=hist.to_proto(pb.HistogramProto))
        if summary.value:
            self._emit(summary, step, walltime)

    def write_alert(self, step: int, text: str, walltime: float | None = None) -> None:
        """Write an alert message (markdown) at ``step`` under tag ``shift.alerts``."""
        _check_step(step)
        if not isinstance(text, str):
            raise TypeError(f"'text' must be a str (got {type(text).__name__})")
        pb = self._pb
        # the text plugin's format, as torch's add_text writes it
        metadata = pb.SummaryMetadata(
            plugin_data=pb.SummaryMetadata.PluginData(
                plugin_name="text", content=pb.TextPluginData(version=0).SerializeToString()
            )
        )
        tensor = pb.TensorProto(
            dtype="DT_STRING",
            string_val=[text.encode("utf-8")],
            tensor_shape=pb.TensorShapeProto(dim=[pb.TensorShapeProto.Dim(size=1)]),
        )
        summary = pb.Summary(
            value=[
                pb.Summary.Value(tag=ALERT_TAG + "/text_summary", metadata=metadata, tensor=tensor)
            ]
        )
        self._emit(summary, step, walltime)

    def write_layout(
        self,
        metrics: Sequence[str],
        layers: Sequence[str],
        phases: Sequence[str] = ("train",),
        *,
        against: Sequence[str] | Mapping[str, Sequence[str]] = COMPARISONS,
    ) -> None:
        """Write the custom-scalars layout (TensorBoard's *Custom Scalars* tab).

        Per phase: a category with one multi-line chart per metric and comparison showing
        every layer's ratio to noise (:func:`metric_regex`, so layers added later appear
        too), and a collapsed category with one chart per layer and comparison showing
        every metric (:func:`layer_regex`).  Ratios share one unit (multiples of the noise
        floor), so the lines of a chart are comparable; across metrics a ratio says how
        unusual a change is, not how large it is.

        ``against`` names the comparisons charted: one sequence for every phase, or a
        mapping from phase to its comparisons (the monitor charts ``train`` -- the
        train/eval mismatch -- for ``val`` only); a phase missing from the mapping gets
        :data:`COMPARISONS`.

        Written once: calling again with the same arguments does nothing; other arguments
        replace the layout (TensorBoard shows the latest layout of a run).
        """
        metrics = [check_name(m, "metric") for m in metrics]
        phases = [check_name(p, "phase", phase=True) for p in phases]
        if isinstance(against, Mapping):
            unknown = sorted(set(against) - set(phases))
            if unknown:
                raise ConfigError(
                    f"'against' names phase(s) {unknown} that are not in 'phases' {phases}; "
                    "give comparisons only for the phases charted"
                )
            by_phase = {p: tuple(against.get(p, COMPARISONS)) for p in phases}
        else:
            by_phase = dict.fromkeys(phases, tuple(against))
        by_phase = {p: tuple(check_name(a, "against") for a in v) for p, v in by_phase.items()}
        layers = list(dict.fromkeys(layer_tag_part(layer) for layer in layers))
        key = (tuple(metrics), tuple(layers), tuple(phases), tuple(by_phase.items()))
        if key == self._layout_key:
            return
        lp = self._pb.layout_pb2
        categories = []
        for phase in phases:
            against = by_phase[phase]
            by_metric = [
                lp.Chart(
                    title=f"{metric} vs {other} (ratio to noise)",
                    multiline=lp.MultilineChartContent(tag=[metric_regex(phase, metric, other)]),
                )
                for metric in metrics
                for other in against
            ]
            categories.append(
                lp.Category(title=f"shift ({phase}): metrics across layers", chart=by_metric)
            )
            if layers and metrics:
                by_layer = [
                    lp.Chart(
                        title=f"{layer} vs {other} (ratio to noise)",
                        multiline=lp.MultilineChartContent(
                            tag=[layer_regex(phase, metrics, other, layer)]
                        ),
                    )
                    for layer in layers
                    for other in against
                ]
                categories.append(
                    lp.Category(
                        title=f"shift ({phase}): layers across metrics",
                        chart=by_layer,
                        closed=True,
                    )
                )
        pb = self._pb
        summary = pb.Summary(
            value=[
                pb.Summary.Value(
                    tag=_LAYOUT_TAG,
                    metadata=pb.SummaryMetadata(
                        plugin_data=pb.SummaryMetadata.PluginData(plugin_name="custom_scalars")
                    ),
                    tensor=pb.TensorProto(
                        dtype="DT_STRING",
                        string_val=[lp.Layout(category=categories).SerializeToString()],
                        tensor_shape=pb.TensorShapeProto(),
                    ),
                )
            ]
        )
        if self._emit(summary, self._last_step, None):
            self._layout_key = key

    # --------------------------------------------------------------- lifecycle
    def flush(self) -> None:
        """Make written events visible to TensorBoard (a shared writer's queue is drained)."""
        with self._lock:
            if self._closed or self._failed:
                return
            try:
                if self._file is not None:
                    self._file.flush()
                else:
                    self.writer.flush()
            except Exception as exc:
                self._fail(exc)

    def close(self) -> None:
        """Close the own event file, or flush a shared writer.  Safe to call more than once."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            try:
                if self._file is not None:
                    self._file.close()
                elif not self._failed:
                    self.writer.flush()
            except Exception as exc:
                if not self._failed:
                    self._fail(exc)

    def __enter__(self) -> TensorBoardSink:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._closed else ("failed" if self._failed else "open")
        return f"TensorBoardSink('{self._log_dir}', {state})"
