"""PNG plot of the batch-size sensitivity: error against batch size, one line per layer.

matplotlib is optional (``pip install shiftwatch[plot]``) and imported only here, when a
plot is asked for.  The figure is drawn with matplotlib's object API on an Agg canvas, so
no global pyplot state or backend of the caller's session is touched.
"""

from __future__ import annotations

import os

from .result import ProbeResult

__all__ = ["plot_probe"]


def _figure_class():
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError as exc:
        raise ImportError(
            "plotting the probe needs matplotlib, which is not installed; install it with "
            "`pip install shiftwatch[plot]` or leave out the plot (--plot)"
        ) from exc
    return Figure, FigureCanvasAgg


def plot_probe(result: ProbeResult, path: str | os.PathLike[str], *, dpi: int = 120) -> None:
    """Write a PNG with two panels for the BatchNorm layers of ``result``: the RMS batch-mean
    error (channel std units) and the KL percentile used for the tolerance (nats per
    channel, tolerance drawn as a dashed line), both against batch size on log axes.

    Raises:
        ImportError: matplotlib is missing (the message names the pip extra).
        ValueError: ``result`` has no BatchNorm layer with evaluated batch sizes.
    """
    layers = [lr for lr in result.layers if lr.batch_sizes]
    if not layers:
        raise ValueError(
            "the probe found no BatchNorm layer with evaluated batch sizes, so there is no "
            "error-vs-batch-size plot to draw; leave out the plot"
        )
    figure_cls, canvas_cls = _figure_class()
    fig = figure_cls(figsize=(10, 4.2), dpi=dpi)
    canvas_cls(fig)
    ax_err, ax_kl = fig.subplots(1, 2)
    q = round(result.quantile * 100)
    for lr in layers:
        sizes = sorted(lr.batch_sizes)
        label = f"{lr.name} ({lr.type})"
        ax_err.plot(sizes, [lr.batch_sizes[b].mean_error for b in sizes], marker="o",
                    label=label)
        ax_kl.plot(sizes, [max(lr.batch_sizes[b].kl_p90, 1e-12) for b in sizes], marker="o",
                   label=label)
    ax_kl.axhline(result.tolerance, linestyle="--", color="0.4",
                  label=f"tolerance {result.tolerance:g}")
    ticks = sorted({b for lr in layers for b in lr.batch_sizes})
    for ax in (ax_err, ax_kl):
        ax.set_xscale("log", base=2)
        ax.set_xticks(ticks, [str(b) for b in ticks])
        ax.minorticks_off()
        ax.set_yscale("log")
        ax.set_xlabel("batch size")
        ax.grid(True, which="both", alpha=0.3)
    ax_err.set_ylabel("batch-mean error, RMS [channel std]")
    ax_kl.set_ylabel(f"KL of normalized output, p{q} [nats/channel]")
    ax_err.set_title("Batch-mean error")
    ax_kl.set_title("Distortion of the normalized output")
    ax_kl.legend(fontsize="small")
    fig.tight_layout()
    fig.savefig(os.fspath(path), format="png")
