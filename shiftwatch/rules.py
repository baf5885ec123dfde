"""Rules: when a measured shift becomes an alert.

A :class:`Rule` names a metric, what it is compared against (the previous sample, the
reference, or -- for eval-mode samples -- the latest training sample), a threshold (a
multiple of the noise floor, or a raw metric value), the layers it applies to, patience
(consecutive samples over the threshold before it fires), cooldown (samples it stays
quiet after firing), severity (``warn`` or ``fail``) and the phase (``train``, ``val`` or
``any``) whose samples it judges.

Rules come from Python (:class:`Rule`, :func:`default_rules`) or a TOML file
(:func:`load_rules`, stdlib :mod:`tomllib`)::

    use_defaults = true          # keep the built-in rules (default) and add these

    [[rule]]
    name = "fc-input-drift"
    metric = "w1"                # mean_shift, log_std_ratio, gauss_kl, hist_kl, js, psi,
                                 # w1, nonfinite, collapse
    against = "reference"        # or "previous"; "train" (phase = "val" only): the
                                 # eval-mode sample against the latest training sample
    threshold = 8.0
    units = "noise"              # threshold as a multiple of the noise floor, or "raw"
    min_raw = 0.2                # and at least this large in the metric's own units
    layers = ["fc*"]             # name globs; "<entry>" = the data-facing layers
    patience = 2
    cooldown = 10
    severity = "warn"

:class:`shiftwatch.judge.Judge` applies them: it holds the patience/cooldown counters
and turns one step's observation into alerts.

What a firing rule means: the metric crossed the threshold for ``patience`` samples in a
row.  With ``units = "noise"`` a value of 5 means "five times what sampling noise alone
would typically give at these batch sizes" -- an approximation (see
:mod:`shiftwatch.divergence`), not a p-value, and it says nothing about whether the shift
hurts the model.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from typing import Any

from .divergence import METRICS, MOMENT_METRICS
from .errors import ConfigError

__all__ = [
    "ACTIONS",
    "ENTRY",
    "RULE_METRICS",
    "Rule",
    "default_rules",
    "load_rules",
    "rules_from_toml",
]

#: Layer token selecting the entry (data-facing) layers.
ENTRY = "<entry>"
#: Metrics a rule can use: the shift metrics plus two built-in checks.
RULE_METRICS: tuple[str, ...] = (*METRICS, "nonfinite", "collapse")
_CHECKS = ("nonfinite", "collapse")
AGAINST = ("previous", "reference", "train")
UNITS = ("noise", "raw")
VIEWS = ("layer", "channels")
SEVERITIES = ("warn", "fail")
PHASES = ("train", "val", "any")
ACTIONS = ("record", "stop", "raise")


def _choice(where: str, key: str, value: Any, allowed: Sequence[str]) -> str:
    if value not in allowed:
        raise ConfigError(
            f"{where}: '{key}' must be one of {', '.join(repr(a) for a in allowed)} "
            f"(got {value!r}); fix the rule"
        )
    return value


def _int(where: str, key: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ConfigError(f"{where}: '{key}' must be an integer >= {low} (got {value!r})")
    return value


@dataclass(frozen=True)
class Rule:
    """One alerting rule (all options keyword-only except ``metric``).

    Attributes:
        metric: one of :data:`RULE_METRICS`.  ``nonfinite`` fires on the count of NaN/inf
            values (``value >= threshold``); ``collapse`` on the layer's standard deviation
            (fires when ``value <= threshold``, input units); the others on a shift metric.
        threshold: number compared with the value (``>=``, or ``<=`` for ``collapse``).
        min_raw: the metric must also reach this size in its own units (with
            ``units="noise"``: a shift far beyond noise but tiny in size -- as large
            batches make possible -- stays quiet).  0 disables it.
        against: ``"previous"`` (the last sample of the same phase), ``"reference"``, or
            ``"train"`` (the latest training sample; for ``phase="val"`` rules only: the
            train/eval mismatch plus the sampling difference of the two batches, see the
            README's event-log schema); ``None`` for ``nonfinite``/``collapse``, which look
            at the sample alone.
        units: ``"noise"``: the value is the metric divided by its noise floor;
            ``"raw"``: the metric in its own units.  The checks always use ``"raw"``.
        view: ``"layer"`` (layer-wide) or ``"channels"`` (the worst channel; moment
            metrics only).
        layers: layer-name globs; :data:`ENTRY` (``"<entry>"``) stands for the entry
            layers (those fed by the model's input).
        patience: consecutive samples over the threshold before the rule fires (>= 1).
        cooldown: samples after firing during which the same layer does not fire again.
        severity: ``"warn"`` (reported) or ``"fail"`` (also triggers ``on_alert``).
        phase: ``"train"``, ``"val"`` or ``"any"``.
        name: shown in alerts; default ``"<metric>-vs-<against>"``.
    """

    metric: str
    threshold: float = field(kw_only=True)
    min_raw: float = field(default=0.0, kw_only=True)
    against: str | None = field(default="reference", kw_only=True)
    units: str = field(default="noise", kw_only=True)
    view: str = field(default="layer", kw_only=True)
    layers: tuple[str, ...] = field(default=("*",), kw_only=True)
    patience: int = field(default=1, kw_only=True)
    cooldown: int = field(default=0, kw_only=True)
    severity: str = field(default="warn", kw_only=True)
    phase: str = field(default="train", kw_only=True)
    name: str = field(default="", kw_only=True)

    def __post_init__(self) -> None:
        where = f"rule {self.name or self.metric!r}"
        _choice(where, "metric", self.metric, RULE_METRICS)
        t = self.threshold
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
            raise ConfigError(f"{where}: 'threshold' must be a finite number (got {t!r})")
        object.__setattr__(self, "threshold", float(t))
        mr = self.min_raw
        if isinstance(mr, bool) or not isinstance(mr, (int, float)) or not mr >= 0 or (
                not math.isfinite(mr)):
            raise ConfigError(f"{where}: 'min_raw' must be a finite number >= 0 (got {mr!r})")
        object.__setattr__(self, "min_raw", float(mr))
        if self.metric in _CHECKS and self.min_raw:
            raise ConfigError(f"{where}: 'min_raw' does not apply to metric {self.metric!r}; "
                              "remove it")
        if self.metric in _CHECKS:
            object.__setattr__(self, "against", None)
            object.__setattr__(self, "units", "raw")
            if self.view != "layer":
                raise ConfigError(f"{where}: 'view' must be 'layer' for metric {self.metric!r}")
        else:
            _choice(where, "against", self.against, AGAINST)
            if self.against == "train" and self.phase != "val":
                raise ConfigError(
                    f"{where}: 'against' 'train' compares eval-mode (val) samples with the "
                    f"latest training sample, so it needs 'phase' 'val' (got {self.phase!r}); "
                    "set phase = 'val'"
                )
            _choice(where, "units", self.units, UNITS)
            _choice(where, "view", self.view, VIEWS)
            if self.view == "channels" and self.metric not in MOMENT_METRICS:
                raise ConfigError(
                    f"{where}: view 'channels' needs a moment metric "
                    f"({', '.join(MOMENT_METRICS)}; got {self.metric!r}); histograms are "
                    "layer-wide, use view='layer'"
                )
        layers = (self.layers,) if isinstance(self.layers, str) else tuple(self.layers)
        if not layers or not all(isinstance(p, str) and p for p in layers):
            raise ConfigError(
                f"{where}: 'layers' must be a glob or a list of non-empty globs "
                f"(got {self.layers!r}); e.g. ['*'] or ['{ENTRY}']"
            )
        object.__setattr__(self, "layers", layers)
        _int(where, "patience", self.patience, 1)
        _int(where, "cooldown", self.cooldown, 0)
        _choice(where, "severity", self.severity, SEVERITIES)
        _choice(where, "phase", self.phase, PHASES)
        if not isinstance(self.name, str):
            raise ConfigError(f"{where}: 'name' must be a string (got {self.name!r})")
        if not self.name:
            tail = f"-vs-{self.against}" if self.against else ""
            object.__setattr__(self, "name", f"{self.metric}{tail}")

    @property
    def fires_below(self) -> bool:
        """True when the rule fires on values *at or below* the threshold."""
        return self.metric == "collapse"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe representation (the keys of a TOML ``[[rule]]`` table)."""
        d = asdict(self)
        d["layers"] = list(self.layers)
        return d

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, where: str = "rule") -> Rule:
        """Build a rule from a mapping, naming unknown keys and the allowed ones."""
        if not isinstance(data, Mapping):
            raise ConfigError(f"{where} must be a table of keys (got {type(data).__name__})")
        allowed = [f.name for f in fields(cls)]
        unknown = [k for k in data if k not in allowed]
        if unknown:
            raise ConfigError(
                f"{where}: unknown key {unknown[0]!r}; allowed keys: {', '.join(allowed)}"
            )
        if "metric" not in data or "threshold" not in data:
            missing = "metric" if "metric" not in data else "threshold"
            raise ConfigError(f"{where}: '{missing}' is required; add {missing} = ...")
        kwargs = dict(data)
        if kwargs.get("metric") in _CHECKS:
            kwargs.pop("against", None)
        name = kwargs.get("name")
        label = f"{where} ({name!r})" if isinstance(name, str) and name else where
        try:
            return cls(**kwargs)
        except ConfigError as exc:
            msg = str(exc)
            raise ConfigError(f"{label}: {msg.split(': ', 1)[1]}" if ": " in msg else msg) from None


def default_rules() -> list[Rule]:
    """The built-in rules (the README explains the choices).

    * ``nonfinite`` (fail): any NaN/inf in a watched input, any phase.
    * ``collapsed-input`` (fail): a layer input whose standard deviation is at most 1e-6
      (input units) in two consecutive samples.
    * ``entry-shift`` / ``entry-scale`` (fail): the mean or the spread of an *entry*
      layer's input (the data as it enters the model) is at least 6 noise floors away
      from the reference; ``entry-jump`` / ``entry-scale-jump`` (fail): the same against
      the previous sample.  Entry inputs do not drift by training, so a shift there
      means the data changed.  ``min_raw`` (0.1 reference std for the mean, 0.05 nats,
      about 5%, for the spread) keeps statistically clear but tiny changes -- possible
      with large batches -- from failing a run.
    * ``sudden-shift`` / ``sudden-scale`` (warn): any layer's input mean or spread jumped
      between two successive samples by at least 12 noise floors *and* by at least 0.25
      (reference std, resp. nats: a 28% change of spread).  Inner layers drift as
      weights learn (typically well below 0.25 between samples); that drift shows in
      TensorBoard and the event log (``vs_reference``), and no default rule fails on it.

    Thresholds come from calibration runs on our test data (batch 8: no alert in 300
    stationary samples; a 0.5-std input shift scores 8-14 noise floors): common practice
    for a false-alarm margin, no published source.
    """
    entry = (ENTRY,)
    common = {"layers": entry, "severity": "fail", "cooldown": 10}
    return [
        Rule("nonfinite", threshold=1, severity="fail", phase="any", name="nonfinite"),
        Rule("collapse", threshold=1e-6, severity="fail", patience=2, name="collapsed-input"),
        Rule("mean_shift", against="reference", threshold=6.0, min_raw=0.1, **common,
             name="entry-shift"),
        Rule("log_std_ratio", against="reference", threshold=6.0, min_raw=0.05, **common,
             name="entry-scale"),
        Rule("mean_shift", against="previous", threshold=6.0, min_raw=0.1, **common,
             name="entry-jump"),
        Rule("log_std_ratio", against="previous", threshold=6.0, min_raw=0.05, **common,
             name="entry-scale-jump"),
        Rule("mean_shift", against="previous", threshold=12.0, min_raw=0.25, severity="warn",
             cooldown=10, name="sudden-shift"),
        Rule("log_std_ratio", against="previous", threshold=12.0, min_raw=0.25,
             severity="warn", cooldown=10, name="sudden-scale"),
    ]


# ----------------------------------------------------------------------------- TOML
def rules_from_toml(text: str, *, source: str = "<string>") -> list[Rule]:
    """Parse rules from TOML text (format in the module docstring)."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        try:
            import tomli as tomllib  # type: ignore[no-redef]
        except ModuleNotFoundError as exc:
            raise ImportError(
                "reading TOML rules on Python 3.10 needs tomli: pip install tomli"
            ) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML ({exc}); fix the syntax") from None
    allowed = ("use_defaults", "rule")
    unknown = [k for k in data if k not in allowed]
    if unknown:
        raise ConfigError(
            f"{source}: unknown top-level key {unknown[0]!r}; allowed keys: "
            f"{', '.join(allowed)} (rules go in [[rule]] tables)"
        )
    use_defaults = data.get("use_defaults", True)
    if not isinstance(use_defaults, bool):
        raise ConfigError(
            f"{source}: 'use_defaults' must be true or false (got {use_defaults!r})"
        )
    tables = data.get("rule", [])
    if not isinstance(tables, list):
        raise ConfigError(f"{source}: 'rule' must be an array of tables: write [[rule]]")
    rules = [Rule.from_dict(t, where=f"{source}: rule {i + 1}") for i, t in enumerate(tables)]
    out = (default_rules() if use_defaults else []) + rules
    if not out:
        raise ConfigError(
            f"{source}: no rules: add [[rule]] tables or set use_defaults = true"
        )
    return out


def load_rules(path: str | os.PathLike) -> list[Rule]:
    """Read rules from a TOML file; errors name the file, the rule and the key."""
    try:
        with open(path, encoding="utf-8") as f:
            text = f.read()
    except OSError as exc:
        raise ConfigError(
            f"'rules' file '{os.fspath(path)}' cannot be read ({exc.strerror or exc}); "
            "pass the path of a TOML rules file"
        ) from None
    return rules_from_toml(text, source=os.fspath(path))
