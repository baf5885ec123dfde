"""Where the monitor's results go: the JSON Lines event log and TensorBoard.

Importing this package does not import TensorBoard; :class:`TensorBoardSink` imports it
when constructed and raises an ImportError naming ``pip install shiftwatch[tensorboard]``
when it is missing.
"""

from __future__ import annotations

from .eventlog import SCHEMA_VERSION, EventLog, to_json_value
from .histogram import HistogramData
from .tags import (
    ALERT_TAG,
    COMPARISONS,
    KINDS,
    histogram_tag,
    layer_regex,
    layer_tag_part,
    metric_regex,
    scalar_tag,
    stat_tag,
)
from .tensorboard import TensorBoardSink

__all__ = [
    "ALERT_TAG",
    "COMPARISONS",
    "KINDS",
    "SCHEMA_VERSION",
    "EventLog",
    "HistogramData",
    "TensorBoardSink",
    "histogram_tag",
    "layer_regex",
    "layer_tag_part",
    "metric_regex",
    "scalar_tag",
    "stat_tag",
    "to_json_value",
]
