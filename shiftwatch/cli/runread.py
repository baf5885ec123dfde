"""Read one run's event log into a :class:`RunData` (streaming, optionally in parallel).

``read_run`` looks at the file size once and reads up to there (a run still writing keeps
appending; those lines are left for the next call).  It reads the head and the tail to
learn the step range, lays a step grid over it, and folds every record into fixed-size
accumulators (:mod:`shiftwatch.cli.aggregate`, :mod:`shiftwatch.cli.runacc`).  A log
larger than ``parallel_bytes`` is cut into byte ranges read by separate processes and
merged in file order; the result is identical to a single pass.
"""

from __future__ import annotations

import gc
import math
import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .aggregate import AGAINST, METRICS, Grid, PhaseAcc, quantile
from .logread import LogError, decoder, find_log, iter_records, line_number, read_header, step_range
from .runacc import RunAcc, wrap_error

__all__ = ["DEFAULT_BINS", "RunData", "read_run"]

#: Step bins of the grid (heatmap columns, curve points).
DEFAULT_BINS = 480
#: Logs larger than this are read by several processes when more than one CPU is available.
PARALLEL_BYTES = 64 << 20


@dataclass
class RunData:
    """What the commands need from one log; arrays are indexed like ``layers``."""

    path: Path
    size: int
    header: dict[str, Any]
    layers: list[str]
    layer_types: list[str | None]
    grid: Grid
    acc: RunAcc
    notes: list[str] = field(default_factory=list)
    _cache: dict[Any, Any] = field(default_factory=dict, repr=False)

    @property
    def complete(self) -> bool:
        """True when the log has an ``end`` record (the run closed normally)."""
        return self.acc.end is not None

    @property
    def settings(self) -> dict[str, Any]:
        return self.header.get("settings") or {}

    @property
    def rules(self) -> list[dict[str, Any]]:
        return [r for r in self.header.get("rules") or [] if isinstance(r, dict)]

    def phase(self, name: str) -> PhaseAcc | None:
        return self.acc.phases.get(name)

    def table(self, phase: str, against: str) -> dict[str, np.ndarray] | None:
        """Per-layer, per-metric statistics of one phase and comparison, shape (L, M).

        Keys: ``samples``, ``peak_ratio``/``peak_step``/``peak_value``/``peak_noise`` (the
        step with the largest ratio to noise), ``vpeak_value``/``vpeak_step``/``vpeak_noise``
        (the step with the largest raw value), ``median_ratio``, ``median_value``,
        ``median_noise`` (from log histograms, a few percent accurate), ``bin_ratio`` and
        ``bin_value`` of shape (bins, L, M): the maximum within each step bin.
        """
        key = ("table", phase, against)
        if key in self._cache:  # medians cost a pass over every histogram: compute once
            return self._cache[key]
        acc = self.phase(phase)
        if acc is None:
            return None
        ai = AGAINST.index(against)
        L, A, M = len(self.layers), len(AGAINST), len(METRICS)
        out: dict[str, np.ndarray] = {}
        for name in ("samples", "peak_ratio", "peak_step", "peak_value", "peak_noise",
                     "vpeak_value", "vpeak_step", "vpeak_noise"):
            out[name] = getattr(acc, name).reshape(L, A, M)[:, ai]
        qh = acc.qhist.reshape(L, A, M, 3, -1)[:, ai]
        for qi, name in enumerate(("value", "noise", "ratio")):
            out[f"median_{name}"] = quantile(qh[:, :, qi], 0.5)
        for name in ("bin_ratio", "bin_value"):
            out[name] = getattr(acc, name).reshape(-1, L, A, M)[:, :, ai]
        self._cache[key] = out
        return out

    def channel_table(self, phase: str, against: str) -> dict[str, np.ndarray] | None:
        """Per-layer channel-view peaks, shape (L, channel metrics); bins (bins, L, Mc)."""
        acc = self.phase(phase)
        if acc is None:
            return None
        ai = AGAINST.index(against)
        L = len(self.layers)
        out = {k: getattr(acc, k).reshape(L, len(AGAINST), -1)[:, ai]
               for k in ("ch_samples", "ch_peak_ratio", "ch_peak_step", "ch_peak_max",
                         "ch_peak_worst")}
        out["ch_bin_ratio"] = acc.ch_bin_ratio.reshape(-1, L, len(AGAINST), out[
            "ch_samples"].shape[1])[:, :, ai]
        return out


