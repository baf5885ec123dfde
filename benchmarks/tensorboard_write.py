"""Cost of writing one sampled step to TensorBoard, side by side in one run.

Compares, per sampled step of a monitor watching 10 layers (100 scalars, 10 histograms of
64 bins):

* ``TensorBoardSink.write_step`` with its own event file: one summary event;
* ``TensorBoardSink.write_step`` through a shared ``SummaryWriter`` (Lightning's case);
* 100 ``SummaryWriter.add_scalar`` calls (one event each);
* 100 ``add_scalar`` + 10 ``add_histogram_raw`` calls (the same content, one event each);

and one ``EventLog.write`` of a step record with and without ``fsync``.  Times are
medians in microseconds, split into the caller's time and the time torch's writer thread
needs afterwards.  Run: ``.venv/bin/python benchmarks/tensorboard_write.py``.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time

from torch.utils.tensorboard import SummaryWriter

from shiftwatch.sinks import EventLog, HistogramData, TensorBoardSink, histogram_tag, scalar_tag

METRICS = ("mean_shift", "log_std_ratio", "gauss_kl", "hist_kl", "psi")
AGAINST = ("previous", "reference")
LAYERS = tuple(f"block{i // 2}.{'conv' if i % 2 == 0 else 'bn'}" for i in range(10))
BINS = 64


def step_content(step: int) -> tuple[dict[str, float], dict[str, HistogramData]]:
    """100 scalars (10 layers x 5 metrics x 2 comparisons) and 10 histograms."""
    keys = [(layer, m, a) for layer in LAYERS for m in METRICS for a in AGAINST]
    scalars = {
        scalar_tag("train", a, m, layer): 0.01 * (step % 97) + i
        for i, (layer, m, a) in enumerate(keys)
    }
    edges = [-4 + 8 * k / BINS for k in range(BINS + 1)]
    counts = [0.0] + [float(100 + (k * 37 + step) % 50) for k in range(BINS)] + [3.0]
    hist = HistogramData(
        edges=edges,
        counts=counts,
        min=-4.5,
        max=4.4,
        num=sum(counts),
        sum=12.0,
        sum_squares=7000.0,
    )
    return scalars, {histogram_tag("train", layer): hist for layer in LAYERS}


def timed(call, drain, steps: int) -> tuple[float, float]:
    """Median microseconds of ``call(step)`` and of the ``drain()`` that follows it.

    ``drain`` waits until a background writer thread has written everything, so its time
    is the work that thread does per step (it runs Python, so it competes with training
    for the GIL).  Calls are made with an empty queue, as in a run where sampled steps
    are many training steps apart.
    """
    calls, drains = [], []
    for step in range(steps):
        t0 = time.perf_counter()
        call(step)
        t1 = time.perf_counter()
        drain()
        t2 = time.perf_counter()
        calls.append(t1 - t0)
        drains.append(t2 - t1)
    return statistics.median(calls) * 1e6, statistics.median(drains) * 1e6


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200, help="sampled steps per variant")
    args = parser.parse_args()
    content = [step_content(s) for s in range(args.steps)]
    results: dict[str, tuple[float, float]] = {}

    with tempfile.TemporaryDirectory() as tmp:
        sink = TensorBoardSink(f"{tmp}/own")
        results["TensorBoardSink.write_step, own event file"] = timed(
            lambda s: sink.write_step(s, "train", *content[s]), sink.flush, args.steps
        )
        sink.close()

        writer = SummaryWriter(f"{tmp}/shared")
        shared = TensorBoardSink(writer=writer)
        results["TensorBoardSink.write_step, shared SummaryWriter"] = timed(
            lambda s: shared.write_step(s, "train", *content[s]), writer.flush, args.steps
        )
        shared.close()
        writer.close()

        writer = SummaryWriter(f"{tmp}/scalars")

        def many_scalars(s: int) -> None:
            for tag, value in content[s][0].items():
                writer.add_scalar(tag, value, s)

        results["100 x add_scalar (scalars only)"] = timed(many_scalars, writer.flush, args.steps)
        writer.close()

        writer = SummaryWriter(f"{tmp}/all")

        def many_calls(s: int) -> None:
            scalars, hists = content[s]
            for tag, value in scalars.items():
                writer.add_scalar(tag, value, s)
            for tag, h in hists.items():
                limits, counts = h.buckets()
                writer.add_histogram_raw(
                    tag, h.min, h.max, h.num, h.sum, h.sum_squares, limits, counts, s
                )

        results["100 x add_scalar + 10 x add_histogram_raw"] = timed(
            many_calls, writer.flush, args.steps
        )
        writer.close()

        record = {
            "kind": "step",
            "step": 0,
            "phase": "train",
            "layers": {
                layer: {
                    "count": 65536,
                    "nonfinite": 0,
                    "mean": 0.1,
                    "std": 1.0,
                    "min": -4.0,
                    "max": 4.0,
                    "vs_previous": {
                        m: {"value": 0.1, "noise": 0.02, "ratio": 5.0} for m in METRICS
                    },
                    "vs_reference": {
                        m: {"value": 0.1, "noise": float("nan"), "ratio": None} for m in METRICS
                    },
                }
                for layer in LAYERS
            },
        }
        for fsync in (False, True):
            log = EventLog(f"{tmp}/events-{fsync}.jsonl", fsync=fsync)
            results[f"EventLog.write of a step record, fsync={fsync}"] = timed(
                lambda s, log=log: log.write({**record, "step": s}), lambda: None, args.steps
            )
            log.close()

    base = sum(results["TensorBoardSink.write_step, own event file"])
    print(f"per sampled step: 10 layers, 100 scalars, 10 histograms of {BINS} bins;")
    print(f"median microseconds over {args.steps} steps, one run")
    print(f"  {'variant':52s} {'call':>8s} {'writer':>8s} {'total':>8s} {'vs own':>7s}")
    for name, (call, drain) in results.items():
        total = call + drain
        ratio = f"{total / base:6.1f}x" if not name.startswith("EventLog") else ""
        print(f"  {name:52s} {call:8.1f} {drain:8.1f} {total:8.1f} {ratio:>7s}")
    print("call: time in the caller; writer: time torch's writer thread then needs to")
    print("write it (pure-Python checksum); fsync cost depends on the file system.")


if __name__ == "__main__":
    main()
