"""Gathering one byte range of an event log: step aggregates, alerts and the other records.

:class:`RunAcc` dispatches each record by ``kind``: ``step`` records go to a
:class:`~shiftwatch.cli.aggregate.PhaseAcc` per phase, ``alert`` records to
:class:`AlertAcc` (exact counts, the first alert per layer, the first ``keep`` alerts in
full), ``reference``/``end``/``run`` records are kept as small dicts.  Accumulators of
consecutive byte ranges merge in file order, so "first" means first written.
"""

from __future__ import annotations

import math
from typing import Any

from .aggregate import PHASES, Grid, PhaseAcc
from .logread import LogError

__all__ = ["AlertAcc", "RunAcc", "wrap_error"]

_ALERT_KEYS = ("step", "phase", "layer", "metric", "against", "view", "channel", "value",
               "threshold", "units", "raw", "noise", "severity", "rule", "action", "message")


class AlertAcc:
    """Alert records: exact counts, the first alert per layer, and the first ``keep`` alerts."""

    def __init__(self, keep: int = 5000) -> None:
        self.keep = keep
        self.total = 0
        self.by_severity: dict[str, int] = {}
        self.by_layer: dict[str, dict[str, int]] = {}
        self.first_by_layer: dict[str, dict[str, Any]] = {}
        self.kept: list[dict[str, Any]] = []

    def add(self, rec: dict[str, Any]) -> None:
        """Fold in one alert record. Raises ValueError when a key has the wrong type."""
        step = rec.get("step")
        if not isinstance(step, int) or isinstance(step, bool):
            raise ValueError(f"alert 'step' must be an integer (got {step!r})")
        sev = rec.get("severity")
        if not isinstance(sev, str):
            raise ValueError(f"alert 'severity' must be a string (got {sev!r})")
        layer = rec.get("layer")
        if layer is not None and not isinstance(layer, str):
            raise ValueError(f"alert 'layer' must be a string or null (got {layer!r})")
        alert = {k: rec.get(k) for k in _ALERT_KEYS}
        self.total += 1
        self.by_severity[sev] = self.by_severity.get(sev, 0) + 1
        key = layer if layer is not None else ""
        counts = self.by_layer.setdefault(key, {})
        counts[sev] = counts.get(sev, 0) + 1
        self.first_by_layer.setdefault(key, alert)
        if len(self.kept) < self.keep:
            self.kept.append(alert)

    @property
    def first(self) -> dict[str, Any] | None:
        """The first alert written to the log (None when there is none)."""
        return self.kept[0] if self.kept else None

    def merge(self, other: AlertAcc) -> None:
        """Fold in the alerts of a *later* part of the same log."""
        self.total += other.total
        for sev, n in other.by_severity.items():
            self.by_severity[sev] = self.by_severity.get(sev, 0) + n
        for layer, counts in other.by_layer.items():
            mine = self.by_layer.setdefault(layer, {})
            for sev, n in counts.items():
                mine[sev] = mine.get(sev, 0) + n
        for layer, alert in other.first_by_layer.items():
            self.first_by_layer.setdefault(layer, alert)
        self.kept.extend(other.kept[: max(0, self.keep - len(self.kept))])


class RunAcc:
    """Everything gathered from one byte range of a log; ranges merge in file order."""

    def __init__(self, layer_names: list[str], grid: Grid, *, keep_alerts: int = 5000) -> None:
        self.lidx = {name: i for i, name in enumerate(layer_names)}
        self.grid = grid
        self.phases: dict[str, PhaseAcc] = {}
        self.alerts = AlertAcc(keep_alerts)
        self.references: list[dict[str, Any]] = []
        self.end: dict[str, Any] | None = None
        self.restarts: list[int] = []  # byte offsets of further `run` records
        self.kinds: dict[str, int] = {}
        self.unknown: set[str] = set()
        self.notes: list[str] = []
        self.first_time: float | None = None
        self.last_time: float | None = None

    def add(self, rec: dict[str, Any], offset: int) -> None:
        """Fold in one decoded record (already checked to be a schema-1 object)."""
        kind = rec.get("kind")
        self.kinds[str(kind)] = self.kinds.get(str(kind), 0) + 1
        t = rec.get("time")
        if isinstance(t, (int, float)) and math.isfinite(t):
            self.first_time = t if self.first_time is None else min(self.first_time, t)
            self.last_time = t if self.last_time is None else max(self.last_time, t)
        if kind == "step":
            step, phase, layers = rec.get("step"), rec.get("phase"), rec.get("layers")
            if not isinstance(step, int) or isinstance(step, bool):
                raise ValueError(f"step 'step' must be an integer (got {step!r})")
            if not isinstance(layers, dict):
                raise ValueError(f"step 'layers' must be an object (got {layers!r:.40})")
            if phase not in PHASES:
                self.unknown.add(f"phase {phase!r}")
                return
            acc = self.phases.get(phase)
            if acc is None:
                acc = self.phases[phase] = PhaseAcc(len(self.lidx), self.grid)
            acc.add(step, layers, self.lidx, self.unknown)
        elif kind == "alert":
            self.alerts.add(rec)
        elif kind == "reference":
            self.references.append({k: rec.get(k) for k in ("step", "source", "steps", "path",
                                                              "entry")})
        elif kind == "end":
            self.end = {k: rec.get(k) for k in ("step", "stopped", "reason", "alerts")}
        elif kind == "run":
            self.restarts.append(offset)
        else:
            self.unknown.add(f"record kind {kind!r}")

    def merge(self, other: RunAcc) -> None:
        """Fold in the accumulator of the *next* byte range."""
        for phase, acc in other.phases.items():
            if phase in self.phases:
                self.phases[phase].merge(acc)
            else:
                self.phases[phase] = acc
        self.alerts.merge(other.alerts)
        self.references += other.references
        self.end = other.end if other.end is not None else self.end
        self.restarts += other.restarts
        for kind, n in other.kinds.items():
            self.kinds[kind] = self.kinds.get(kind, 0) + n
        self.unknown |= other.unknown
        self.notes += other.notes
        for attr, fn in (("first_time", min), ("last_time", max)):
            vals = [v for v in (getattr(self, attr), getattr(other, attr)) if v is not None]
            setattr(self, attr, fn(vals) if vals else None)


def wrap_error(exc: ValueError, where: str) -> LogError:
    """Turn a content error of one record into the user-facing message."""
    return LogError(f"{where}: {exc}; the log is corrupt there: fix or remove that line")
