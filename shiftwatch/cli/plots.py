"""Figures of the report, drawn with matplotlib (the optional extra ``plot``).

matplotlib is imported when a figure is first drawn, never at import time; figures use the
object API with the Agg canvas (no pyplot, no global backend switch, safe in any process).
Text from the log (layer and rule names) is drawn literally: ``$`` is escaped so
matplotlib's math-text never interprets a layer name.

Downsampling: every curve and heatmap column is one step bin of the run's grid
(:class:`~shiftwatch.cli.aggregate.Grid`) and shows the *maximum* within the bin (the
minimum for a layer's standard deviation), so a one-step spike stays visible however long
the run.
"""

from __future__ import annotations

import fnmatch
import io
import math
from typing import Any

import numpy as np

from .aggregate import AGAINST, CHANNEL_METRICS, METRICS
from .runread import RunData

__all__ = ["PlotUnavailable", "compare_figure", "heatmap", "layer_curves", "rules_for_layer"]

_SEVERITY_COLOUR = {"warn": "#c98a00", "fail": "#b8002e"}
_OTHER_COLOUR = "#6a3d9a"
_SERIES = ["#1f5f99", "#2a9d5c", "#8a5cc7", "#b35a1f", "#147f8a", "#9c2f74", "#5d6d1e"]
_RUN_COLOURS = {"A": "#1f5f99", "B": "#d2691e"}
_MAX_MARKERS = 3000


class PlotUnavailable(ImportError):
    """matplotlib is missing; the message names the pip extra."""


def _mpl() -> Any:
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.colors import LogNorm
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise PlotUnavailable(
            "the report draws its plots with matplotlib, which is not installed: "
            "pip install 'shiftwatch[plot]'") from exc
    return matplotlib, Figure, FigureCanvasAgg, LogNorm


def _save(fig: Any, fmt: str) -> tuple[bytes, str]:
    buf = io.BytesIO()
    _mpl()[2](fig)  # attach the Agg canvas
    fig.savefig(buf, format=fmt, dpi=fig.dpi, metadata={"Date": None} if fmt == "svg" else None)
    return buf.getvalue(), "image/svg+xml" if fmt == "svg" else "image/png"


def _rc() -> dict[str, Any]:
    return {"svg.fonttype": "none", "font.size": 8, "axes.titlesize": 9,
            "axes.spines.top": False, "axes.spines.right": False}


def _lit(text: Any) -> str:
    """User text for matplotlib: ``$`` escaped so it is never read as math."""
    return str(text).replace("$", r"\$")


