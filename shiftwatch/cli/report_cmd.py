"""``shiftwatch report LOGDIR -o report.html``: one self-contained HTML file.

Contents: the run's state and first alert, a heatmap of layers x steps coloured by shift /
noise, a ranked layer table, curves of the top layers with rule thresholds and alert
markers, the alert table and the run's settings and rules.  Plots are drawn with
matplotlib (``pip install 'shiftwatch[plot]'``) and embedded as base64 PNG (or SVG with
``--format svg``); the page loads nothing from the network.

Scale: every record is folded into a grid of at most ``--bins`` step bins (default 480)
holding the maximum per bin, so a run of 200 layers x 10,000 samples gives a 200 x 480
heatmap; curves are drawn for the ``--curves`` layers (default 12) that alerted first or
peaked highest, plus any named with ``--layer``.  The only file written is ``-o``.
"""

from __future__ import annotations

import argparse
import fnmatch
import json
import os
import tempfile
import time
from pathlib import Path
from typing import Any

from .aggregate import METRICS
from .common import EXIT_OK, add_view_options, add_workers_option, alert_line, fail, num
from .logread import LogError, find_log
from .plots import PlotUnavailable, compare_figure, heatmap, layer_curves
from .render import Html, esc, image, page, section, table
from .runread import DEFAULT_BINS, RunData, read_run
from .summary_cmd import build_summary

__all__ = ["build_report", "register", "write_compare_html", "write_output"]


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "report", help="write a self-contained HTML report with plots",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    p.add_argument("logdir", metavar="LOGDIR", help="run directory (log_dir) or events.jsonl")
    p.add_argument("-o", "--output", required=True, metavar="FILE.html",
                   help="where to write the report (nothing else is written)")
    p.add_argument("--format", choices=("png", "svg"), default="png",
                   help="image format embedded in the page (default png)")
    p.add_argument("--curves", type=int, default=12, metavar="K",
                   help="layers with curves: those that alerted first, then the highest "
                        "peaks (default 12)")
    p.add_argument("--layer", action="append", default=[], metavar="GLOB",
                   help="also draw curves for layers matching GLOB (repeatable)")
    p.add_argument("--bins", type=int, default=DEFAULT_BINS, metavar="N",
                   help=f"step bins of the heatmap and curves (default {DEFAULT_BINS})")
    p.add_argument("--title", default=None, help="page title (default: the run directory)")
    add_view_options(p)
    add_workers_option(p)
    p.set_defaults(func=run)


def _pick_layers(run: RunData, ranked: list[dict[str, Any]], k: int,
                 globs: list[str]) -> list[int]:
    lidx = {n: i for i, n in enumerate(run.layers)}
    alerted = sorted((a["step"], lidx[name]) for name, a in run.acc.alerts.first_by_layer.items()
                     if name in lidx)
    chosen: list[int] = []
    for _step, li in alerted:
        if len(chosen) < k and li not in chosen:
            chosen.append(li)
    for lay in ranked:
        if len(chosen) >= k:
            break
        li = lidx[lay["name"]]
        if lay["peak"] is not None and li not in chosen:
            chosen.append(li)
    for g in globs:
        chosen += [i for i, n in enumerate(run.layers) if fnmatch.fnmatchcase(n, g)
                   and i not in chosen]
    return chosen


def _kv(pairs: list[tuple[str, Any]]) -> Html:
    rows = "".join(f"<tr><td>{esc(k)}</td><td>{esc(v)}</td></tr>" for k, v in pairs)
    return Html(f'<table class="kv"><tbody>{rows}</tbody></table>')


def _value(v: Any) -> str:
    return v if isinstance(v, str) else json.dumps(v, ensure_ascii=False, default=str)


_READING = (
    "How to read: 'shift / noise' is a metric's value divided by its noise floor, the value "
    "expected from sampling alone at that step's sample sizes; about 1 means noise level "
    "(the median under no shift is a little below 1). It is not a p-value, and large "
    "values against a frozen reference are expected for deeper layers of a network that is "
    "learning: judge abrupt changes (against the previous sample) and data-facing layers "
    "first. Heatmap columns and curve points are the maximum over a bin of steps, so they "
    "show the worst moment in each bin, not a typical one; medians in the layer table come "
    "from log-spaced histograms and are accurate to a few percent.")


