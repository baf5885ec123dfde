"""``shiftwatch compare RUN_A RUN_B``: layer by layer, which run shifted less.

For each layer present in both runs, one metric (``--metric``, default ``mean_shift``)
against the reference (``--against``; ``previous`` for batch-to-batch change, ``train`` for
the train/eval mismatch of eval-mode samples, which implies ``--phase val``) in one phase
gives, per run:

* *typical*: the median of the metric's raw value over the run's samples, with the median
  ratio to noise beside it;
* *peak*: the largest raw value, with the noise floor at that step.

A verdict is given only where the difference exceeds noise, which takes two conditions:

1. ``|A - B| > margin * sqrt(noise_A**2 + noise_B**2)`` with ``margin = 2`` (``--margin``),
   the noise floors being the median noise (typical) or the noise at the peak step (peak).
   A noise floor is the value expected from sampling alone at *one* sampled step, so this
   asks for a difference that would stand out on a single step, not merely one detectable
   over many steps (common practice for a materiality margin, no source);
2. the larger of the two is itself a shift: its ratio to noise is above ``margin`` for the
   typical value (with no shift the median ratio is about 0.85) and above ``3 * margin``
   for the peak (the largest of thousands of noise-only samples reaches 4-5 noise floors).

So two runs that both sit at noise level never get a verdict, even when one has larger
batches and hence smaller raw values.  Layers with fewer than ``--min-samples`` samples in
either run get none either.

Typical and peak verdicts are combined: agreement (or one undecided) names that run;
disagreement reads "mixed".  The overall line counts layers; it is not weighted.

With ``--against train`` every value compares one eval-mode (val) sample with the latest
training sample of the same run (``vs_train`` in the event log): train/eval mismatch
(BatchNorm's running statistics against the batch's own, dropout...) *plus* the sampling
difference between the two batches and any weight change between the two forwards; the
noise floor covers only the sampling part.  "Steadier"
then means: its eval-mode inputs stayed closer to what training saw.
"""

from __future__ import annotations

import argparse
import math
from typing import Any

from .aggregate import METRICS
from .common import (
    EXIT_OK,
    EXIT_UNUSABLE,
    add_view_options,
    add_workers_option,
    dump_json,
    emit,
    fail,
    load,
    num,
    table,
)
from .logread import LogError, find_log
from .runread import RunData, finite

__all__ = ["compare_runs", "register", "render_text"]


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "compare", help="layer by layer, which of two runs shifted less",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("run_a", metavar="RUN_A", help="first run directory or events.jsonl")
    p.add_argument("run_b", metavar="RUN_B", help="second run directory or events.jsonl")
    p.add_argument("--json", action="store_true", help="print one JSON object instead")
    p.add_argument("-o", "--output", metavar="FILE.html",
                   help="also write a self-contained HTML comparison with a plot")
    p.add_argument("--margin", type=float, default=2.0,
                   help="multiple of the combined noise floor a difference must exceed "
                        "(default 2)")
    p.add_argument("--min-samples", type=int, default=5, metavar="N",
                   help="samples each run needs for a verdict on a layer (default 5)")
    add_view_options(p, metric_default="mean_shift")
    # --against train compares val samples with training ones: it implies --phase val
    p.set_defaults(phase=None)
    p._option_string_actions["--phase"].help = (
        "training-mode or eval-mode samples (default: train; val with --against train)")
    add_workers_option(p)
    p.set_defaults(func=run)


def _side(run: RunData, li: int, mi: int, t: dict[str, Any]) -> dict[str, Any]:
    return {"samples": int(t["samples"][li, mi]),
            "typical": finite(t["median_value"][li, mi]),
            "typical_noise": finite(t["median_noise"][li, mi]),
            "typical_ratio": finite(t["median_ratio"][li, mi]),
            "peak": finite(t["vpeak_value"][li, mi]),
            "peak_noise": finite(t["vpeak_noise"][li, mi]),
            "peak_step": int(t["vpeak_step"][li, mi]),
            "peak_value_ratio": _ratio(t["vpeak_value"][li, mi], t["vpeak_noise"][li, mi]),
            "peak_ratio": finite(t["peak_ratio"][li, mi])}


