"""``shiftwatch summary LOGDIR``: which layers moved, when, how far beyond noise.

Ranks layers by their peak shift (largest ratio of a metric to its noise floor over the
run, against the reference by default) and shows the raw value of that metric at the peak,
each layer's first alert, alert counts by severity, the run's first alert and the steps
covered.  ``--json`` prints the same facts, for every layer and metric, as one JSON object.
Works on a run that is still writing its log (the part written so far is read).
"""

from __future__ import annotations

import argparse
from typing import Any

import numpy as np

from .aggregate import AGAINST, CHANNEL_METRICS, METRICS
from .common import (
    EXIT_OK,
    add_view_options,
    add_workers_option,
    alert_line,
    dump_json,
    emit,
    fail,
    headline,
    load,
    num,
    table,
)
from .logread import LogError
from .runread import RunData, finite

__all__ = ["build_summary", "register", "render_text"]


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "summary", help="rank layers by peak shift; alerts; steps covered",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("logdir", metavar="LOGDIR", help="run directory (log_dir) or events.jsonl")
    p.add_argument("--json", action="store_true", help="print one JSON object instead")
    p.add_argument("--top", type=int, default=30, metavar="N",
                   help="layers shown in the table (default 30; 0 shows all; --json has all)")
    add_view_options(p)
    add_workers_option(p)
    p.set_defaults(func=run)


def _steps(run: RunData) -> dict[str, Any]:
    out = {}
    for phase, acc in run.acc.phases.items():
        out[phase] = {"first": acc.first_step, "last": acc.last_step, "samples": acc.records}
    return out


