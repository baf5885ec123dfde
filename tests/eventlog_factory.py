"""A synthetic event-log writer that follows README.md (schema 1) to the letter.

It stands in for the monitor until recorded runs exist.  The numbers follow a simple model
that has the properties the real metrics have (see shiftwatch/divergence.py's docstring):

* under no shift a metric's ``value`` is its ``noise`` times ``|Z| * sqrt(pi/2)`` with Z
  standard normal, so ``E[value] == noise`` and ``E[ratio] == 1`` (median ~0.85);
* an induced mean shift of ``d`` reference stds from step ``s`` on moves the layer's
  ``mean_shift``/``w1`` by ``d``, ``gauss_kl``/``hist_kl`` by ``d^2/2``, ``psi`` by ``d^2``
  and ``js`` by ``d^2/8`` (small-shift Gaussian approximations, from memory), against the
  reference from then on and against the previous sample at the first sample after ``s``.

Alerts are judged here from the values written, with the rules written in the ``run``
record (threshold in noise units or raw units, patience in consecutive samples, cooldown
in steps), so alerts and step records agree as they would in a real log.  The writer
returns a :class:`Truth` with every alert it wrote.
"""

from __future__ import annotations

import fnmatch
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

METRICS = ("mean_shift", "log_std_ratio", "gauss_kl", "hist_kl", "js", "psi", "w1")
MOMENT = ("mean_shift", "log_std_ratio", "gauss_kl")
_NOISE = {"mean_shift": 0.04, "log_std_ratio": 0.03, "gauss_kl": 0.002, "hist_kl": 0.004,
          "js": 0.001, "psi": 0.008, "w1": 0.035}
_RESPONSE = {"mean_shift": lambda d: d, "log_std_ratio": lambda d: 0.0 * d,
             "gauss_kl": lambda d: d * d / 2, "hist_kl": lambda d: d * d / 2,
             "js": lambda d: d * d / 8, "psi": lambda d: d * d, "w1": lambda d: d}


def default_rules() -> list[dict[str, Any]]:
    """Rules of the kinds the monitor ships (as ``Rule.to_dict()`` writes them): abrupt
    change fails, drift warns, the data-facing ("<entry>") layer fails on any shift, a
    channel view, and the built-ins.  Comparisons: ``>=``, ``<=`` for ``collapse``;
    ``patience`` and ``cooldown`` count samples."""
    base = {"view": "layer", "layers": ["*"], "patience": 1, "cooldown": 0, "units": "noise",
            "phase": "train"}
    return [
        {**base, "name": "nonfinite", "metric": "nonfinite", "against": None,
         "threshold": 1.0, "units": "raw", "severity": "fail", "phase": "any"},
        {**base, "name": "collapsed-input", "metric": "collapse", "against": None,
         "threshold": 1e-6, "units": "raw", "patience": 2, "severity": "fail"},
        {**base, "name": "entry-shift", "metric": "mean_shift", "against": "reference",
         "threshold": 6.0, "layers": ["<entry>"], "cooldown": 10, "severity": "fail"},
        {**base, "name": "sudden-shift", "metric": "mean_shift", "against": "previous",
         "threshold": 6.0, "cooldown": 5, "severity": "fail"},
        {**base, "name": "slow-drift", "metric": "w1", "against": "reference",
         "threshold": 8.0, "patience": 2, "cooldown": 20, "severity": "warn"},
        {**base, "name": "head-channels", "metric": "mean_shift", "against": "reference",
         "view": "channels", "threshold": 12.0, "layers": ["head.*"], "cooldown": 20,
         "severity": "warn"},
    ]


@dataclass
class Scenario:
    """A run to write. Steps are optimizer steps; ``samples`` train samples are written."""

    layers: list[tuple[str, str, int]] = field(default_factory=lambda: [
        ("stem.conv", "Conv2d", 3), ("block1.norm", "BatchNorm2d", 16),
        ("block1.conv", "Conv2d", 16), ("head.fc", "Linear", 64)])
    samples: int = 60
    every_n_steps: int = 10
    warmup_steps: int = 20
    reference_steps: int = 4
    val_every: int | None = 10  # a val record after every k-th train sample
    shifts: dict[str, tuple[int, float]] = field(default_factory=dict)  # layer: (step, d)
    nonfinite: dict[str, int] = field(default_factory=dict)  # layer: first step with NaNs
    collapse: dict[str, int] = field(default_factory=dict)  # layer: first collapsed step
    noise_scale: dict[str, float] = field(default_factory=dict)  # layer: noise multiplier
    rules: list[dict[str, Any]] = field(default_factory=default_rules)
    metrics: tuple[str, ...] = METRICS
    channels: bool = True
    end: bool = True
    stop_on_fail: bool = False
    schema: int = 1
    seed: int = 0
    digits: int | None = None  # round floats to this many significant digits


