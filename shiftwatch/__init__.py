"""shiftwatch: watch the input distributions of PyTorch layers during training.

The public front.  It imports no optional integration (Lightning, TensorBoard):
``shiftwatch.lightning`` and the TensorBoard sink are imported on demand.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import ConfigError, ShiftAlertError, ShiftWatchWarning, UnsupportedInputError
from .monitor import ShiftMonitor
from .rules import Alert, Rule, default_rules, load_rules, rules_from_toml
from .summary import FIELDS, Summary, make_edges, summarize

__all__ = [
    "Alert",
    "ConfigError",
    "FIELDS",
    "Rule",
    "ShiftAlertError",
    "ShiftMonitor",
    "ShiftWatchWarning",
    "Summary",
    "UnsupportedInputError",
    "__version__",
    "default_rules",
    "load_rules",
    "make_edges",
    "rules_from_toml",
    "summarize",
]
