"""``shiftwatch gate LOGDIR --fail-on warn|fail``: an exit code for pipelines.

Exit 0 when the log holds no alert of the given severity or worse, 1 when it does (the
alerts are printed, the first ``--show`` of them), 2 when the input is unusable.  Severity
order: ``warn`` < ``fail``; a severity this reader does not know counts as ``warn``-level
(so ``--fail-on warn`` catches it and ``--fail-on fail`` does not).  When the log's ``end``
record counts more alerts than the log holds alert records, the larger count decides.
"""

from __future__ import annotations

import argparse
from typing import Any

from .common import (
    EXIT_FAIL,
    EXIT_OK,
    add_workers_option,
    alert_line,
    dump_json,
    emit,
    fail,
    load,
)
from .logread import LogError

__all__ = ["SEVERITY_RANK", "gate", "register"]

#: Rank of each severity; unknown severities rank as ``warn``.
SEVERITY_RANK = {"warn": 1, "fail": 2}


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "gate", help="exit 1 if the run alerted (for CI and job schedulers), 2 if unusable",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("logdir", metavar="LOGDIR", help="run directory (log_dir) or events.jsonl")
    p.add_argument("--fail-on", choices=tuple(SEVERITY_RANK), default="fail",
                   help="lowest severity that fails the gate (default: fail)")
    p.add_argument("--require-end", action="store_true",
                   help="treat a log without an end record (run still going or killed) as "
                        "unusable: exit 2")
    p.add_argument("--show", type=int, default=20, metavar="N",
                   help="alerts printed when the gate fails (default 20)")
    p.add_argument("--json", action="store_true", help="print the verdict as JSON")
    add_workers_option(p)
    p.set_defaults(func=run)


def gate(counts: dict[str, int], end_counts: Any, *, fail_on: str) -> tuple[bool, int]:
    """Pure decision: (passed, number of alerts at ``fail_on`` or worse).

    ``counts``: alert records by severity; ``end_counts``: the ``end`` record's ``alerts``
    object (or None); per severity the larger of the two counts is used.
    """
    floor = SEVERITY_RANK[fail_on]
    merged = dict(counts)
    if isinstance(end_counts, dict):
        for sev, n in end_counts.items():
            if isinstance(n, int) and not isinstance(n, bool):
                merged[sev] = max(merged.get(sev, 0), n)
    hits = sum(n for sev, n in merged.items() if SEVERITY_RANK.get(sev, 1) >= floor)
    return hits == 0, hits


def run(args: argparse.Namespace) -> int:
    if args.show < 0:
        return fail("gate", f"'--show' must be 0 or more (got {args.show})")
    try:
        data = load(args.logdir, args)
    except LogError as exc:
        return fail("gate", str(exc))
    if args.require_end and not data.complete:
        return fail("gate", f"{data.path} has no end record (run still going, or killed) and "
                            "--require-end was given: wait for the run, or drop --require-end")
    alerts = data.acc.alerts
    end_counts = (data.acc.end or {}).get("alerts")
    passed, hits = gate(alerts.by_severity, end_counts, fail_on=args.fail_on)
    floor = SEVERITY_RANK[args.fail_on]
    matching = [a for a in alerts.kept if SEVERITY_RANK.get(a["severity"], 1) >= floor]
    if args.json:
        emit(dump_json({"passed": passed, "fail_on": args.fail_on, "alerts": hits,
                         "by_severity": alerts.by_severity, "complete": data.complete,
                         "log": str(data.path), "shown": matching[: args.show],
                         "notes": data.notes}))
        return EXIT_OK if passed else EXIT_FAIL
    samples = ", ".join(f"{ph} {acc.records} samples (steps {acc.first_step}..{acc.last_step})"
                        for ph, acc in data.acc.phases.items()) or "no step records"
    state = "complete" if data.complete else "no end record"
    lines = []
    if passed:
        lines.append(f"gate passed: no alert of severity '{args.fail_on}' or worse in "
                     f"{data.path} ({samples}; {state})")
    else:
        lines.append(f"gate FAILED: {hits} alert(s) of severity '{args.fail_on}' or worse in "
                     f"{data.path} ({samples}; {state})")
        lines += ["  " + alert_line(a) for a in matching[: args.show]]
        if hits > min(len(matching), args.show):
            lines.append(f"  ... {hits - min(len(matching), args.show)} more")
    lines += [f"note: {note}" for note in data.notes]
    emit("\n".join(lines))
    return EXIT_OK if passed else EXIT_FAIL
