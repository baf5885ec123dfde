"""Judging: one sampled step's scores, the rules' counters, and the alerts that fire.

:class:`Judge` applies :class:`~shiftwatch.rules.Rule` objects: it holds their
patience/cooldown counters and turns one step's :class:`Observation` (all layers' scores,
vectorised) into :class:`Alert` records.  It decides only; what happens next (record,
stop, raise) is the monitor's job.  What a rule is, and how rules are written (Python or
TOML), is :mod:`shiftwatch.rules`.
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np

from .capture import no_match_error
from .divergence import METRICS, MOMENT_METRICS
from .errors import ConfigError
from .rules import ACTIONS, ENTRY, Rule, _choice

__all__ = ["Alert", "Judge", "Observation", "with_action"]


@dataclass(frozen=True)
class Alert:
    """One rule firing on one layer at one sampled step.

    ``value`` is what was compared with ``threshold`` (a multiple of ``noise`` when
    ``units == "noise"``); ``raw`` is the metric in its own units; ``channel`` is the
    worst channel for ``view == "channels"``.  ``action`` says what the monitor did.
    """

    step: int
    phase: str
    layer: str
    rule: str
    metric: str
    against: str | None
    view: str
    value: float
    threshold: float
    units: str
    raw: float
    noise: float | None
    severity: str
    action: str = "record"
    channel: int | None = None

    @property
    def message(self) -> str:
        unit = f" x noise (raw {self.raw:.3g})" if self.units == "noise" else ""
        vs = f" vs {self.against}" if self.against else ""
        ch = f" (channel {self.channel})" if self.channel is not None else ""
        op = "<=" if self.metric == "collapse" else ">="
        return (
            f"step {self.step} [{self.phase}] {self.layer}{ch}: {self.metric}{vs} = "
            f"{self.value:.3g}{unit} {op} {self.threshold:g} ({self.severity}, "
            f"rule {self.rule})"
        )

    def to_record(self) -> dict[str, Any]:
        """The event-log record (``kind: "alert"``, README.md)."""
        rec: dict[str, Any] = {"kind": "alert", **asdict(self), "message": self.message}
        if self.channel is None:
            del rec["channel"]
        return rec


@dataclass
class Observation:
    """One sampled step of one phase, all layers at once (arrays over layers ``L``).

    ``value``/``noise``/``ratio`` map ``"previous"``/``"reference"`` (and ``"train"`` for
    val samples that have a training sample to compare with) to ``(len(METRICS), L)``
    float arrays (NaN where not available); ``channel`` maps the same keys to a dict of
    ``(len(MOMENT_METRICS), L)`` arrays: ``max_ratio``, ``worst`` (channel with the largest
    ratio), ``worst_value``, ``worst_noise``, ``max_value``, ``argmax_value``.
    ``nonfinite`` and ``std`` are ``(L,)``; ``present`` marks layers that saw data.
    """

    step: int
    phase: str
    layers: tuple[str, ...]
    present: np.ndarray
    nonfinite: np.ndarray
    std: np.ndarray | None = None
    value: dict[str, np.ndarray] = field(default_factory=dict)
    noise: dict[str, np.ndarray] = field(default_factory=dict)
    ratio: dict[str, np.ndarray] = field(default_factory=dict)
    channel: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)


_M_INDEX = {m: i for i, m in enumerate(METRICS)}
_MM_INDEX = {m: i for i, m in enumerate(MOMENT_METRICS)}


class Judge:
    """Applies rules to observations and keeps their patience/cooldown counters.

    Call :meth:`bind` with the watched layer names (and the entry layers once known)
    before :meth:`evaluate`.  ``evaluate`` returns alerts and changes nothing but the
    counters; state round-trips through :meth:`state_dict` as plain Python lists.
    """

    def __init__(self, rules: Iterable[Rule]) -> None:
        self.rules: tuple[Rule, ...] = tuple(rules)
        for r in self.rules:
            if not isinstance(r, Rule):
                raise ConfigError(
                    f"'rules' must hold Rule objects (got {type(r).__name__}); build them "
                    "with shiftwatch.Rule(...) or load a TOML file with load_rules()"
                )
        names = [r.name for r in self.rules]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ConfigError(
                f"rule names must be unique (got {dup[0]!r} more than once); give each "
                "rule its own 'name' (rule counters are saved by name)"
            )
        self.layers: tuple[str, ...] = ()
        self._masks = np.zeros((len(self.rules), 0), bool)
        self._streak = np.zeros((len(self.rules), 0), np.int64)
        self._last = np.zeros((len(self.rules), 0), np.int64)
        self._seen = np.zeros(len(self.rules), np.int64)

    def bind(self, layers: Sequence[str], entry: Sequence[str] | None = None) -> None:
        """Resolve each rule's layer patterns against ``layers``.

        Raises:
            ConfigError: a pattern (other than ``"<entry>"``) matches no watched layer.
        """
        layers = tuple(layers)
        entry_set = set(entry or ())
        masks = np.zeros((len(self.rules), len(layers)), bool)
        for r, rule in enumerate(self.rules):
            for pattern in rule.layers:
                if pattern == ENTRY:
                    hit = np.array([n in entry_set for n in layers], bool)
                else:
                    hit = np.array([fnmatch.fnmatchcase(n, pattern) for n in layers], bool)
                    if layers and not hit.any():
                        raise no_match_error(pattern, "layers", layers, "watched layer",
                                             where=f"rule {rule.name!r}: ")
                masks[r] |= hit
        if layers != self.layers:
            old = {n: i for i, n in enumerate(self.layers)}
            streak = np.zeros((len(self.rules), len(layers)), np.int64)
            last = np.full((len(self.rules), len(layers)), -(2**40), np.int64)
            for j, n in enumerate(layers):
                if n in old:
                    streak[:, j] = self._streak[:, old[n]]
                    last[:, j] = self._last[:, old[n]]
            self._streak, self._last = streak, last
        self.layers, self._masks = layers, masks

    def _inputs(self, rule: Rule, obs: Observation):
        """``(x, available, channel, raw, noise)`` arrays over layers for one rule."""
        n = len(obs.layers)
        none = np.full(n, np.nan)
        if rule.metric == "nonfinite":
            return obs.nonfinite, obs.present, None, obs.nonfinite, none
        if rule.metric == "collapse":
            if obs.std is None:
                return none, np.zeros(n, bool), None, none, none
            return obs.std, obs.present, None, obs.std, none
        against = rule.against
        if against not in obs.value:
            return none, np.zeros(n, bool), None, none, none
        if rule.view == "layer":
            m = _M_INDEX[rule.metric]
            value, noise = obs.value[against][m], obs.noise[against][m]
            x = obs.ratio[against][m] if rule.units == "noise" else value
            return x, np.isfinite(x), None, value, noise
        ch, m = obs.channel[against], _MM_INDEX[rule.metric]
        if rule.units == "noise":
            x = ch["max_ratio"][m]
            return x, np.isfinite(x), ch["worst"][m], ch["worst_value"][m], ch["worst_noise"][m]
        x = ch["max_value"][m]
        return x, np.isfinite(x), ch["argmax_value"][m], x, none

    def evaluate(self, obs: Observation) -> list[Alert]:
        """Alerts fired by ``obs`` (counters advance; nothing else changes)."""
        if tuple(obs.layers) != self.layers:
            raise ValueError("observation layers differ from the bound layers; call bind()")
        alerts: list[Alert] = []
        for r, rule in enumerate(self.rules):
            if rule.phase not in (obs.phase, "any"):
                continue
            x, avail, chan, raw, noise = self._inputs(rule, obs)
            use = self._masks[r] & avail
            if not use.any():
                continue
            self._seen[r] += 1
            with np.errstate(invalid="ignore"):
                over = (x <= rule.threshold) if rule.fires_below else (x >= rule.threshold)
            over &= use
            if rule.min_raw:
                with np.errstate(invalid="ignore"):
                    over &= raw >= rule.min_raw
            streak = self._streak[r]
            streak[:] = np.where(use, np.where(over, streak + 1, 0), streak)
            cool = self._seen[r] - self._last[r] > rule.cooldown
            fire = over & (streak >= rule.patience) & cool
            if not fire.any():
                continue
            self._last[r][fire] = self._seen[r]
            for j in np.flatnonzero(fire).tolist():
                nz = float(noise[j])
                alerts.append(Alert(
                    step=int(obs.step), phase=obs.phase, layer=obs.layers[j], rule=rule.name,
                    metric=rule.metric, against=rule.against, view=rule.view,
                    value=float(x[j]), threshold=rule.threshold, units=rule.units,
                    raw=float(raw[j]), noise=nz if math.isfinite(nz) else None,
                    severity=rule.severity,
                    channel=None if chan is None else int(chan[j]),
                ))
        return alerts

    # ------------------------------------------------------------------ state
    def state_dict(self) -> dict[str, Any]:
        return {
            "rules": [r.name for r in self.rules],
            "layers": list(self.layers),
            "streak": self._streak.tolist(),
            "last": self._last.tolist(),
            "seen": self._seen.tolist(),
        }

    def load_state_dict(self, state: Mapping[str, Any]) -> None:
        """Restore counters; rules and layers are matched by name (new ones start at 0)."""
        names = list(state.get("rules", []))
        layers = list(state.get("layers", []))
        lj = {n: j for j, n in enumerate(layers)}
        streak, last = state.get("streak", []), state.get("last", [])
        seen = state.get("seen", [])
        for r, rule in enumerate(self.rules):
            if rule.name not in names:
                continue
            i = names.index(rule.name)
            self._seen[r] = int(seen[i])
            for j, n in enumerate(self.layers):
                if n in lj:
                    self._streak[r, j] = int(streak[i][lj[n]])
                    self._last[r, j] = int(last[i][lj[n]])


def with_action(alert: Alert, action: str) -> Alert:
    """A copy of ``alert`` recording what the monitor did with it."""
    return replace(alert, action=_choice("alert", "action", action, ACTIONS))
