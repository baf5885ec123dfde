"""shiftwatch: watch the input distributions of PyTorch layers during training.

The public front.  It imports no optional integration (Lightning, TensorBoard):
``shiftwatch.lightning`` and the TensorBoard sink are imported on demand.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import ConfigError, ShiftAlertError, ShiftWatchWarning, UnsupportedInputError
from .summary import FIELDS, Summary, make_edges, summarize

__all__ = [
    "ConfigError",
    "FIELDS",
    "ShiftAlertError",
    "ShiftWatchWarning",
    "Summary",
    "UnsupportedInputError",
    "__version__",
    "make_edges",
    "summarize",
]
