"""Exceptions and warnings raised by shiftwatch.

Each exception subclasses the built-in it narrows, so callers can catch a
configuration problem as ``ValueError`` and a bad input as ``TypeError``.
"""

from __future__ import annotations

from typing import Any

__all__ = ["ConfigError", "ShiftAlertError", "ShiftWatchWarning", "UnsupportedInputError"]


class ConfigError(ValueError):
    """A setting is invalid. The message names the field, the allowed values and the fix."""


class UnsupportedInputError(TypeError):
    """A tensor cannot be summarised (integer or boolean dtype, complex values)."""


class ShiftWatchWarning(UserWarning):
    """Something was skipped or degraded but training can continue."""


class ShiftAlertError(RuntimeError):
    """Raised by a monitor configured with ``on_alert="raise"`` when a failing alert fires.

    Attributes mirror the alert: ``step`` (optimizer step), ``layer`` (module name),
    ``metric`` (metric name), ``value`` (measured value, in the metric's units, or a
    multiple of the noise floor when the rule is expressed that way) and ``threshold``.
    """

    def __init__(
        self,
        message: str,
        *,
        step: int,
        layer: str,
        metric: str,
        value: float,
        threshold: float,
        alert: Any = None,
    ) -> None:
        super().__init__(message)
        self.step = step
        self.layer = layer
        self.metric = metric
        self.value = value
        self.threshold = threshold
        self.alert = alert

    def __reduce__(self):  # keep attributes across process boundaries (DDP, spawn)
        return (
            _rebuild_alert_error,
            (str(self), self.step, self.layer, self.metric, self.value, self.threshold),
        )


def _rebuild_alert_error(message, step, layer, metric, value, threshold) -> ShiftAlertError:
    return ShiftAlertError(
        message, step=step, layer=layer, metric=metric, value=value, threshold=threshold
    )