def _ratio(value: float, noise: float) -> float | None:
    return finite(value / noise) if noise and math.isfinite(noise) and noise > 0 else None


def _decide(a: float | None, na: float | None, ra: float | None, b: float | None,
            nb: float | None, rb: float | None, margin: float, floor: float) -> str | None:
    """'A' or 'B' (the smaller value) when the difference exceeds noise (module docstring).

    ``a``/``b`` raw values, ``na``/``nb`` their noise floors, ``ra``/``rb`` their ratios to
    noise; ``floor``: ratio the larger value must exceed to count as a shift at all.
    """
    if None in (a, na, b, nb):
        return None
    worse_ratio = ra if a > b else rb
    if worse_ratio is None or worse_ratio <= floor:
        return None
    if abs(a - b) > margin * math.hypot(na, nb):
        return "A" if a < b else "B"
    return None


def compare_runs(a: RunData, b: RunData, *, metric: str = "mean_shift",
                 against: str = "reference", phase: str = "train", margin: float = 2.0,
                 min_samples: int = 5) -> dict[str, Any]:
    """Layer-by-layer comparison (see the module docstring for the criterion).

    Raises:
        ValueError: ``against="train"`` with a phase other than ``"val"`` (only eval-mode
            samples are compared with the latest training sample).
    """
    if against == "train" and phase != "val":
        raise ValueError(f"'against' 'train' needs phase 'val' (got {phase!r}): only "
                         "eval-mode samples are compared with the latest training sample")
    mi = METRICS.index(metric)
    ta, tb = a.table(phase, against), b.table(phase, against)
    bi = {n: i for i, n in enumerate(b.layers)}
    rows = []
    tally = {"A": 0, "B": 0, "mixed": 0, "none": 0}
    for li, name in enumerate(a.layers):
        if name not in bi:
            continue
        sa = _side(a, li, mi, ta) if ta is not None else None
        sb = _side(b, bi[name], mi, tb) if tb is not None else None
        enough = bool(sa and sb and sa["samples"] >= min_samples
                      and sb["samples"] >= min_samples)
        typ = peak = None
        if enough:
            typ = _decide(sa["typical"], sa["typical_noise"], sa["typical_ratio"],
                          sb["typical"], sb["typical_noise"], sb["typical_ratio"],
                          margin, margin)
            peak = _decide(sa["peak"], sa["peak_noise"], sa["peak_value_ratio"], sb["peak"],
                           sb["peak_noise"], sb["peak_value_ratio"], margin, 3 * margin)
        if not enough:
            verdict, steadier = "too few samples", None
        elif typ and peak and typ != peak:
            verdict, steadier = f"mixed: {typ} typical, {peak} peak", "mixed"
        elif typ or peak:
            steadier = typ or peak
            verdict = f"{steadier} steadier"
        else:
            verdict, steadier = "no clear difference", None
        tally[steadier or "none"] += 1
        rows.append({"layer": name, "A": sa, "B": sb, "typical": typ, "peak": peak,
                     "steadier": steadier, "verdict": verdict})
    only_a = [n for n in a.layers if n not in bi]
    only_b = [n for n in b.layers if n not in set(a.layers)]
    overall = None
    if tally["A"] != tally["B"]:
        overall = "A" if tally["A"] > tally["B"] else "B"

    def info(run: RunData) -> dict[str, Any]:
        acc = run.phase(phase)
        return {"log": str(run.path), "complete": run.complete,
                "samples": acc.records if acc else 0,
                "first_step": acc.first_step if acc else None,
                "last_step": acc.last_step if acc else None,
                "alerts": dict(run.acc.alerts.by_severity), "notes": run.notes}

    return {"A": info(a), "B": info(b),
            "view": {"metric": metric, "against": against, "phase": phase,
                     "margin": margin, "min_samples": min_samples},
            "layers": rows, "only_in_A": only_a, "only_in_B": only_b,
            "tally": tally, "overall": overall}


