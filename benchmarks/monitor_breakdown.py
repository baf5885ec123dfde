"""Where a sampled step's overhead goes, measured inside the training step.

The same small CNN as ``monitor_overhead.py`` (batch 64, 3x32x32, 2 threads, 8 watched
layers, events.jsonl and TensorBoard on), sampled at every step.  The monitor's functions
are wrapped with ``time.perf_counter`` (each wrapper adds ~1 us), plain and monitored steps
alternate, and each part is printed in milliseconds per sampled step and as a share of
the plain step.  The hook parts (``table_parts``: the statistics' full-size passes;
``histogram``) run inside the forward pass; the others inside ``monitor.step()``.

Target 1 of the monitor issue (a sampled step at most 1.15x a plain one) is 15% of the
plain step for everything together; this shows which parts use it.

It also prints the fastest and the median time of ``monitor.step()`` (the host side),
which is steadier than the step times on a shared machine.  To compare with an older
commit, check it out beside this tree and alternate runs of both::

    git worktree add /tmp/old <commit>
    PYTHONPATH=/tmp/old .venv/bin/python benchmarks/monitor_breakdown.py   # the old code
    .venv/bin/python benchmarks/monitor_breakdown.py                       # this tree

Run: ``.venv/bin/python benchmarks/monitor_breakdown.py [--steps 80]``.
"""

from __future__ import annotations

import argparse
import collections
import copy
import functools
import statistics
import tempfile
import time
import warnings

import torch
from monitor_overhead import SmallCNN, Trainer

from shiftwatch import capture, monitor, outputs, summary

PARTS = (  # (owner, attribute, label)
    (summary, "table_parts", "hooks: full-size passes (table_parts)"),
    (summary, "histogram", "hooks: histogram"),
    (capture, "summarize_staged", "hooks: all of summarize_staged"),
    (monitor.ShiftMonitor, "step", "step(): all"),
    (monitor, "compare_all", "step(): compare_all"),
    (capture.Capture, "take", "step(): Capture.take (float64 tails)"),
    (outputs.TensorBoardOutput, "write", "step(): TensorBoard"),
    (monitor.ShiftMonitor, "_write", "step(): events.jsonl"),
    (monitor.ShiftMonitor, "judge", "step(): rules"),
    (monitor, "step_record", "step(): step record"),
)


def wrap(owner, name: str, label: str, acc: dict[str, float],
         calls: dict[str, list[float]]) -> None:
    f = getattr(owner, name)

    @functools.wraps(f)
    def timed(*a, **k):
        t0 = time.perf_counter()
        try:
            return f(*a, **k)
        finally:
            dt = time.perf_counter() - t0
            acc[label] += dt
            calls[label].append(dt)

    setattr(owner, name, timed)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=80, help="timed steps of each kind")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    warnings.simplefilter("ignore")
    acc: dict[str, float] = collections.defaultdict(float)
    calls: dict[str, list[float]] = collections.defaultdict(list)
    for owner, name, label in PARTS:
        wrap(owner, name, label, acc, calls)
    g = torch.Generator().manual_seed(0)
    x, y = torch.randn(64, 3, 32, 32, generator=g), torch.randint(0, 10, (64,), generator=g)
    base = SmallCNN()
    with tempfile.TemporaryDirectory() as root:
        mon = Trainer(copy.deepcopy(base), x, y)
        mon.monitor = monitor.ShiftMonitor(mon.model, root, every_n_steps=1)
        plain = Trainer(copy.deepcopy(base), x, y)
        for _ in range(8):
            mon.step()
            plain.step()
        acc.clear()
        calls.clear()
        t_plain = t_mon = 0.0
        for _ in range(args.steps):
            t0 = time.perf_counter()
            plain.step()
            t1 = time.perf_counter()
            mon.step()
            t_plain, t_mon = t_plain + t1 - t0, t_mon + time.perf_counter() - t1
        mon.monitor.close()
    n = args.steps
    p = t_plain / n
    print(f"plain step {p * 1e3:.2f} ms, sampled step {t_mon / n * 1e3:.2f} ms "
          f"({t_mon / t_plain:.3f}x; target 1: 1.15x)")
    for _, _, label in PARTS:
        ms = acc[label] / n
        print(f"  {label:42s} {ms * 1e3:7.3f} ms  {ms / p:6.1%} of a plain step")
    host = sorted(calls["step(): all"])
    print(f"monitor.step(): fastest {host[0] * 1e3:.2f} ms, median "
          f"{statistics.median(host) * 1e3:.2f} ms over {len(host)} sampled steps")


if __name__ == "__main__":
    main()
