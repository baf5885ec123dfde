"""Names of the monitor's TensorBoard series, and the regexes that select them.

Scheme (our own; TensorBoard's scalar and histogram dashboards group tags by the part
before the first ``/``):

* ``shift.<phase>.<metric>.vs_<against>/<layer>``: a shift metric as a multiple of its
  noise floor (``kind="ratio"``; 1 means "as large as sampling noise alone would make it",
  it is not a probability or a significance level);
* ``shift.<phase>.<metric>.vs_<against>.<kind>/<layer>`` for the other kinds: ``value``
  (the metric in its own units), ``noise`` (the noise floor, same units) and the
  per-channel aggregates ``channel_mean``, ``channel_max`` (own units) and
  ``channel_max_ratio`` (multiple of noise);
* ``input.<phase>.<stat>/<layer>``: plain statistics of the layer input (``mean``, ``std``,
  ``nonfinite``...), in input units;
* ``hist.<phase>/<layer>``: histogram of the layer input;
* ``shift.alerts``: alert messages (markdown text).

So each dashboard section holds one metric and comparison, with one chart per layer.
Layer names keep their dots; characters TensorBoard does not keep in tags (anything but
letters, digits, ``_ . -``) become ``_``.  Phase, metric, comparison and kind contain no
dots, so the field boundaries stay unambiguous for the layout regexes.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from ..errors import ConfigError

__all__ = [
    "ALERT_TAG",
    "COMPARISONS",
    "KINDS",
    "histogram_tag",
    "layer_regex",
    "layer_tag_part",
    "metric_regex",
    "scalar_tag",
    "stat_tag",
]

#: Tag of the alert text (TensorBoard's text plugin stores it as ``shift.alerts/text_summary``).
ALERT_TAG = "shift.alerts"
#: Comparisons the monitor makes: against the previous sample and against the reference.
COMPARISONS: tuple[str, ...] = ("previous", "reference")
#: Kinds of shift scalar accepted by :func:`scalar_tag`; ``"ratio"`` has no tag suffix.
KINDS: tuple[str, ...] = (
    "ratio",
    "value",
    "noise",
    "channel_mean",
    "channel_max",
    "channel_max_ratio",
)

_PHASE_RE = re.compile(r"[A-Za-z0-9_-]+\Z")
_NAME_RE = re.compile(r"[A-Za-z0-9_]+\Z")
_BAD_TAG_CHARS = re.compile(r"[^A-Za-z0-9_.-]")  # the characters torch's writer keeps
_PHASE_CHARS = "letters, digits, '_' or '-'"
_NAME_CHARS = "letters, digits or '_'"


def check_name(value: object, field: str, *, phase: bool = False) -> str:
    """Return ``value`` if it can be a tag field; else raise :class:`ConfigError`."""
    pattern, allowed = (_PHASE_RE, _PHASE_CHARS) if phase else (_NAME_RE, _NAME_CHARS)
    if not isinstance(value, str) or not pattern.match(value):
        raise ConfigError(
            f"'{field}' must be a non-empty string of {allowed} (got {value!r}); rename it"
        )
    return value


def layer_tag_part(layer: str) -> str:
    """The layer name as it appears after the ``/`` of a tag.

    Dots stay (``block1.0.conv``); characters TensorBoard does not keep in tags become
    ``_``; the unnamed root module (``""``) becomes ``_root``.  Two layer names that
    differ only in such characters share a tag.
    """
    if not isinstance(layer, str):
        raise ConfigError(
            f"'layer' must be a module name string (got {type(layer).__name__}); pass the "
            "name from model.named_modules()"
        )
    return _BAD_TAG_CHARS.sub("_", layer) if layer else "_root"


def scalar_tag(phase: str, against: str, metric: str, layer: str, *, kind: str = "ratio") -> str:
    """Tag of one shift scalar, e.g. ``shift.train.mean_shift.vs_reference/conv1.0``.

    Args:
        phase: ``"train"`` or ``"val"`` (letters, digits, ``_``, ``-``).
        against: ``"previous"`` or ``"reference"`` (letters, digits, ``_``).
        metric: metric name such as ``"mean_shift"`` (letters, digits, ``_``).
        layer: module name; see :func:`layer_tag_part`.
        kind: one of :data:`KINDS`: ``"ratio"`` (value / noise, unitless), ``"value"`` and
            ``"noise"`` (metric units), or a per-channel aggregate.

    Raises:
        ConfigError: a field has characters that would break the grouping.
    """
    check_name(phase, "phase", phase=True)
    check_name(against, "against")
    check_name(metric, "metric")
    if kind not in KINDS:
        raise ConfigError(f"'kind' must be one of {', '.join(KINDS)} (got {kind!r})")
    suffix = "" if kind == "ratio" else "." + kind
    return f"shift.{phase}.{metric}.vs_{against}{suffix}/{layer_tag_part(layer)}"


def stat_tag(phase: str, stat: str, layer: str) -> str:
    """Tag of a plain input statistic, e.g. ``input.train.std/conv1`` (input units)."""
    check_name(phase, "phase", phase=True)
    check_name(stat, "stat")
    return f"input.{phase}.{stat}/{layer_tag_part(layer)}"


def histogram_tag(phase: str, layer: str) -> str:
    """Tag of a layer-input histogram, e.g. ``hist.train/conv1``."""
    check_name(phase, "phase", phase=True)
    return f"hist.{phase}/{layer_tag_part(layer)}"


def metric_regex(phase: str, metric: str, against: str) -> str:
    """Regex (``re.match``, as TensorBoard applies it) of the ratio tags of one metric and
    comparison, all layers: ``^shift\\.train\\.psi\\.vs_reference/``."""
    check_name(phase, "phase", phase=True)
    return (
        rf"^shift\.{re.escape(phase)}\.{re.escape(check_name(metric, 'metric'))}"
        rf"\.vs_{re.escape(check_name(against, 'against'))}/"
    )


def layer_regex(phase: str, metrics: Sequence[str], against: str, layer: str) -> str:
    """Regex of the ratio tags of one layer and comparison, for the given metrics."""
    check_name(phase, "phase", phase=True)
    alternatives = "|".join(re.escape(check_name(m, "metric")) for m in metrics)
    return (
        rf"^shift\.{re.escape(phase)}\.(?:{alternatives})"
        rf"\.vs_{re.escape(check_name(against, 'against'))}/{re.escape(layer_tag_part(layer))}$"
    )