def _scan(path: str, start: int, stop: int, layers: list[str], grid: Grid,
          decoder_name: str | None, is_last: bool, keep_alerts: int,
          acc: RunAcc | None = None) -> RunAcc:
    """Fold the records starting in ``[start, stop)`` into ``acc`` (default: a fresh one).

    Folding into an existing ``acc`` continues it: the range must follow the one it holds.
    """
    p = Path(path)
    acc = acc if acc is not None else RunAcc(layers, grid, keep_alerts=keep_alerts)
    decode = decoder(decoder_name)
    # Decoded records are trees freed by reference counting; with ~15,000 objects per step
    # record the cyclic collector would run constantly for nothing (about 40% of the time
    # measured on a 200-layer log), so it is paused while scanning and restored afterwards.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        for rec in iter_records(p, start, stop, decode=decode, notes=acc.notes,
                                is_last=is_last):
            try:
                acc.add(rec.data, rec.offset)
            except ValueError as exc:
                raise wrap_error(exc, f"{p}: line {line_number(p, rec.offset)}") from None
    finally:
        if was_enabled:
            gc.enable()
    return acc


# Work sharing between reading processes.  The body of the log is cut into regions, one per
# pair of processes: one reads its region front to back, the other back to front, each
# claiming the next chunk from its end under a lock, until they meet.  A process that starts
# late (a spawned worker imports the package first) or is slowed by other work on the machine
# simply reads less; each process still covers one contiguous byte range, so the parts merge
# in file order exactly as fixed halves would.
_BOUNDS: Any = None  # the shared region bounds [lo0, hi0, lo1, hi1, ...] in this process
#: Smallest chunk claimed at a time (bytes); a claim takes 1/6 of what is left of the region.
MIN_CHUNK = 16 << 20


def _share(bounds: Any) -> None:
    """Pool initializer: keep the shared region bounds in the worker process."""
    global _BOUNDS
    _BOUNDS = bounds


