"""How long ``summary`` and ``report`` take on a large run, and how much memory they need.

Generates (once; reused while the parameters match) a synthetic event log of 200 layers x
10,000 sampled train steps, plus a val sample every 20 steps, with the writer the tests use
(tests/eventlog_factory.py, schema 1: every metric against the previous sample and the
reference, channel views, alerts from induced shifts).  Then runs, each in a fresh
process, side by side in one run:

* ``shiftwatch summary --json`` with the default reader (parallel for large logs) and with
  ``--workers 1``;
* the reader with the standard-library JSON decoder (what happens without orjson);
* ``shiftwatch report -o``, and the same split into reading and drawing.

Prints wall time, CPU time (with worker processes) and the peak resident memory of the
largest process (``ru_maxrss`` from ``wait4``), the 1-minute load average before each
command, the ratios between configurations and the ratio of the report's wall time to the
issue's 30 s target.
Figures depend on the machine and its load; compare ratios measured in one run.

    python benchmarks/report_scale.py [--layers 200] [--steps 10000] [--dir DIR] [--repeat N]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
#: Issue 6: the report of 200 layers x 10,000 samples is readable in under 30 seconds.
TARGET_S = 30.0
sys.path.insert(0, str(ROOT / "tests"))


def generate(run_dir: Path, layers: int, steps: int) -> Path:
    from eventlog_factory import Scenario, write_log

    names = [(f"blocks.{i // 4}.{'conv' if i % 4 else 'norm'}{i % 4}",
              "Conv2d" if i % 4 else "BatchNorm2d", 64) for i in range(layers)]
    names[0] = ("stem.conv", "Conv2d", 3)
    names[-1] = ("head.fc", "Linear", 512)
    shifts = {names[layers // 3][0]: (10 * steps // 2, 1.0),
              names[2 * layers // 3][0]: (10 * (3 * steps) // 4, 0.5)}
    t0 = time.perf_counter()
    truth = write_log(run_dir, Scenario(layers=names, samples=steps, val_every=20,
                                        shifts=shifts, seed=1))
    size = truth.path.stat().st_size
    print(f"generated {truth.path}: {size / 1e9:.2f} GB, {truth.train_records} train + "
          f"{truth.val_records} val records, {len(truth.alerts)} alerts, "
          f"in {time.perf_counter() - t0:.0f} s")
    return truth.path


def _popen_wait(argv: list[str]) -> tuple[float, float, float, str]:
    """Run one command: wall s, CPU s (user + system, with its worker processes) and peak
    RSS in MB of its largest process, from wait4 (so runs do not share the figures)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    chunks = []
    while True:  # drain stdout without reaping, so wait4 returns this child's usage
        block = proc.stdout.read(1 << 16)
        if not block:
            break
        chunks.append(block)
    err = proc.stderr.read().decode(errors="replace")
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    if proc.returncode:
        raise SystemExit(f"{argv[:4]} failed ({proc.returncode}): {err.strip()[-2000:]}")
    cpu = usage.ru_utime + usage.ru_stime
    return wall, cpu, usage.ru_maxrss / 1024.0, b"".join(chunks).decode()