def build_report(run: RunData, *, phase: str = "train", against: str = "reference",
                 metric: str = "any", curves: int = 12, layer_globs: list[str] | None = None,
                 fmt: str = "png", title: str | None = None) -> str:
    """The report page as a string. Raises PlotUnavailable without matplotlib."""
    s = build_summary(run, phase=phase, against=against, metric=metric)
    title = title or f"shiftwatch report: {run.path.parent.name or run.path.name}"
    state = "complete" if run.complete else "no end record: still running, or killed"
    body: list[Html] = []
    steps = "; ".join(f"{ph}: steps {v['first']}..{v['last']}, {v['samples']} samples"
                      for ph, v in s["steps"].items()) or "no step records yet"
    ref = s["reference"]
    sev = ", ".join(f"{n} {k}" for k, n in sorted(s["alerts"]["by_severity"].items()))
    overview = [("log", str(run.path)), ("state", state),
                ("written by", f"shiftwatch {run.header.get('shiftwatch', '?')}"),
                ("layers", len(run.layers)), ("steps covered", steps),
                ("reference", f"ready at step {ref['step']} ({ref['source']})" if ref
                 else "not ready"),
                ("alerts", sev or "none"),
                ("first alert", alert_line(s["alerts"]["first"]) if s["alerts"]["first"]
                 else "none")]
    if run.acc.end:
        e = run.acc.end
        overview.append(("end", f"{'stopped' if e.get('stopped') else 'ended'} at step "
                                f"{e.get('step')}: {e.get('reason')}"))
    body.append(section("Run", _kv(overview), sid="run"))
    if run.notes:
        body.append(section("Notes", *[Html(f'<div class="note">{esc(n)}</div>')
                                       for n in run.notes]))
    hm_parts: list[Any] = []
    for ph in (phase, *[p for p in run.acc.phases if p != phase]):
        fig = heatmap(run, phase=ph, against=against, metric=metric, fmt=fmt)
        if fig is not None:
            hm_parts.append(image(*fig, alt=f"heatmap of shift / noise, {ph} phase"))
    body.append(section("Shift / noise, layers x steps", *(hm_parts or [
        "No step records yet."]), Html(f"<p>{esc(_READING)}</p>"), sid="heatmap"))
    rows = []
    for rank, lay in enumerate(s["layers"], 1):
        p, fa = lay["peak"], lay["first_alert"]
        rows.append([rank, lay["name"], lay["type"] or "-", num(p["ratio"]) if p else "-",
                     p["metric"] if p else "-", num(p["value"]) if p else "-",
                     p["step"] if p else "-",
                     num(lay["metrics"].get(against, {}).get(p["metric"], {})
                         .get("median_ratio")) if p else "-",
                     f"step {fa['step']}: {fa['rule']} ({fa['severity']})" if fa else "-",
                     lay["alerts"]["warn"], lay["alerts"]["fail"]])
    which = "largest over metrics" if metric == "any" else metric
    body.append(section(
        f"Layers by peak shift vs {against} ({phase}; {which})",
        Html('<div class="scroll">' + table(
            ["#", "layer", "type", "peak x noise", "metric", "raw value", "at step",
             "median x noise", "first alert", "warn", "fail"], rows, table_id="layers",
            numeric=(0, 3, 5, 6, 7, 9, 10), filter_label="filter layers:") + "</div>"),
        sid="layers"))
    chosen = _pick_layers(run, s["layers"], curves, layer_globs or [])
    figs = [image(*layer_curves(run, li, phase=phase, fmt=fmt),
                  alt=f"curves of layer {run.layers[li]}") for li in chosen]
    body.append(section(
        f"Curves of {len(chosen)} layers (first to alert, then highest peaks)",
        Html('<div class="curves">' + "".join(figs) + "</div>") if figs else "No layer to show.",
        sid="curves"))
    alerts = run.acc.alerts
    arows = [[a["step"], a.get("phase") or "-", a.get("layer") or "(run)", a.get("rule"),
              a.get("severity"), a.get("metric"), a.get("against") or "-",
              a.get("view") or "-", num(a.get("value")), num(a.get("threshold")),
              a.get("units") or "-", num(a.get("raw")), num(a.get("noise")),
              a.get("action") or "-", a.get("message") or ""] for a in alerts.kept]
    more = (f"Showing the first {len(alerts.kept)} of {alerts.total} alerts."
            if alerts.total > len(alerts.kept) else f"{alerts.total} alerts.")
    body.append(section("Alerts", more, Html('<div class="scroll">' + table(
        ["step", "phase", "layer", "rule", "severity", "metric", "against", "view", "value",
         "threshold", "units", "raw", "noise", "action", "message"], arows,
        table_id="alerts", numeric=(0, 8, 9, 11, 12), filter_label="filter alerts:")
        + "</div>") if arows else "No alerts.", sid="alerts"))
    settings = [(k, _value(v)) for k, v in sorted(run.settings.items())]
    rule_keys = ["name", "metric", "against", "view", "threshold", "units", "layers",
                 "patience", "cooldown", "severity", "phase"]
    rule_keys += sorted({k for r in run.rules for k in r if k not in rule_keys})
    rrows = [[_value(r.get(k)) if k != "name" else r.get(k) for k in rule_keys]
             for r in run.rules]
    lrows = [[e.get("name"), e.get("type"), _value(e.get("channels"))]
             for e in run.header.get("layers") or [] if isinstance(e, dict)]
    body.append(section(
        "Run settings", _kv(settings) if settings else "No settings recorded.",
        Html("<h3>Rules</h3>") , table(rule_keys, rrows) if rrows else "No rules recorded.",
        Html("<h3>Watched layers</h3>"),
        Html('<div class="scroll">' + table(["name", "type", "channels"], lrows) + "</div>"),
        Html("<h3>Reference</h3>"),
        _kv([(k, _value(v)) for k, v in (ref or {}).items()]) if ref else "Not ready.",
        sid="settings"))
    subtitle = (f"{run.path} | {state} | generated {time.strftime('%Y-%m-%d %H:%M:%S')} | "
                f"step bins of {run.grid.width} steps")
    return page(title, subtitle, body)