def _short(name: str, n: int = 42) -> str:
    name = name if len(name) <= n else name[: n // 2 - 1] + "…" + name[-(n // 2 - 1):]
    return _lit(name)


#: Colour levels of the heatmap, in multiples of noise (common practice, no source: about
#: 1 is noise level, 3-5 is where rules usually start, 20+ is unmistakable).
LEVELS = (0.0, 1.0, 2.0, 3.0, 5.0, 10.0, 20.0, 50.0, 100.0, np.inf)


def _sev_colour(sev: Any) -> str:
    return _SEVERITY_COLOUR.get(sev, _OTHER_COLOUR)


def heatmap(run: RunData, *, phase: str, against: str, metric: str, fmt: str = "png",
            order: list[int] | None = None) -> tuple[bytes, str] | None:
    """Layers (rows, model order) x step bins, coloured by shift / noise (max per bin).

    ``metric == "any"`` colours by the largest ratio over all metrics.  Alerts of the phase
    are marked (triangle: fail, circle: warn).  None when the phase has no data.
    """
    t = run.table(phase, against)
    if t is None:
        return None
    mpl, Figure, _canvas, _ = _mpl()
    from matplotlib.colors import BoundaryNorm
    br = t["bin_ratio"]  # (bins, L, M)
    z = np.fmax.reduce(br, axis=2) if metric == "any" else br[:, :, METRICS.index(metric)]
    rows = order if order is not None else list(range(len(run.layers)))
    z = z[:, rows].T.astype(np.float64)  # (L, bins)
    L = len(rows)
    edges = run.grid.edges()
    with mpl.rc_context(_rc()):
        fig = Figure(figsize=(10, min(30.0, max(2.8, 1.4 + 0.12 * L))), dpi=100,
                     layout="constrained")
        ax = fig.add_subplot()
        levels = list(LEVELS[:-1]) + [1e12]
        cmap = mpl.colormaps["YlOrRd"].resampled(len(levels) - 1).with_extremes(bad="#e4e7ea")
        im = ax.imshow(np.ma.masked_invalid(z), aspect="auto", interpolation="nearest",
                       cmap=cmap, norm=BoundaryNorm(levels, len(levels) - 1),
                       extent=(edges[0], edges[-1], L, 0))
        pos = {li: k for k, li in enumerate(rows)}
        lidx = {n: i for i, n in enumerate(run.layers)}
        for sev, marker, colour in (("warn", "o", "#1a1a1a"), ("fail", "x", "#0a3cff")):
            pts = [(a["step"], pos[lidx[a["layer"]]] + 0.5) for a in run.acc.alerts.kept
                   if a["severity"] == sev and a.get("phase") in (phase, None)
                   and a.get("layer") in lidx][:_MAX_MARKERS]
            if pts:
                xs, ys = zip(*pts, strict=True)
                ax.scatter(xs, ys, marker=marker, s=20, linewidths=1.1, label=f"{sev} alert",
                           **({"facecolors": "none", "edgecolors": colour} if marker == "o"
                              else {"color": colour}))
        every = max(1, math.ceil(L / 90))
        ax.set_yticks([k + 0.5 for k in range(0, L, every)])
        ax.set_yticklabels([_short(run.layers[rows[k]]) for k in range(0, L, every)],
                           fontsize=6 if L > 40 else 8)
        ax.set_ylim(L, 0)
        ax.set_xlabel("step")
        which = "largest over metrics" if metric == "any" else metric
        ax.set_title(f"shift / noise vs {against} ({phase}; {which}); each column is the "
                     f"maximum over {run.grid.width} steps; grey: no data")
        cb = fig.colorbar(im, ax=ax, fraction=0.03, pad=0.01, ticks=levels[:-1])
        cb.ax.set_yticklabels([f"{v:g}" for v in levels[:-1]])
        cb.set_label("shift / noise (x noise floor)")
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="upper left", bbox_to_anchor=(0, -0.06 if L < 20 else -0.02),
                      ncol=2, frameon=False, fontsize=7)
        return _save(fig, fmt)


#: Pattern standing for the entry layers (those fed by the model input); the reference
#: record's ``entry`` lists them.
ENTRY = "<entry>"


def rules_for_layer(rules: list[dict[str, Any]], layer: str, phase: str,
                    entry: list[str] | None = None) -> list[dict[str, Any]]:
    """The rules of the run record that judge ``layer`` in ``phase``.

    A rule's ``layers`` is a list of glob patterns (or one pattern, or null for all
    layers), where ``"<entry>"`` matches the layers in ``entry``; its ``phase`` is
    ``"train"``, ``"val"``, or null/``"any"`` for both.
    """
    out = []
    for r in rules:
        if r.get("phase") not in (None, "any", "both", "all", phase):
            continue
        pats = r.get("layers")
        pats = [pats] if isinstance(pats, str) else (pats or ["*"])
        if any(isinstance(p, str) and (layer in (entry or []) if p == ENTRY
                                       else fnmatch.fnmatchcase(layer, p)) for p in pats):
            out.append(r)
    return out


def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def _raw_panels(run: RunData, li: int, phase: str, raw_rules: list[dict[str, Any]],
                alerts: list[dict[str, Any]]) -> list[tuple[Any, Any]]:
    """(metric, against) of the raw-unit panels worth drawing for one layer.

    Panels of the built-in rules are drawn only when there is something to see: a
    non-finite value, a standard deviation within 100x of the collapse threshold, or an
    alert of that rule; a user's raw-unit rule on a metric always gets its panel.
    """
    acc = run.phase(phase)
    fired = {a.get("metric") for a in alerts}
    keys: list[tuple[Any, Any]] = []
    for r in raw_rules:
        metric, key = r.get("metric"), (r.get("metric"), r.get("against"))
        if key in keys:
            continue
        if metric == "nonfinite":
            show = metric in fired or (acc is not None and acc.nonfinite_total[li] > 0)
        elif metric == "collapse":
            thr = _num(r.get("threshold"))
            low = acc.std_min[li] if acc is not None else np.nan
            show = metric in fired or (thr is not None and bool(low <= 100 * thr))
        else:
            show = metric in METRICS
        if show:
            keys.append(key)
    return keys