def _layer_metrics(run: RunData, li: int, phase: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for against in AGAINST:
        t = run.table(phase, against)
        if t is None:
            continue
        per = {}
        for mi, m in enumerate(METRICS):
            if not t["samples"][li, mi]:
                continue
            per[m] = {
                "samples": int(t["samples"][li, mi]),
                "peak_ratio": finite(t["peak_ratio"][li, mi]),
                "peak_step": int(t["peak_step"][li, mi]),
                "peak_value": finite(t["peak_value"][li, mi]),
                "peak_noise": finite(t["peak_noise"][li, mi]),
                "max_value": finite(t["vpeak_value"][li, mi]),
                "max_value_step": int(t["vpeak_step"][li, mi]),
                "median_ratio": finite(t["median_ratio"][li, mi]),
                "median_value": finite(t["median_value"][li, mi]),
                "median_noise": finite(t["median_noise"][li, mi]),
            }
        c = run.channel_table(phase, against)
        if c is not None:
            for ci, m in enumerate(CHANNEL_METRICS):
                if c["ch_samples"][li, ci] and m in per:
                    per[m]["channels"] = {
                        "peak_max_ratio": finite(c["ch_peak_ratio"][li, ci]),
                        "peak_step": int(c["ch_peak_step"][li, ci]),
                        "peak_max": finite(c["ch_peak_max"][li, ci]),
                        "worst_channel": int(c["ch_peak_worst"][li, ci]),
                    }
        if per:
            out[against] = per
    return out


def build_summary(run: RunData, *, phase: str = "train", against: str = "reference",
                  metric: str = "any") -> dict[str, Any]:
    """All summary facts as plain data (JSON-ready after :func:`common.jsonable`).

    ``layers`` is sorted by peak ratio to noise (largest first; layers without samples
    last, in model order).  Counts are exact; medians come from log histograms (a few
    percent accurate).
    """
    h = headline(run, phase=phase, against=against, metric=metric)
    acc = run.phase(phase)
    alerts = run.acc.alerts
    layers = []
    for li, name in enumerate(run.layers):
        counts = alerts.by_layer.get(name, {})
        first = alerts.first_by_layer.get(name)
        stats: dict[str, Any] = {}
        if acc is not None and acc.layer_samples[li]:
            stats = {"nonfinite_total": int(acc.nonfinite_total[li]),
                     "std_min": finite(acc.std_min[li]),
                     "std_min_step": int(acc.std_min_step[li])}
        has = bool(h["samples"][li]) and np.isfinite(h["ratio"][li])
        layers.append({
            "name": name,
            "type": run.layer_types[li],
            "peak": {"ratio": finite(h["ratio"][li]),
                     "metric": METRICS[int(h["metric"][li])],
                     "value": finite(h["value"][li]), "noise": finite(h["noise"][li]),
                     "step": int(h["step"][li])} if has else None,
            "first_alert": first,
            "alerts": {"warn": counts.get("warn", 0), "fail": counts.get("fail", 0),
                       **{k: v for k, v in counts.items() if k not in ("warn", "fail")}},
            "layer_stats": stats,
            "metrics": _layer_metrics(run, li, phase),
        })
    def rank(i: int) -> tuple[bool, float, int]:
        peak = layers[i]["peak"]
        ratio = peak["ratio"] if peak and peak["ratio"] is not None else None
        return (ratio is None, -(ratio or 0.0), i)

    order = sorted(range(len(layers)), key=rank)
    extra = {k: v for k, v in alerts.first_by_layer.items() if k not in set(run.layers)}
    return {
        "log": str(run.path),
        "schema": 1,
        "shiftwatch": run.header.get("shiftwatch"),
        "complete": run.complete,
        "end": run.acc.end,
        "view": {"phase": phase, "against": against, "metric": metric},
        "steps": _steps(run),
        "reference": run.acc.references[0] if run.acc.references else None,
        "alerts": {"total": alerts.total, "by_severity": dict(alerts.by_severity),
                   "first": alerts.first,
                   "other_sources": {k or "(run)": alerts.by_layer[k] for k in extra}},
        "layers": [layers[i] for i in order],
        "notes": run.notes,
    }


def render_text(s: dict[str, Any], *, top: int = 30) -> str:
    """The terminal view of :func:`build_summary`'s result."""
    out = []
    state = "complete" if s["complete"] else "no end record (still running, or killed)"
    out.append(f"run: {s['log']}  [{state}]")
    steps = s["steps"]
    if steps:
        parts = [f"{ph} steps {v['first']}..{v['last']} ({v['samples']} samples)"
                 for ph, v in steps.items()]
        out.append("covered: " + "; ".join(parts))
    else:
        out.append("covered: no step records yet")
    ref = s["reference"]
    out.append(f"reference: ready at step {ref['step']} ({ref['source']})" if ref
               else "reference: not ready (no shift against the reference yet)")
    a = s["alerts"]
    sev = ", ".join(f"{n} {k}" for k, n in sorted(a["by_severity"].items())) or "none"
    out.append(f"alerts: {sev}")
    if a["first"]:
        out.append(f"first alert: {alert_line(a['first'])}")
    if s["end"]:
        e = s["end"]
        how = "stopped" if e.get("stopped") else "ended"
        out.append(f"end: {how} at step {e.get('step')}: {e.get('reason')}")
    v = s["view"]
    which = "largest ratio over all metrics" if v["metric"] == "any" else v["metric"]
    out.append("")
    out.append(f"layers ranked by peak shift vs {v['against']} ({v['phase']} phase; {which}; "
               "x noise = value / noise floor, ~1 at noise level):")
    rows = []
    shown = s["layers"] if top == 0 else s["layers"][:top]
    for rank, lay in enumerate(shown, 1):
        p = lay["peak"]
        fa = lay["first_alert"]
        rows.append([str(rank), lay["name"], lay["type"] or "-",
                     num(p["ratio"]) if p else "-", p["metric"] if p else "-",
                     num(p["value"]) if p else "-", str(p["step"]) if p else "-",
                     f"{fa['step']} {fa['rule']}" if fa else "-",
                     str(lay["alerts"]["warn"]), str(lay["alerts"]["fail"])])
    out.append(table(["#", "layer", "type", "peak x noise", "metric", "raw value", "at step",
                      "first alert", "warn", "fail"], rows,
                     right=[True, False, False, True, False, True, True, False, True, True]))
    if len(shown) < len(s["layers"]):
        out.append(f"... {len(s['layers']) - len(shown)} more layers (--top 0 shows all)")
    if s["notes"]:
        out.append("")
        out.append("notes:")
        out.extend(f"  - {n}" for n in s["notes"])
    return "\n".join(out)


def run(args: argparse.Namespace) -> int:
    if args.top < 0:
        return fail("summary", f"'--top' must be 0 or more (got {args.top})")
    try:
        data = load(args.logdir, args)
    except LogError as exc:
        return fail("summary", str(exc))
    s = build_summary(data, phase=args.phase, against=args.against, metric=args.metric)
    emit(dump_json(s) if args.json else render_text(s, top=args.top))
    return EXIT_OK
