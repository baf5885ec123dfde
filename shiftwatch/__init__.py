"""shiftwatch: watch the input distributions of PyTorch layers during training.

The public front.  It imports no optional integration (Lightning, TensorBoard):
``shiftwatch.lightning`` and the TensorBoard sink are imported on demand.  Names that
need PyTorch (the monitor, summaries, rules) are imported on first use, so the
command-line tools that only read event logs (``summary``, ``compare``, ``report``,
``gate``) start without loading torch.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

from .errors import ConfigError, ShiftAlertError, ShiftWatchWarning, UnsupportedInputError

# public name -> module that defines it (imported on first access)
_LAZY = {
    "ShiftMonitor": ".monitor",
    "Alert": ".judge", "Rule": ".rules", "default_rules": ".rules", "load_rules": ".rules",
    "rules_from_toml": ".rules",
    "FIELDS": ".summary", "Summary": ".summary", "make_edges": ".summary",
    "summarize": ".summary",
}

if TYPE_CHECKING:  # for type checkers and IDEs: the same names, eagerly
    from .judge import Alert
    from .monitor import ShiftMonitor
    from .rules import Rule, default_rules, load_rules, rules_from_toml
    from .summary import FIELDS, Summary, make_edges, summarize


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'shiftwatch' has no attribute {name!r}")
    value = getattr(importlib.import_module(module, __name__), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))


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
