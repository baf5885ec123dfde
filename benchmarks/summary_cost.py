"""Cost of one layer summary, measured side by side with two baselines in one run.

    .venv/bin/python benchmarks/summary_cost.py [--threads 2] [--repeats 40]

Input: float32 tensor (64, 32, 32, 32) (2M values), 64-bin histogram.
Baselines: (a) one ``x.sum()`` pass; (b) hand-written ``torch.var_mean(x, dim=(0, 2, 3))``
+ ``torch.histc(x, 64)``.  Target (issue 2): summarize >= 5x faster than (b) on 2 threads.
The histogram of ``summarize`` uses a strided subsample of at most ``max_hist_values``
values (default 65536 = 1/32 of this input); the accuracy cost is printed too (total
variation distance between the subsampled and the full histogram).  Timings interleave the
three candidates round-robin so machine noise hits them alike; medians are reported.
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch

from shiftwatch import make_edges, summarize


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=40)
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    x = torch.randn(64, 32, 32, 32, generator=torch.Generator().manual_seed(0))
    edges = make_edges(-4.0, 4.0, 64)

    cands = {
        "summarize": lambda: summarize(x, edges=edges),
        "(a) x.sum()": lambda: x.sum(),
        "(b) var_mean + histc": lambda: (torch.var_mean(x, dim=(0, 2, 3)), torch.histc(x, 64)),
        "summarize, no histogram": lambda: summarize(x),
        "summarize, full histogram": lambda: summarize(x, edges=edges, max_hist_values=None),
    }
    for f in cands.values():
        f()  # warm up (allocations, thread pool)
    # Two schedules, both side by side in one run: "interleaved" calls the candidates
    # round-robin (each call finds the caches dirtied by another candidate); "blocks" runs
    # 5 calls of one candidate, then the next (warm caches, as for back-to-back layers).
    for schedule, inner in (("interleaved", 1), ("blocks of 5", 5)):
        times: dict[str, list[float]] = {k: [] for k in cands}
        for _ in range(args.repeats):
            for name, f in cands.items():
                for _ in range(inner):
                    t0 = time.perf_counter()
                    f()
                    times[name].append(time.perf_counter() - t0)
        med = {k: statistics.median(v) * 1e3 for k, v in times.items()}
        print(f"input (64, 32, 32, 32) float32, {args.threads} threads, {schedule}, medians")
        for k, v in med.items():
            print(f"  {k:28s} {v:8.3f} ms")
        slower = med["summarize"] / med["(a) x.sum()"]
        print(f"  summarize / (a) sum pass      : {slower:6.1f}x slower")
        speedup = med["(b) var_mean + histc"] / med["summarize"]
        print(f"  (b) var_mean+histc / summarize: {speedup:6.1f}x  (target >= 5x)")
    sub = summarize(x, edges=edges).hist
    full = summarize(x, edges=edges, max_hist_values=None).hist
    tv = 0.5 * (sub / sub.sum() - full / full.sum()).abs().sum().item()
    print(
        f"histogram subsample: {int(sub.sum())} of {int(full.sum())} values, "
        f"total variation distance to the full histogram {tv:.4f}"
    )


if __name__ == "__main__":
    main()