def calibrate(log: Path) -> float:
    """Milliseconds to decode one step line with the standard library (median of 15): a
    fixed workload that shows how fast this machine is right now."""
    with open(log, "rb") as f:
        f.seek(log.stat().st_size // 2)
        f.readline()  # the rest of a line cut by the seek
        line = f.readline()
        while b'"kind":"step"' not in line[:80]:
            line = f.readline()
    times = []
    for _ in range(15):
        t0 = time.perf_counter()
        json.loads(line)
        times.append(time.perf_counter() - t0)
    return 1e3 * sorted(times)[len(times) // 2]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--layers", type=int, default=200)
    ap.add_argument("--steps", type=int, default=10_000)
    ap.add_argument("--dir", type=Path, default=Path("/tmp/shiftwatch-bench"))
    ap.add_argument("--repeat", type=int, default=1,
                    help="run each command this many times and keep the fastest (a shared "
                         "machine: other jobs only ever slow a run down)")
    args = ap.parse_args()
    run_dir = args.dir / f"run-{args.layers}x{args.steps}"
    stamp = run_dir / "params.json"
    params = {"layers": args.layers, "steps": args.steps, "factory": 2}
    log = run_dir / "events.jsonl"
    if not (stamp.exists() and json.loads(stamp.read_text()) == params and log.exists()):
        generate(run_dir, args.layers, args.steps)
        stamp.write_text(json.dumps(params))
    else:
        print(f"reusing {log} ({log.stat().st_size / 1e9:.2f} GB)")
    load0 = f"{os.getloadavg()[0]:.1f}"
    cal0 = calibrate(log)
    py = sys.executable
    out_html = args.dir / "report.html"
    split = ("import sys, time; from shiftwatch.cli.runread import read_run; "
             "from shiftwatch.cli.report_cmd import build_report, write_output; "
             "t = time.perf_counter(); r = read_run(sys.argv[1]); t1 = time.perf_counter(); "
             "h = build_report(r); t2 = time.perf_counter(); write_output(h, sys.argv[2]); "
             "print(f'{t1 - t:.2f} {t2 - t1:.2f}')")
    stdlib = ("import sys; from shiftwatch.cli.runread import read_run; "
              "read_run(sys.argv[1], workers=1, decoder_name='json')")
    runs = {
        "baseline: import shiftwatch.cli": [py, "-c", "import shiftwatch.cli"],
        "summary --json (default reader)": [py, "-m", "shiftwatch.cli", "summary", str(log),
                                            "--json"],
        "summary --json --workers 1": [py, "-m", "shiftwatch.cli", "summary", str(log),
                                       "--json", "--workers", "1"],
        "read only, stdlib json, 1 process": [py, "-c", stdlib, str(log)],
        "report -o (default reader)": [py, "-m", "shiftwatch.cli", "report", str(log),
                                       "-o", str(out_html)],
        "report, read + draw timed apart": [py, "-c", split, str(log), str(out_html)],
    }
    results = {}
    print(f"{'command':38s} {'wall s':>8s} {'CPU s':>8s} {'peak RSS MB':>12s} {'load':>5s}")
    for label, argv in runs.items():
        tries = []
        for _ in range(max(1, args.repeat)):
            load = os.getloadavg()[0]  # 1-minute load before the command (ours included)
            tries.append((*_popen_wait(argv), load))
        wall, cpu, rss, out, load = min(tries)
        results[label] = (wall, rss, out, cpu)
        print(f"{label:38s} {wall:8.1f} {cpu:8.1f} {rss:12.0f} {load:5.1f}", flush=True)
    read_s, draw_s = map(float, results["report, read + draw timed apart"][2].split())
    size_mb = log.stat().st_size / 1e6
    s = json.loads(results["summary --json (default reader)"][2])
    r1 = results["summary --json --workers 1"][0]
    print()
    print(f"log size {size_mb:.0f} MB; {s['steps']['train']['samples']} train samples; "
          f"report {out_html.stat().st_size / 1e6:.1f} MB")
    print(f"report split: reading {read_s:.1f} s, drawing and writing {draw_s:.1f} s")
    records = sum(v["samples"] for v in s["steps"].values())
    print(f"CPU per step record, summary --workers 1: "
          f"{1e3 * results['summary --json --workers 1'][3] / records:.2f} ms "
          f"({records} records, import included)")
    rep = results["report -o (default reader)"][0]
    print(f"target (issue 6): report readable in under {TARGET_S:.0f} s: measured {rep:.1f} s, "
          f"ratio {rep / TARGET_S:.2f} (below 1 meets it); summary "
          f"{results['summary --json (default reader)'][0] / TARGET_S:.2f}")
    print(f"ratio workers=1 / default reader: "
          f"{r1 / results['summary --json (default reader)'][0]:.2f}")
    print(f"ratio stdlib json / orjson (1 process, read only vs summary): "
          f"{results['read only, stdlib json, 1 process'][0] / r1:.2f}")
    base = results["baseline: import shiftwatch.cli"][1]
    print(f"memory above the import baseline ({base:.0f} MB, mostly torch): summary 1 process "
          f"+{results['summary --json --workers 1'][1] - base:.0f} MB, report "
          f"+{results['report -o (default reader)'][1] - base:.0f} MB, for a "
          f"{size_mb:.0f} MB log")
    print(f"calibration (stdlib json.loads of one step line from the middle of the log) "
          f"before/after: {cal0:.1f} / {calibrate(log):.1f} ms")
    print(f"CPUs available: {len(os.sched_getaffinity(0))}; load average before/after: "
          f"{load0} / {os.getloadavg()[0]:.1f} (other work on the machine slows wall times; "
          "CPU seconds are less affected)")


if __name__ == "__main__":
    main()
