"""Plumbing shared by the after-the-run commands: options, loading, errors, text tables.

Every command reads logs through :func:`load`, reports unusable input through
:func:`fail` (one line on stderr, exit code 2), and formats numbers with :func:`num` so the
terminal output of ``summary``, ``compare`` and ``gate`` reads alike.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from collections.abc import Sequence
from typing import Any

import numpy as np

from .aggregate import AGAINST, METRICS, PHASES
from .logread import LogError
from .runread import RunData, read_run

__all__ = [
    "EXIT_FAIL",
    "EXIT_OK",
    "EXIT_UNUSABLE",
    "add_view_options",
    "add_workers_option",
    "alert_line",
    "dump_json",
    "emit",
    "fail",
    "headline",
    "jsonable",
    "load",
    "num",
    "table",
]

EXIT_OK, EXIT_FAIL, EXIT_UNUSABLE = 0, 1, 2


def add_workers_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--workers", type=int, default=None, metavar="N",
        help="processes that read a large log (default: one per CPU, up to 8, for logs "
             "above 64 MiB; 1 reads in this process)")


def add_view_options(parser: argparse.ArgumentParser, *, metric_default: str = "any") -> None:
    """``--phase``, ``--against`` and ``--metric``: which numbers of the log to rank."""
    parser.add_argument("--phase", choices=PHASES, default="train",
                        help="training-mode or eval-mode samples (default: train)")
    parser.add_argument("--against", choices=AGAINST, default="reference",
                        help="shift against the reference, against the previous sample, or "
                             "(with --phase val) against the latest training sample: the "
                             "train/eval mismatch (default: reference)")
    choices = (("any",) if metric_default == "any" else ()) + METRICS
    parser.add_argument("--metric", choices=choices, default=metric_default,
                        help=f"metric to rank by (default: {metric_default}"
                             + ("; 'any' takes the largest ratio to noise over all metrics"
                                if metric_default == "any" else "") + ")")


def load(path: str, args: argparse.Namespace) -> RunData:
    """Read a run for a command; raises LogError (exit 2) for unusable input."""
    workers = getattr(args, "workers", None)
    if workers is not None and workers < 1:
        raise LogError(f"'--workers' must be at least 1 (got {workers})")
    if getattr(args, "against", None) == "train" and getattr(args, "phase", None) != "val":
        raise LogError("'--against train' compares eval-mode samples with the latest "
                       "training sample; add '--phase val'")
    return read_run(path, workers=workers)


def emit(text: str) -> None:
    """Print to stdout; a closed pipe (``| head``) ends the output quietly."""
    try:
        print(text, flush=True)
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # so the interpreter's final flush is quiet


def fail(command: str, message: str) -> int:
    """Print one error line for ``command`` on stderr; return exit code 2."""
    print(f"shiftwatch {command}: error: {message}", file=sys.stderr)
    return EXIT_UNUSABLE


def num(x: Any, digits: int = 3) -> str:
    """A number for a table: ``digits`` significant digits, '-' for missing or non-finite."""
    if x is None:
        return "-"
    x = float(x)
    if not math.isfinite(x):
        return "-"
    if x != 0 and (abs(x) >= 10 ** (digits + 2) or abs(x) < 10 ** -(digits + 1)):
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}g}"


def jsonable(x: Any) -> Any:
    """Replace NaN/inf by None and numpy scalars by Python numbers, recursively."""
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [jsonable(v) for v in x]
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def dump_json(obj: Any) -> str:
    return json.dumps(jsonable(obj), indent=2, allow_nan=False)


def table(headers: Sequence[str], rows: Sequence[Sequence[str]], *,
          right: Sequence[bool] | None = None) -> str:
    """A plain-text table; columns aligned, numeric columns (``right``) right-aligned."""
    right = list(right) if right is not None else [False] * len(headers)
    widths = [len(h) for h in headers]
    for row in rows:
        widths = [max(w, len(c)) for w, c in zip(widths, row, strict=True)]

    def fmt(row: Sequence[str]) -> str:
        cells = [c.rjust(w) if r else c.ljust(w)
                 for c, w, r in zip(row, widths, right, strict=True)]
        return "  ".join(cells).rstrip()

    return "\n".join([fmt(headers), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows])


def headline(run: RunData, *, phase: str, against: str, metric: str) -> dict[str, np.ndarray]:
    """Per-layer peak shift for ranking: ratio to noise, metric index, raw value, step.

    With ``metric == "any"`` the peak is the largest ratio over all metrics (the metric is
    reported alongside); otherwise that metric's peak.  Arrays have one entry per layer;
    ``ratio`` is NaN for layers without samples.
    """
    t = run.table(phase, against)
    L = len(run.layers)
    if t is None:
        nan = np.full(L, np.nan)
        return {"ratio": nan, "metric": np.zeros(L, int), "value": nan, "noise": nan,
                "step": np.full(L, -1), "samples": np.zeros(L, int),
                "median_ratio": nan}
    pr = t["peak_ratio"]
    if metric == "any":
        filled = np.where(np.isnan(pr), -np.inf, pr)
        mi = np.argmax(filled, axis=1)
    else:
        mi = np.full(L, METRICS.index(metric))
    rows = np.arange(L)
    out = {k: t[src][rows, mi] for k, src in (("ratio", "peak_ratio"), ("value", "peak_value"),
                                               ("noise", "peak_noise"), ("step", "peak_step"),
                                               ("median_ratio", "median_ratio"))}
    out["metric"] = mi
    out["samples"] = t["samples"].max(axis=1) if metric == "any" else t["samples"][rows, mi]
    return out


def alert_line(a: dict[str, Any]) -> str:
    """One alert as a line: step, phase, layer, rule, severity, metric, value vs threshold."""
    units = " x noise" if a.get("units") == "noise" else ""
    against = f" vs {a['against']}" if a.get("against") else ""
    op = "<=" if a.get("metric") == "collapse" else ">="
    layer = a.get("layer") if a.get("layer") is not None else "(run)"
    if a.get("channel") is not None:
        layer += f" (channel {a['channel']})"
    return (f"step {a.get('step')} [{a.get('phase') or '-'}] {layer}: {a.get('rule')} "
            f"({a.get('severity')}) {a.get('metric')}{against} = {num(a.get('value'))}{units} "
            f"{op} threshold {num(a.get('threshold'))}")