def layer_curves(run: RunData, li: int, *, phase: str, fmt: str = "png") -> tuple[bytes, str]:
    """Curves of one layer: ratio to noise per step bin, with rule thresholds and alerts.

    Top panel: the largest ratio over all metrics against the reference (grey) and each
    metric a noise-unit rule judges (with its threshold, dashed, coloured by severity).
    One panel below for each raw-unit rule worth showing (see :func:`_raw_panels`): the
    raw metric value, the layer's std for ``collapse``, the non-finite count for
    ``nonfinite``.  Alerts are triangles at the alert's value.
    """
    mpl, Figure, _canvas, _ = _mpl()
    name = run.layers[li]
    grid = run.grid
    x = grid.edges()[:-1] + grid.width / 2.0
    acc = run.phase(phase)
    tables = {a: run.table(phase, a) for a in AGAINST}
    chans = {a: run.channel_table(phase, a) for a in AGAINST}
    refs = run.acc.references
    entry = refs[0].get("entry") if refs and isinstance(refs[0].get("entry"), list) else None
    rules = rules_for_layer(run.rules, name, phase, entry)
    noise_rules = [r for r in rules if r.get("units") == "noise"]
    raw_rules = [r for r in rules if r.get("units") != "noise"]
    alerts = [a for a in run.acc.alerts.kept
              if a.get("layer") == name and a.get("phase") in (phase, None)]
    raw_keys = _raw_panels(run, li, phase, raw_rules, alerts)
    with mpl.rc_context(_rc()):
        n_panels = 1 + len(raw_keys)
        height = 1.5 + 1.6 * n_panels
        fig = Figure(figsize=(7.2, height), dpi=90)  # fixed layout: 2x faster than constrained
        axes = fig.subplots(n_panels, 1, sharex=True, squeeze=False)[:, 0]
        ax = axes[0]
        drawn = False
        t = tables["reference"]
        if t is not None:
            y = np.fmax.reduce(t["bin_ratio"][:, li, :], axis=1)
            if np.isfinite(y).any():
                ax.plot(x, y, color="#a0a0a0", lw=1.8, label="largest over metrics vs reference")
                drawn = True
        series: list[tuple[str, str, str]] = []
        for r in noise_rules:
            key = (r.get("metric"), r.get("against"), r.get("view") or "layer")
            if key not in series and key[0] in METRICS and key[1] in AGAINST:
                series.append(key)
        for k, (metric, against, view) in enumerate(series):
            if view in ("channel", "channels") and metric in CHANNEL_METRICS \
                    and chans[against] is not None:
                y = chans[against]["ch_bin_ratio"][:, li, CHANNEL_METRICS.index(metric)]
                label = f"{metric} vs {against} (worst channel)"
            elif tables[against] is not None:
                y = tables[against]["bin_ratio"][:, li, METRICS.index(metric)]
                label = f"{metric} vs {against}"
            else:
                continue
            if np.isfinite(y).any():
                ax.plot(x, y, color=_SERIES[k % len(_SERIES)], lw=1.0, label=label)
                drawn = True
        for r in noise_rules:
            thr = _num(r.get("threshold"))
            if thr is not None and thr > 0:
                ax.axhline(thr, color=_sev_colour(r.get("severity")), ls="--", lw=0.9,
                           label=_lit(f"threshold {thr:g}: {r.get('name')} "
                                      f"({r.get('severity')})"))
        marks = [a for a in alerts if a.get("units") == "noise" and (_num(a.get("value")) or 0) > 0]
        if marks:
            ax.scatter([a["step"] for a in marks], [a["value"] for a in marks], marker="v",
                       s=30, c=[_sev_colour(a.get("severity")) for a in marks], zorder=5,
                       label="alert (colour: severity)")
        if drawn or marks:
            ax.set_yscale("log")
        ax.set_ylabel("shift / noise")
        kind = f"  ({_lit(run.layer_types[li])})" if run.layer_types[li] else ""
        ax.set_title(_short(name, 90) + kind)
        for ax, (metric, against) in zip(axes[1:], raw_keys, strict=True):
            if metric == "collapse" and acc is not None:
                y, ylabel = acc.bin_std_min[:, li], "std (min per bin)"
            elif metric == "nonfinite" and acc is not None:
                y, ylabel = acc.bin_nonfinite[:, li], "non-finite values"
            elif metric in METRICS and against in AGAINST and tables[against] is not None:
                y = tables[against]["bin_value"][:, li, METRICS.index(metric)]
                ylabel = f"{metric} vs {against} (raw)"
            else:
                y, ylabel = np.full(grid.nbins, np.nan), _lit(metric)
            ax.plot(x, y, color="#1f5f99", lw=1.0)
            for r in raw_rules:
                thr = _num(r.get("threshold"))
                if (r.get("metric"), r.get("against")) == (metric, against) and thr is not None:
                    ax.axhline(thr, color=_sev_colour(r.get("severity")), ls="--", lw=0.9,
                               label=_lit(f"threshold {thr:g}: {r.get('name')} "
                                          f"({r.get('severity')})"))
            pts = [a for a in alerts if a.get("units") != "noise" and a.get("metric") == metric]
            if pts:
                ax.scatter([a["step"] for a in pts],
                           [_num(a.get("value")) or 0.0 for a in pts], marker="v", s=30,
                           c=[_sev_colour(a.get("severity")) for a in pts], zorder=5)
            ax.set_ylabel(ylabel)
        handles, labels = [], []
        for a in axes:
            h, lab = a.get_legend_handles_labels()
            for hh, ll in zip(h, lab, strict=True):
                if ll not in labels:
                    handles.append(hh)
                    labels.append(ll)
        rows = math.ceil(len(handles) / 2)
        if handles:
            fig.legend(handles, labels, loc="lower center", ncol=2, fontsize=6.5,
                       frameon=False, bbox_to_anchor=(0.5, 0.0))
        axes[-1].set_xlabel(f"step (each point: extreme of a {grid.width}-step bin)")
        fig.subplots_adjust(left=0.11, right=0.98, top=1 - 0.32 / height, hspace=0.25,
                            bottom=(0.5 + 0.13 * rows) / height)
        return _save(fig, fmt)