def _claim(bounds: Any, region: int, forward: bool, min_chunk: int) -> tuple[int, int] | None:
    """Take the next chunk of ``region`` from its front (``forward``) or its back."""
    with bounds.get_lock():
        lo, hi = bounds[2 * region], bounds[2 * region + 1]
        if lo >= hi:
            return None
        size = max(min_chunk, (hi - lo) // 6)
        if forward:
            a, b = lo, min(hi, lo + size)
            bounds[2 * region] = b
        else:
            a, b = max(lo, hi - size), hi
            bounds[2 * region + 1] = a
    return a, b


def _scan_region(path: str, region: int, forward: bool, size: int, layers: list[str],
                 grid: Grid, decoder_name: str | None, keep_alerts: int,
                 min_chunk: int, bounds: Any = None) -> tuple[int, RunAcc] | None:
    """Read chunks of ``region`` until it is used up; return (first byte, accumulator).

    Forward chunks follow each other, so they fold into one accumulator.  Backward chunks
    come in reverse file order: each is read into a fresh accumulator that then takes in
    the later part read so far (merges keep file order).  None when no chunk was left.
    """
    bounds = bounds if bounds is not None else _BOUNDS
    acc: RunAcc | None = None
    first = -1
    while (chunk := _claim(bounds, region, forward, min_chunk)) is not None:
        a, b = chunk
        if forward:
            acc = _scan(path, a, b, layers, grid, decoder_name, b >= size, keep_alerts, acc)
            first = a if first < 0 else first
        else:
            part = _scan(path, a, b, layers, grid, decoder_name, b >= size, keep_alerts)
            if acc is not None:
                part.merge(acc)
            acc, first = part, a
    return None if acc is None else (first, acc)


def _layer_list(header: dict[str, Any], path: Path) -> tuple[list[str], list[str | None]]:
    names: list[str] = []
    types: list[str | None] = []
    for i, entry in enumerate(header.get("layers") or []):
        name = entry.get("name") if isinstance(entry, dict) else None
        if not isinstance(name, str):
            raise LogError(f"{path}: 'run.layers[{i}].name' must be a string (got {name!r}): "
                           "the log is corrupt")
        if name in names:
            continue
        names.append(name)
        t = entry.get("type")
        types.append(t if isinstance(t, str) else None)
    return names, types


def _auto_workers(size: int, parallel_bytes: int) -> int:
    if size < parallel_bytes:
        return 1
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return max(1, min(cpus or 1, 8, size // max(1, parallel_bytes // 2)))


def _read_shared(path: str, body: int, size: int, n: int, layers: list[str], grid: Grid,
                 decoder_name: str | None, keep_alerts: int) -> RunAcc:
    """Read ``[body, size)`` with ``n`` processes (this one and ``n - 1`` workers)."""
    regions = (n + 1) // 2  # pairs of processes; the last region has one when n is odd
    weights = [min(2, n - 2 * r) for r in range(regions)]
    cuts = [body + (size - body) * sum(weights[:r]) // n for r in range(regions)] + [size]
    ctx = multiprocessing.get_context("spawn")
    bounds = ctx.Array("q", [c for r in range(regions) for c in (cuts[r], cuts[r + 1])])
    min_chunk = max(1 << 16, min(MIN_CHUNK, (size - body) // (8 * n)))
    jobs = [(path, i // 2, i % 2 == 0, size, layers, grid, decoder_name, keep_alerts,
             min_chunk) for i in range(n)]
    with ProcessPoolExecutor(max_workers=n - 1, mp_context=ctx, initializer=_share,
                             initargs=(bounds,)) as pool:
        futures = [pool.submit(_scan_region, *job) for job in jobs[1:]]
        try:
            parts = [_scan_region(*jobs[0], bounds=bounds)] + [f.result() for f in futures]
        except BaseException:  # unusable input (or ^C): the workers stop at their next claim
            with bounds.get_lock():
                for r in range(regions):
                    bounds[2 * r + 1] = bounds[2 * r]
            raise
    done = sorted((p for p in parts if p is not None), key=lambda p: p[0])
    acc = done[0][1]
    for _first, part in done[1:]:
        acc.merge(part)
    return acc


def read_run(
    path: str | os.PathLike[str],
    *,
    bins: int = DEFAULT_BINS,
    workers: int | None = None,
    decoder_name: str | None = None,
    keep_alerts: int = 5000,
    parallel_bytes: int = PARALLEL_BYTES,
) -> RunData:
    """Read the log of the run at ``path`` (run directory or ``events.jsonl``).

    ``bins``: step bins of the grid (at most; each bin spans a multiple of the monitor's
    ``every_n_steps``).  ``workers``: processes for large logs (None: one per CPU, up to 8,
    for logs above ``parallel_bytes`` bytes).  ``keep_alerts``: alerts kept in full for
    tables (counts are always exact).  Raises :class:`LogError` for unusable input.
    """
    if not isinstance(bins, int) or bins < 1:
        raise ValueError(f"'bins' must be a positive integer (got {bins!r})")
    log = find_log(path)
    size = log.stat().st_size
    decode = decoder(decoder_name)
    header, body = read_header(log, decode=decode)
    layers, types = _layer_list(header, log)
    first, last = step_range(log, size, body, decode=decode)
    stride = (header.get("settings") or {}).get("every_n_steps", 1)
    stride = stride if isinstance(stride, int) and stride >= 1 else 1
    grid = Grid.spanning(first, last, bins=bins, stride=stride)
    n = workers if workers is not None else _auto_workers(size - body, parallel_bytes)
    n = max(1, min(int(n), max(1, (size - body) // 4096)))
    if n == 1:
        acc = _scan(str(log), body, size, layers, grid, decoder_name, True, keep_alerts)
    else:
        acc = _read_shared(str(log), body, size, n, layers, grid, decoder_name, keep_alerts)
    notes = list(acc.notes)
    if acc.unknown:
        shown = sorted(acc.unknown)
        notes.append("not understood by this reader and ignored: " + ", ".join(shown[:8])
                     + (f" and {len(shown) - 8} more" if len(shown) > 8 else ""))
    if acc.restarts:
        notes.append(f"the log holds {len(acc.restarts) + 1} 'run' records (a run resumed "
                     "into the same log_dir?); all records are read as one run")
    outside = sum(p.outside for p in acc.phases.values())
    if outside:
        notes.append(f"{outside} step records lie outside the step range seen at the head and "
                     "tail of the log (steps out of order?); they are placed in the edge bins")
    if acc.end is not None and isinstance(acc.end.get("alerts"), dict):
        for sev, n_end in acc.end["alerts"].items():
            got = acc.alerts.by_severity.get(sev, 0)
            if isinstance(n_end, int) and n_end != got:
                notes.append(f"the end record counts {n_end} {sev!r} alerts but the log holds "
                             f"{got} alert records of that severity")
    return RunData(log, size, header, layers, types, grid, acc, notes)


def finite(x: Any) -> float | None:
    """A JSON-safe float: None for NaN/inf/None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None
