"""Plain-text tables of a :class:`~shiftwatch.probe.result.ProbeResult`."""

from __future__ import annotations

from .result import LayerReport, ProbeResult

__all__ = ["render"]


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(len(header))]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    return [fmt.format(*header).rstrip()] + [fmt.format(*r).rstrip() for r in rows]


def _num(v: float | None, digits: int = 3) -> str:
    if v is None:
        return "-"
    if v != 0 and (abs(v) >= 1000 or abs(v) < 10 ** -digits):
        return f"{v:.1e}"
    return f"{v:.{digits}f}"


def _batch_section(result: ProbeResult, bn: list[LayerReport]) -> list[str]:
    sizes = sorted({b for lr in bn for b in (lr.batch_sizes or {})})
    header = ["layer", "type", "C"] + [f"b={b}" for b in sizes] + ["ok from b"]
    rows = []
    for lr in bn:
        cells = [lr.name, lr.type, str(lr.sample_shape[0])]
        for b in sizes:
            s = (lr.batch_sizes or {}).get(b)
            mark = "" if s is None or s.within_tolerance else "*"
            cells.append("-" if s is None else f"{_num(s.mean_error, 2)} | {_num(s.kl_p90)}{mark}")
        cells.append("none" if lr.smallest_batch_size is None else str(lr.smallest_batch_size))
        rows.append(cells)
    q = round(result.quantile * 100)
    out = [
        "Batch statistics (BatchNorm): mean error [channel std] | KL p"
        f"{q} [nats/channel]; * = above tolerance",
        *_table(header, rows),
    ]
    skipped = {b: why for lr in bn for b, why in lr.skipped_batch_sizes.items()}
    for b, why in sorted(skipped.items()):
        out.append(f"  b={b} not evaluated: {why}")
    return out


def _spread_rows(lr: LayerReport) -> list[list[str]]:
    items = ([lr.statistics] if lr.statistics else []) + list(lr.alternatives)
    rows = []
    for s in items:
        label = f"group({s.groups})" if s.norm == "group" else s.norm
        own = "(this layer)" if s is lr.statistics else ""
        rows.append([lr.name, f"{label} {own}".strip(), str(s.values_per_group),
                     _num(s.mean_spread), _num(s.log_var_spread)])
    return rows


def render(result: ProbeResult) -> str:
    """The probe's findings as text: a header, then one table per measurement."""
    lines = [
        f"shiftwatch probe: {len(result.layers)} normalization layers, {result.samples} samples "
        f"in {result.batches} batches, {result.draws} random sub-batches per batch size "
        f"(seed {result.seed})",
        f"tolerance: in {round(result.quantile * 100)}% of sub-batches the normalized output "
        f"is distorted by less than {result.tolerance:g} nats/channel (KL; common practice, "
        "no source; see README.md)",
    ]
    bn = [lr for lr in result.layers if lr.batch_sizes is not None]
    if bn:
        lines += ["", *_batch_section(result, bn)]
    spread = [row for lr in result.layers for row in _spread_rows(lr)]
    if spread:
        lines += [
            "",
            "Per-sample normalization (independent of batch size): spread across samples",
            *_table(["layer", "normalization", "values/group", "mean spread [std]",
                     "log-var spread"], spread),
        ]
    rs = [lr for lr in result.layers if lr.running_stats is not None]
    if rs:
        rows = []
        for lr in rs:
            r = lr.running_stats
            status = "STALE" if r.stale else "ok"
            if lr.recalibration is not None and lr.recalibration.get("after") is not None:
                after = lr.recalibration["after"]
                status += f" -> recalibrated: KL {_num(after.kl)}"
            rows.append([lr.name, _num(r.smd_max_abs), _num(r.smd_noise), _num(r.kl),
                         f"{_num(r.kl_max)} (ch {r.worst_channel})", status])
        lines += [
            "",
            "Running statistics vs the given data (eval mode)",
            *_table(["layer", "max|SMD|", "SMD noise", "KL [nats/ch]", "KL worst", "status"],
                    rows),
        ]
    if result.recalibrated_in_place is not None:
        where = "in place" if result.recalibrated_in_place else "on a copy"
        lines.append(f"  recalibrated {where}; 'after' is measured on the same batches, so it "
                     "is ~0 by construction: check on held-out data")
    notes = [f"  {n}" for n in result.notes]
    notes += [f"  {lr.name}: {n}" for lr in result.layers for n in lr.notes]
    if notes:
        lines += ["", "Notes", *notes]
    if bn:
        rec = result.recommended_batch_size
        lines += [
            "",
            "Smallest evaluated batch size with every BatchNorm layer within tolerance: "
            + ("none" if rec is None else str(rec))
            + " (a statistics-side indicator, not a guarantee of accuracy)",
        ]
    return "\n".join(lines)