def _cell(side: dict[str, Any] | None, key: str, ratio_key: str) -> str:
    if not side or side[key] is None:
        return "-"
    r = side[ratio_key]
    return f"{num(side[key])} ({num(r, 2)}x)" if r is not None else num(side[key])


def render_text(c: dict[str, Any]) -> str:
    """The terminal view of :func:`compare_runs`'s result."""
    v = c["view"]
    out = []
    for k in ("A", "B"):
        i = c[k]
        state = "" if i["complete"] else ", no end record"
        out.append(f"{k} = {i['log']} ({i['samples']} {v['phase']} samples, steps "
                   f"{i['first_step']}..{i['last_step']}{state})")
    out.append(f"metric {v['metric']} vs {v['against']}, {v['phase']} phase. typical = median "
               "raw value (median x noise), peak = largest raw value (x noise at that step).")
    if v["against"] == "train":
        out.append("vs train: each val sample against the run's latest training sample, i.e. "
                   "train/eval mismatch plus the sampling difference of the two batches (and "
                   "any weight change between them); the noise floor covers the sampling "
                   "part only.")
    out.append(f"a verdict needs |A - B| > {num(v['margin'])} x sqrt(noise_A^2 + noise_B^2), "
               f"the larger above {num(v['margin'])} x noise (typical) or "
               f"{num(3 * v['margin'])} x noise (peak), and {v['min_samples']}+ samples each.")
    rows = [[r["layer"], _cell(r["A"], "typical", "typical_ratio"),
             _cell(r["A"], "peak", "peak_value_ratio"), _cell(r["B"], "typical", "typical_ratio"),
             _cell(r["B"], "peak", "peak_value_ratio"), r["verdict"]] for r in c["layers"]]
    out.append("")
    out.append(table(["layer", "A typical", "A peak", "B typical", "B peak", "verdict"], rows,
                     right=[False, True, True, True, True, False]))
    t = c["tally"]
    out.append("")
    out.append(f"A steadier on {t['A']} layers, B on {t['B']}, mixed on {t['mixed']}, no clear "
               f"difference (or too few samples) on {t['none']}."
               + (f" Overall: {c['overall']} is steadier on more layers." if c["overall"]
                  else " Overall: no run is steadier on more layers."))
    for k in ("A", "B"):
        if c[f"only_in_{k}"]:
            names = c[f"only_in_{k}"]
            out.append(f"only in {k}: " + ", ".join(names[:10])
                       + (f" and {len(names) - 10} more" if len(names) > 10 else ""))
        for n in c[k]["notes"]:
            out.append(f"note ({k}): {n}")
    return "\n".join(out)


def run(args: argparse.Namespace) -> int:
    if args.phase is None:
        args.phase = "val" if args.against == "train" else "train"
    if not (args.margin > 0 and math.isfinite(args.margin)):
        return fail("compare", f"'--margin' must be a positive number (got {args.margin})")
    if args.min_samples < 1:
        return fail("compare", f"'--min-samples' must be at least 1 (got {args.min_samples})")
    try:
        if args.output:
            from .report_cmd import check_output

            check_output(args.output, protect=(find_log(args.run_a), find_log(args.run_b)))
        a = load(args.run_a, args)
        b = load(args.run_b, args)
    except (LogError, OSError) as exc:
        return fail("compare", str(exc))
    c = compare_runs(a, b, metric=args.metric, against=args.against, phase=args.phase,
                     margin=args.margin, min_samples=args.min_samples)
    if not c["layers"]:
        return fail("compare", "the two runs have no layer name in common: compare runs of "
                               "the same model")
    emit(dump_json(c) if args.json else render_text(c))
    if args.output:
        from .report_cmd import write_compare_html  # matplotlib only when asked for

        try:
            write_compare_html(c, args.output)
        except (ImportError, OSError) as exc:
            return fail("compare", str(exc))
        if not args.json:
            print(f"wrote {args.output}")
    return EXIT_OK if c["layers"] else EXIT_UNUSABLE
