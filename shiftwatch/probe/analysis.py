"""The probe's three measurements on one layer's input moments.

1. :func:`batch_size_sensitivity`: how far the batch statistics of random sub-batches of
   ``b`` real samples are from the population statistics of all given samples.
2. :func:`per_sample_spread`: for normalizations that use statistics of each sample
   (LayerNorm, InstanceNorm, GroupNorm), how much those statistics vary across samples.
3. :func:`running_stats_check`: a BatchNorm layer's running statistics against the
   statistics of the given data.

All results are plain dataclasses of Python floats (see :mod:`shiftwatch.probe.result`
for their JSON form).  Units: mean errors in units of ``sqrt(var + eps)`` of the channel
(the layer's divisor: the channel standard deviation unless the variance is comparable to
``eps``); KL divergences in nats per channel (or per group), averaged over channels.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch import Tensor

from .moments import SampleMoments, kl_from_z_logr

__all__ = [
    "KL_TOLERANCE",
    "BatchSizeStats",
    "SpreadStats",
    "RunningStatsCheck",
    "batch_size_sensitivity",
    "draw_subbatches",
    "per_sample_spread",
    "running_stats_check",
]

#: Default tolerance, nats per channel, on the KL caused by normalizing with batch
#: statistics instead of population statistics (and on running statistics vs data).
#: Common practice, no source: BatchNorm is commonly used without trouble at batch size 32,
#: and on independent Gaussian values (one value per sample and channel) batch 32 gives an
#: expected KL of about 0.037 and batch 16 about 0.088 (computed from the chi-square law of
#: the batch variance); 0.05 therefore accepts what batch 32 does on such data and rejects
#: what batch 16 does.
KL_TOLERANCE = 0.05


@dataclass(frozen=True)
class BatchSizeStats:
    """Batch statistics of ``draws`` random sub-batches of ``batch_size`` samples.

    Attributes:
        mean_error: root mean square over sub-batches and channels of the batch-mean error
            ``(batch mean - population mean) / sqrt(population var + eps)``.
        mean_error_p90: 90th percentile over sub-batches of the channel-RMS mean error.
        log_var_ratio: RMS of ``log((batch var + eps) / (population var + eps))``.
        log_var_ratio_mean: mean of the same log ratio (negative: a batch's biased variance
            is on average smaller than the population's).
        kl: mean over sub-batches of the channel-averaged KL (see
            :func:`~shiftwatch.probe.moments.normalized_output_kl`), nats per channel.
        kl_p50, kl_p90: median and 90th percentile over sub-batches of that KL.
        kl_worst_channel: the largest per-channel KL (mean over sub-batches) and
        worst_channel: its channel index.
        within_tolerance: ``kl_p90 <= tolerance``.
    """

    batch_size: int
    draws: int
    mean_error: float
    mean_error_p90: float
    log_var_ratio: float
    log_var_ratio_mean: float
    kl: float
    kl_p50: float
    kl_p90: float
    kl_worst_channel: float
    worst_channel: int
    within_tolerance: bool


def draw_subbatches(rows: int, largest: int, draws: int, seed: int) -> Tensor:
    """``(draws, largest)`` row indices: each row a random subset drawn without replacement.

    Sub-batches of size ``b`` are the first ``b`` columns, so the sub-batches of different
    sizes are nested (as a smaller batch is part of a larger one); this makes the comparison
    across batch sizes less noisy.  Deterministic for a given ``seed``.
    """
    gen = torch.Generator().manual_seed(seed)
    keys = torch.rand(draws, rows, generator=gen)
    return keys.topk(largest, dim=1).indices


def batch_size_sensitivity(
    moments: SampleMoments,
    index: Tensor,
    batch_size: int,
    *,
    eps: float,
    tolerance: float,
    quantile: float = 0.9,
) -> BatchSizeStats:
    """Error of BatchNorm's batch statistics at ``batch_size`` from real sub-batches.

    ``moments`` are per-(sample, channel) moments of the layer input; ``index`` comes from
    :func:`draw_subbatches`.  Deviations are corrected for drawing from a finite pool of
    ``N`` samples (finite-population correction ``sqrt((N - 1) / (N - b))``: exact for the
    variance of the batch mean, leading-order for the batch variance; it makes the result an
    estimate for batches from the distribution the samples came from, not from this pool).
    The correction scales each channel's mean deviation and the random part of its log
    variance ratio (the mean over sub-batches, i.e. the bias, is kept).  Needs
    ``2 * batch_size <= N`` (the correction stays below ``sqrt(2)``).
    """
    n = moments.rows
    b = int(batch_size)
    if not 2 <= b <= n // 2:
        raise ValueError(f"batch_size must be in 2..{n // 2} for {n} samples (got {b})")
    idx = index[:, :b]
    mu, var = moments.pooled()
    bmean, bvar = moments.subbatch(idx)
    scale = torch.sqrt(var + eps)
    fpc = math.sqrt((n - 1) / (n - b))
    z = (bmean - mu) / scale * fpc  # (K, C)
    log_r = torch.log((bvar + eps) / (var + eps))
    bias = log_r.mean(0, keepdim=True)
    log_r = bias + (log_r - bias) * fpc
    kl = kl_from_z_logr(z * z, log_r)  # (K, C)
    per_draw_kl = kl.mean(1)
    per_draw_err = (z * z).mean(1).sqrt()
    per_channel_kl = kl.mean(0)
    q = torch.tensor([0.5, quantile], dtype=per_draw_kl.dtype)
    kl_q = torch.quantile(per_draw_kl, q)
    worst = int(per_channel_kl.argmax())
    kl_p90 = float(kl_q[1])
    return BatchSizeStats(
        batch_size=b,
        draws=int(idx.shape[0]),
        mean_error=float((z * z).mean().sqrt()),
        mean_error_p90=float(torch.quantile(per_draw_err, quantile)),
        log_var_ratio=float((log_r * log_r).mean().sqrt()),
        log_var_ratio_mean=float(log_r.mean()),
        kl=float(per_draw_kl.mean()),
        kl_p50=float(kl_q[0]),
        kl_p90=kl_p90,
        kl_worst_channel=float(per_channel_kl[worst]),
        worst_channel=worst,
        within_tolerance=kl_p90 <= tolerance,
    )


@dataclass(frozen=True)
class SpreadStats:
    """Spread across samples of a per-sample normalization's statistics.

    Attributes:
        norm: ``"layer"``, ``"instance"`` or ``"group"``.
        groups: statistics per sample (1 for layer, C for instance, G for group; 1 for a
            LayerNorm module, whose rows are its leading positions).
        values_per_group: how many values each per-sample statistic is computed from.
        mean_spread: RMS over groups of the standard deviation across samples of
            ``(sample mean - pooled mean) / sqrt(pooled var + eps)``.  How far per-sample
            normalization moves a typical sample relative to normalizing with statistics
            pooled over all samples, in the units of ``mean_error``.
        log_var_spread: RMS over groups of the standard deviation across samples of
            ``log((sample var + eps) / (pooled var + eps))``.
    """

    norm: str
    groups: int
    values_per_group: int
    mean_spread: float
    log_var_spread: float


def per_sample_spread(moments: SampleMoments, *, norm: str, eps: float) -> SpreadStats:
    """:class:`SpreadStats` of a table whose cells are per-sample normalization groups."""
    mu, var = moments.pooled()
    z = (moments.mean - mu) / torch.sqrt(var + eps)
    log_r = torch.log((moments.var() + eps) / (var + eps))
    log_r = log_r - log_r.mean(0, keepdim=True)
    return SpreadStats(
        norm=norm,
        groups=moments.channels,
        values_per_group=moments.count,
        mean_spread=float((z * z).mean().sqrt()),
        log_var_spread=float((log_r * log_r).mean().sqrt()),
    )


def alternative_group_counts(channels: int, wanted: tuple[int, ...] | None) -> list[int]:
    """Group counts to try for ``channels``: those of ``wanted`` (default 2, 4, 8, 16, 32)
    that divide ``channels`` and lie strictly between 1 and ``channels``."""
    wanted = (2, 4, 8, 16, 32) if wanted is None else wanted
    return sorted({g for g in wanted if 1 < g < channels and channels % g == 0})


@dataclass(frozen=True)
class RunningStatsCheck:
    """A BatchNorm layer's running statistics against the statistics of the given data.

    Attributes:
        smd_max_abs, smd_rms: largest and RMS over channels of the standardized mean
            difference ``(data mean - running mean) / sqrt((data var + running var) / 2 + eps)``.
        smd_noise: RMS over channels of the standard error of that difference due to the
            finite data (from the spread of per-sample means); differences of a few times
            this can be sampling noise.
        kl: channel mean of the KL caused by normalizing with the running statistics
            instead of the data's statistics (nats per channel);
        kl_max: its largest channel value, at
        worst_channel.
        stale: ``kl > tolerance``.
    """

    smd_max_abs: float
    smd_rms: float
    smd_noise: float
    kl: float
    kl_max: float
    worst_channel: int
    stale: bool


def running_stats_check(moments: SampleMoments, running_mean: Tensor, running_var: Tensor, *,
                        eps: float, tolerance: float) -> RunningStatsCheck:
    """Compare ``running_mean``/``running_var`` with the mean and the unbiased variance of
    the data in ``moments`` (the unbiased variance is what BatchNorm's running variance
    estimates, so exactly recalibrated statistics score 0)."""
    rm = running_mean.detach().to("cpu", torch.float64)
    rv = running_var.detach().to("cpu", torch.float64)
    mu, var = moments.pooled(unbiased=True)  # what running_var estimates
    pooled_sd = torch.sqrt((var + rv) / 2 + eps)
    smd = (mu - rm) / pooled_sd
    se = torch.sqrt(moments.row_mean_spread() / moments.rows) / pooled_sd
    kl = kl_from_z_logr((rm - mu).square() / (var + eps), torch.log((rv + eps) / (var + eps)))
    worst = int(kl.argmax())
    mean_kl = float(kl.mean())
    return RunningStatsCheck(
        smd_max_abs=float(smd.abs().max()),
        smd_rms=float((smd * smd).mean().sqrt()),
        smd_noise=float((se * se).mean().sqrt()),
        kl=mean_kl,
        kl_max=float(kl[worst]),
        worst_channel=worst,
        stale=mean_kl > tolerance,
    )