def check_output(output: str | os.PathLike[str], *, protect: tuple[Path, ...] = ()) -> Path:
    """Refuse an ``-o`` that is a directory, the log being read, or a file that is not HTML.

    Raises OSError with the message for the user; called before any work is done.
    """
    out = Path(output)
    if out.is_dir():
        raise OSError(f"'-o' must be a file path (got the directory {str(out)!r}): add a "
                      "file name such as report.html")
    if any(out.resolve() == p.resolve() for p in protect):
        raise OSError(f"'-o' points at the event log being read ({str(out)!r}): choose another "
                      "file name")
    if out.exists():
        with open(out, "rb") as f:
            head = f.read(64)
        if not head.lstrip().lower().startswith(b"<!doctype html"):
            raise OSError(f"'-o' points at an existing file that is not an HTML page "
                          f"({str(out)!r}): choose another name or remove that file")
    if not out.parent.exists():
        raise OSError(f"the folder of '-o' does not exist ({str(out.parent)!r}): create it "
                      "first")
    return out


def write_output(text: str, output: str | os.PathLike[str], *,
                 protect: tuple[Path, ...] = ()) -> Path:
    """Write ``text`` to ``output`` atomically (after :func:`check_output`)."""
    out = check_output(output, protect=protect)
    if out.exists():
        mode = out.stat().st_mode & 0o777
    else:
        umask = os.umask(0)
        os.umask(umask)
        mode = 0o666 & ~umask
    fd, tmp = tempfile.mkstemp(prefix=".shiftwatch-", suffix=".html", dir=out.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.chmod(tmp, mode)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return out


def write_compare_html(c: dict[str, Any], output: str, *, fmt: str = "png") -> Path:
    """The comparison as a self-contained page: both runs, the plot, the verdict table."""
    v = c["view"]
    fig = compare_figure(c, fmt=fmt)
    rows = []
    for r in c["layers"]:
        cells = [r["layer"]]
        for side in ("A", "B"):
            d = r[side] or {}
            cells += [num(d.get("typical")), num(d.get("typical_ratio")), num(d.get("peak")),
                      num(d.get("peak_value_ratio"))]
        rows.append(cells + [r["verdict"]])
    t = c["tally"]
    body = [
        section("Runs", _kv([("A", c["A"]["log"]), ("B", c["B"]["log"]),
                             ("metric", f"{v['metric']} vs {v['against']}, {v['phase']} phase"),
                             ("criterion", f"|A - B| > {v['margin']:g} x sqrt(noise_A^2 + "
                                           f"noise_B^2), {v['min_samples']}+ samples each"),
                             ("tally", f"A steadier on {t['A']}, B on {t['B']}, mixed "
                                       f"{t['mixed']}, no clear difference {t['none']}")])),
        section("Per layer", image(*fig, alt="typical and peak values of runs A and B"),
                table(["layer", "A typical", "A typical x noise", "A peak", "A peak x noise",
                       "B typical", "B typical x noise", "B peak", "B peak x noise",
                       "verdict"], rows, table_id="cmp", numeric=tuple(range(1, 9)),
                      filter_label="filter layers:")),
    ]
    return write_output(page("shiftwatch comparison", f"A = {c['A']['log']} | B = "
                             f"{c['B']['log']}", body), output)


def run(args: argparse.Namespace) -> int:
    if args.curves < 0:
        return fail("report", f"'--curves' must be 0 or more (got {args.curves})")
    if args.bins < 1:
        return fail("report", f"'--bins' must be at least 1 (got {args.bins})")
    if args.metric != "any" and args.metric not in METRICS:
        return fail("report", f"'--metric' must be 'any' or one of {', '.join(METRICS)}")
    try:
        check_output(args.output, protect=(find_log(args.logdir),))
        data = read_run(args.logdir, bins=args.bins, workers=args.workers)
    except (LogError, OSError) as exc:
        return fail("report", str(exc))
    try:
        text = build_report(data, phase=args.phase, against=args.against, metric=args.metric,
                            curves=args.curves, layer_globs=args.layer, fmt=args.format,
                            title=args.title)
        out = write_output(text, args.output, protect=(data.path,))
    except PlotUnavailable as exc:
        return fail("report", str(exc))
    except OSError as exc:
        return fail("report", str(exc))
    print(f"wrote {out} ({len(text) / 1e6:.1f} MB)")
    return EXIT_OK