def compare_figure(c: dict[str, Any], *, fmt: str = "png") -> tuple[bytes, str]:
    """Typical and peak raw values of each layer in runs A and B, noise floors as bars."""
    mpl, Figure, _canvas, _ = _mpl()
    rows = [r for r in c["layers"] if r["A"] and r["B"]]
    L = max(1, len(rows))
    with mpl.rc_context(_rc()):
        fig = Figure(figsize=(10, min(30.0, max(2.6, 1.2 + 0.22 * L))), dpi=100,
                     layout="constrained")
        axes = fig.subplots(1, 2, sharey=True)
        for ax, key, nkey, title in ((axes[0], "typical", "typical_noise", "typical (median)"),
                                     (axes[1], "peak", "peak_noise", "peak")):
            for k, side in enumerate(("A", "B")):
                ys = np.arange(len(rows)) + (-0.15 if side == "A" else 0.15)
                v = np.array([r[side][key] if r[side][key] is not None else np.nan
                              for r in rows], dtype=float)
                n = np.array([r[side][nkey] if r[side][nkey] is not None else np.nan
                              for r in rows], dtype=float)
                ax.errorbar(v, ys, xerr=n, fmt="o" if k == 0 else "s", ms=4, lw=0.8,
                            color=_RUN_COLOURS[side], label=f"{side} (bar: noise floor)")
            ax.set_title(f"{title} {c['view']['metric']} vs {c['view']['against']}")
            ax.set_xlabel("raw value")
            ax.grid(axis="x", color="#e0e0e0", lw=0.6)
        axes[0].set_yticks(range(len(rows)))
        axes[0].set_yticklabels([_short(r["layer"]) + ("  *" if r["steadier"] else "")
                                 for r in rows], fontsize=7)
        axes[0].set_ylim(len(rows) - 0.5, -0.5)
        axes[0].legend(loc="lower right", fontsize=7, frameon=False)
        fig.suptitle("A vs B per layer; * marks a verdict (difference beyond noise)", fontsize=9)
        return _save(fig, fmt)