@dataclass
class Truth:
    """What the writer put into the log."""

    path: Path
    alerts: list[dict[str, Any]] = field(default_factory=list)
    train_records: int = 0
    val_records: int = 0
    last_step: int = 0
    stopped: bool = False


def _rule_applies(rule: dict[str, Any], layer: str, phase: str, entry: str) -> bool:
    if rule.get("phase") not in ("any", phase):
        return False
    pats = rule.get("layers") or ["*"]
    return any(layer == entry if p == "<entry>" else fnmatch.fnmatchcase(layer, p)
               for p in pats)


class _Writer:
    def __init__(self, path: Path, sc: Scenario) -> None:
        self.f = open(path, "w", encoding="utf-8")
        self.sc = sc
        try:
            import orjson

            self.dumps = lambda o: orjson.dumps(o).decode()
        except ImportError:  # pragma: no cover
            self.dumps = lambda o: json.dumps(o, allow_nan=False)

    def write(self, rec: dict[str, Any]) -> None:
        self.f.write(self.dumps(rec) + "\n")
        self.f.flush()

    def close(self) -> None:
        self.f.close()


def write_log(log_dir: str | Path, sc: Scenario | None = None, *, t0: float = 1.7e9) -> Truth:
    """Write ``log_dir/events.jsonl`` for scenario ``sc``; return what was written."""
    sc = sc or Scenario()
    log_dir = Path(log_dir)
    log_dir.mkdir(parents=True, exist_ok=True)
    path = log_dir / "events.jsonl"
    truth = Truth(path)
    rng = np.random.default_rng(sc.seed)
    w = _Writer(path, sc)
    names = [n for n, _, _ in sc.layers]
    L, M = len(names), len(sc.metrics)
    scale = np.array([sc.noise_scale.get(n, 1.0) for n in names])
    noise = np.array([[_NOISE[m] for m in sc.metrics]]) * scale[:, None]  # (L, M)
    rnd = (lambda x: float(f"{x:.{sc.digits}g}")) if sc.digits else float
    settings = {"every_n_steps": sc.every_n_steps, "warmup_steps": sc.warmup_steps,
                "reference_steps": sc.reference_steps, "bins": 64, "max_hist_values": 65536,
                "on_alert": "stop" if sc.stop_on_fail else "record"}
    w.write({"schema": sc.schema, "kind": "run", "time": t0, "shiftwatch": "0.1.0",
             "settings": settings,
             "layers": [{"name": n, "type": t, "channels": c} for n, t, c in sc.layers],
             "rules": sc.rules})
    streak: dict[tuple[str, str], int] = {}
    quiet_until: dict[tuple[str, str], int] = {}
    prev_level = {ph: np.zeros(L) for ph in ("train", "val")}
    seen = {"train": 0, "val": 0}
    ref_ready = False
    sample_steps = [sc.warmup_steps + sc.every_n_steps * (i + 1) for i in range(sc.samples)]
    for i, step in enumerate(sample_steps):
        t = t0 + step * 0.05
        phases = ["train"] + (["val"] if sc.val_every and (i + 1) % sc.val_every == 0 else [])
        for phase in phases:
            level = np.array([sc.shifts[n][1] if n in sc.shifts and step >= sc.shifts[n][0]
                              else 0.0 for n in names])
            if phase == "val":
                level = level + 0.1  # eval-mode forwards sit a little off the train reference
            layers: dict[str, Any] = {}
            vs: dict[str, np.ndarray | None] = {}
            for key, d in (("vs_previous", level - prev_level[phase]),
                           ("vs_reference", level)):
                available = seen[phase] > 0 if key == "vs_previous" else ref_ready
                if not available:
                    vs[key] = None
                    continue
                z = rng.standard_normal((L, M)) * math.sqrt(math.pi / 2)
                resp = np.stack([_RESPONSE[m](np.abs(d)) for m in sc.metrics], 1)
                vs[key] = np.abs(resp + noise * z)
            for li, name in enumerate(names):
                nan_now = name in sc.nonfinite and step >= sc.nonfinite[name]
                std = 1e-9 if name in sc.collapse and step >= sc.collapse[name] else \
                    float(1.0 + 0.05 * rng.standard_normal())
                entry: dict[str, Any] = {
                    "count": 4096, "nonfinite": 37 if nan_now else 0,
                    "mean": rnd(float(level[li] + 0.02 * rng.standard_normal())),
                    "std": rnd(std), "min": rnd(-4.0 * std), "max": rnd(4.0 * std)}
                for key, vals in vs.items():
                    if vals is None:
                        entry[key] = None
                        continue
                    entry[key] = {m: {"value": rnd(vals[li, mi]), "noise": rnd(noise[li, mi]),
                                      "ratio": rnd(vals[li, mi] / noise[li, mi])}
                                  for mi, m in enumerate(sc.metrics)}
                if sc.channels and vs["vs_reference"] is not None:
                    vals = vs["vs_reference"]
                    entry["channels"] = {"vs_reference": {
                        m: {"mean": rnd(vals[li, mi]), "max": rnd(1.5 * vals[li, mi]),
                            "max_ratio": rnd(1.8 * vals[li, mi] / noise[li, mi]),
                            "worst": [int(x) for x in rng.permutation(3)]}
                        for mi, m in enumerate(sc.metrics) if m in MOMENT}}
                layers[name] = entry
            w.write({"schema": sc.schema, "kind": "step", "time": t, "step": step,
                     "phase": phase, "layers": layers})
            truth.train_records += phase == "train"
            truth.val_records += phase == "val"
            truth.last_step = step
            prev_level[phase] = level
            seen[phase] += 1
            for name in names:
                entry = layers[name]
                for rule in sc.rules:
                    if not _rule_applies(rule, name, phase, names[0]):
                        continue
                    metric, key = rule["metric"], (rule["name"], name, phase)
                    channel = None
                    if metric == "nonfinite":
                        value = raw = float(entry["nonfinite"])
                        nz, fired = None, value >= rule["threshold"]
                    elif metric == "collapse":
                        value = raw = entry["std"]
                        nz, fired = None, value <= rule["threshold"]
                    elif rule.get("view") == "channels":
                        blk = (entry.get("channels") or {}).get(f"vs_{rule['against']}")
                        if not blk or metric not in blk:
                            continue
                        e = blk[metric]
                        value = e["max_ratio"] if rule["units"] == "noise" else e["max"]
                        raw, nz, channel = e["max"], None, e["worst"][0]
                        fired = value >= rule["threshold"]
                    else:
                        blk = entry.get(f"vs_{rule['against']}")
                        if not blk or metric not in blk:
                            continue
                        e = blk[metric]
                        value = e["ratio"] if rule["units"] == "noise" else e["value"]
                        raw, nz, fired = e["value"], e["noise"], value >= rule["threshold"]
                    streak[key] = streak.get(key, 0) + 1 if fired else 0
                    if not fired or streak[key] < rule["patience"] or \
                            seen[phase] < quiet_until.get(key, -1):
                        continue
                    quiet_until[key] = seen[phase] + rule["cooldown"]
                    action = "stop" if rule["severity"] == "fail" and sc.stop_on_fail \
                        else "record"
                    alert = {"schema": sc.schema, "kind": "alert", "time": t, "step": step,
                             "phase": phase, "layer": name, "metric": metric,
                             "against": rule["against"], "view": rule.get("view", "layer"),
                             "value": value,
                             "threshold": rule["threshold"], "units": rule["units"],
                             "raw": raw, "noise": nz,
                             "severity": rule["severity"], "rule": rule["name"],
                             "action": action,
                             "message": f"{name} {metric} = {value:.3g} (threshold "
                                        f"{rule['threshold']:g})"}
                    if channel is not None:
                        alert["channel"] = channel
                    w.write(alert)
                    truth.alerts.append(alert)
                    truth.stopped |= action == "stop"
        if not ref_ready and seen["train"] >= sc.reference_steps:
            ref_ready = True
            w.write({"schema": sc.schema, "kind": "reference", "time": t, "step": step,
                     "source": "pooled", "steps": sample_steps[: sc.reference_steps],
                     "path": None, "entry": names[:1]})
        if truth.stopped:
            break
    if sc.end:
        counts = {s: sum(a["severity"] == s for a in truth.alerts) for s in ("warn", "fail")}
        w.write({"kind": "end", "step": truth.last_step, "stopped": truth.stopped,
                 "reason": "stopped by a failing alert" if truth.stopped else "finished",
                 "alerts": counts})
    w.close()
    return truth


def cut_last_line(path: Path, keep: int = 25) -> None:
    """Append the first ``keep`` bytes of a copy of the last record, as a killed writer would."""
    lines = path.read_bytes().splitlines(keepends=True)
    with open(path, "ab") as f:
        f.write(lines[-1][:keep])


def corrupt_line(path: Path, lineno: int) -> None:
    """Cut line ``lineno`` (1-based) in half, keeping its newline (a damaged middle line)."""
    lines = path.read_bytes().splitlines(keepends=True)
    line = lines[lineno - 1]
    lines[lineno - 1] = line[: len(line) // 2] + b"\n"
    path.write_bytes(b"".join(lines))


def load_naive(path: Path) -> list[dict[str, Any]]:
    """Every record of a complete, well-formed log, loaded whole (test oracle only)."""
    return [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines() if x.strip()]
