"""Per-row, per-channel moments of a normalization layer's input, and what each kind of
normalization computes from them.

Every statistic of the probe derives from one small table per layer: for each *row* (a
sample, or for LayerNorm one position of the leading dimensions) and each *channel*, the
count, mean and ``M2`` (sum of squared deviations from the mean) of the values in that
row and channel.  Counts are equal across rows and channels, so a single integer holds
them.  Batch statistics (what BatchNorm computes from a batch), group statistics (what
GroupNorm computes per sample and group) and the population statistics over all rows are
exact merges of this table (Chan, Golub & LeVeque's pairwise update of count, mean and
M2), so the probe never keeps an activation.

Units: means are in the units of the layer input, variances in its square.  Variances are
population (biased, ``M2 / n``) unless a name says ``unbiased``: BatchNorm, GroupNorm,
LayerNorm and InstanceNorm all divide by the biased variance of what they normalize.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch import Tensor, nn

from ..errors import ConfigError, UnsupportedInputError

__all__ = [
    "SampleMoments",
    "channel_moments",
    "input_moments",
    "layer_moments",
    "layer_statistics",
    "norm_kind",
    "normalized_output_kl",
]

_F64 = torch.float64


@dataclass(frozen=True)
class SampleMoments:
    """Moments of the values in each (row, channel) cell.

    Attributes:
        count: number of values in every cell (equal for all cells).
        mean: float64 ``(R, C)``, mean of each cell.
        m2: float64 ``(R, C)``, sum of squared deviations from the cell mean.
    """

    count: int
    mean: Tensor
    m2: Tensor

    @property
    def rows(self) -> int:
        return self.mean.shape[0]

    @property
    def channels(self) -> int:
        return self.mean.shape[1]

    def var(self) -> Tensor:
        """Biased variance of each cell ``(R, C)``."""
        return self.m2 / self.count

    def is_finite(self) -> bool:
        """False when the input held NaN or infinite values (they propagate into the cells)."""
        return bool(torch.isfinite(self.mean).all() and torch.isfinite(self.m2).all())

    @staticmethod
    def cat(parts: list[SampleMoments]) -> SampleMoments:
        """Stack the rows of several tables with the same count and channels."""
        if not parts:
            raise ConfigError("'parts' must not be empty")
        first = parts[0]
        for p in parts[1:]:
            if p.count != first.count or p.channels != first.channels:
                raise ConfigError(
                    "cannot stack moments of inputs with different shapes "
                    f"({first.channels} channels x {first.count} values vs "
                    f"{p.channels} x {p.count}); feed the layer inputs of one shape"
                )
        return SampleMoments(
            first.count,
            torch.cat([p.mean.cpu() for p in parts]),
            torch.cat([p.m2.cpu() for p in parts]),
        )

    def grouped(self, groups: int) -> SampleMoments:
        """Merge consecutive channels into ``groups`` groups (GroupNorm's grouping).

        ``groups=1`` pools all channels of a row (LayerNorm over ``(C, *)``);
        ``groups=C`` returns the table unchanged (InstanceNorm).
        """
        c = self.channels
        if groups < 1 or c % groups:
            raise ConfigError(f"'groups' must divide the {c} channels (got {groups})")
        k = c // groups
        mean = self.mean.reshape(self.rows, groups, k)
        gmean = mean.mean(2)
        dev = mean - gmean.unsqueeze(2)
        m2 = self.m2.reshape(self.rows, groups, k).sum(2) + self.count * (dev * dev).sum(2)
        return SampleMoments(self.count * k, gmean, m2)

    def pooled(self, *, unbiased: bool = False) -> tuple[Tensor, Tensor]:
        """Mean and variance of each channel over all rows: float64 ``(C,)`` each."""
        mean, m2 = _merge_rows(self.mean, self.m2, self.count, dim=0)
        n = self.rows * self.count
        return mean, m2 / (n - 1 if unbiased else n)

    def subbatch(self, index: Tensor) -> tuple[Tensor, Tensor]:
        """Batch statistics of sub-batches: ``index`` is ``(K, b)`` row indices; returns the
        mean and the biased variance of each channel over each sub-batch, ``(K, C)`` each.
        This is what BatchNorm in training mode computes from a batch of those rows."""
        mean, m2 = _merge_rows(self.mean[index], self.m2[index], self.count, dim=1)
        return mean, m2 / (index.shape[1] * self.count)

    def row_mean_spread(self) -> Tensor:
        """Unbiased variance across rows of the cell means, ``(C,)``: the spread from which
        the standard error of a channel mean follows (``sqrt(spread / R)``)."""
        return self.mean.var(0, unbiased=True) if self.rows > 1 else torch.zeros(self.channels)


def _merge_rows(mean: Tensor, m2: Tensor, count: int, *, dim: int) -> tuple[Tensor, Tensor]:
    """Exact merge of equal-count (mean, M2) cells along ``dim``."""
    mu = mean.mean(dim)
    dev = mean - mu.unsqueeze(dim)
    return mu, m2.sum(dim) + count * (dev * dev).sum(dim)


def channel_moments(x: Tensor) -> SampleMoments:
    """Moments per (sample, channel) of an ``(N, C, *)`` tensor; ``(N, C)`` has one value per
    cell.  Two passes in the input precision (float32 for half inputs), sums in float64:
    the cell mean first, then squared deviations from it, corrected by the residual mean."""
    if not isinstance(x, Tensor):
        raise UnsupportedInputError(f"layer input must be a torch.Tensor (got {type(x).__name__})")
    if x.is_complex() or not x.is_floating_point():
        raise UnsupportedInputError(
            f"layer input has dtype {x.dtype}; only floating-point inputs can be probed"
        )
    if x.ndim < 2:
        raise UnsupportedInputError(
            f"layer input must have a batch and a channel axis (got shape {tuple(x.shape)})"
        )
    x = x.detach()
    if x.dtype in (torch.float16, torch.bfloat16):
        x = x.float()
    flat = x.reshape(x.shape[0], x.shape[1], -1)
    s = flat.shape[2]
    if s == 0 or flat.shape[0] == 0:
        raise UnsupportedInputError(f"layer input is empty (shape {tuple(x.shape)})")
    shift = (flat.sum(2, dtype=_F64) / s).to(flat.dtype)  # first pass, rounded to x's dtype
    d = flat - shift.unsqueeze(2)
    s1 = d.sum(2, dtype=_F64)
    s2 = torch.linalg.vector_norm(d, dim=2, dtype=_F64).square()
    m2 = (s2 - s1 * s1 / s).clamp_min(0)
    return SampleMoments(s, shift.to(_F64) + s1 / s, m2)


def norm_kind(module: nn.Module) -> str | None:
    """``"batch"``, ``"group"``, ``"layer"``, ``"instance"`` or ``None`` (not a normalization
    layer the probe knows)."""
    # _BatchNorm / _InstanceNorm are private but are the common bases of every BatchNorm
    # (1d/2d/3d, Sync, Lazy) and InstanceNorm variant since PyTorch 1.0.
    from torch.nn.modules.batchnorm import _BatchNorm
    from torch.nn.modules.instancenorm import _InstanceNorm

    if isinstance(module, _BatchNorm):
        return "batch"
    if isinstance(module, _InstanceNorm):
        return "instance"
    if isinstance(module, nn.GroupNorm):
        return "group"
    if isinstance(module, nn.LayerNorm):
        return "layer"
    return None


def input_moments(module: nn.Module, x: Tensor) -> SampleMoments:
    """Moments of the input ``x`` of ``module`` per row and channel, before any grouping.

    * BatchNorm, GroupNorm, InstanceNorm: rows are samples, columns the ``C`` channels
      (an unbatched ``(C, *)`` InstanceNorm input is one sample).
    * LayerNorm: rows are the positions of the leading dimensions, one column holding the
      values of ``normalized_shape``.
    """
    kind = norm_kind(module)
    if kind is None:
        raise ConfigError(f"'module' must be a normalization layer (got {type(module).__name__})")
    if not isinstance(x, Tensor):
        raise UnsupportedInputError(f"layer input must be a torch.Tensor (got {type(x).__name__})")
    if kind == "layer":
        k = len(module.normalized_shape)
        if x.ndim < k or tuple(x.shape[x.ndim - k :]) != tuple(module.normalized_shape):
            raise UnsupportedInputError(
                f"LayerNorm input of shape {tuple(x.shape)} does not end in the layer's "
                f"normalized_shape {tuple(module.normalized_shape)}"
            )
        return channel_moments(x.reshape(-1, 1, math.prod(module.normalized_shape)))
    if kind == "instance":
        no_batch = getattr(module, "_get_no_batch_dim", lambda: -1)()
        if x.ndim == no_batch:
            x = x.unsqueeze(0)
    return channel_moments(x)


def layer_moments(module: nn.Module, x: Tensor) -> SampleMoments:
    """Moments of ``x`` laid out as ``module`` normalizes it: :func:`input_moments`, with
    GroupNorm's channels merged into its ``num_groups`` groups.  For BatchNorm, pool the
    rows to get the batch statistics; for the others each cell is one statistic."""
    moments = input_moments(module, x)
    if norm_kind(module) == "group":
        return moments.grouped(module.num_groups)
    return moments


def layer_statistics(module: nn.Module, x: Tensor) -> tuple[Tensor, Tensor]:
    """The mean and biased variance that ``module`` divides by when it normalizes ``x``
    with statistics of the input itself (BatchNorm in training mode, GroupNorm, LayerNorm,
    InstanceNorm without running statistics), float64.

    Shapes: BatchNorm ``(C,)``; InstanceNorm ``(N, C)``; GroupNorm ``(N, G)``; LayerNorm
    ``x.shape[:-len(normalized_shape)]``.
    """
    m = layer_moments(module, x)
    kind = norm_kind(module)
    if kind == "batch":
        return m.pooled()
    mean, var = m.mean, m.var()
    if kind == "layer":
        lead = x.shape[: x.ndim - len(module.normalized_shape)]
        return mean.reshape(lead), var.reshape(lead)
    return mean, var


def normalized_output_kl(mean: Tensor, var: Tensor, ref_mean: Tensor, ref_var: Tensor,
                         eps: float) -> Tensor:
    """Gaussian KL divergence (nats, elementwise) caused by normalizing with ``(mean, var)``
    instead of the reference ``(ref_mean, ref_var)``.

    Model: a channel's values have the reference mean and variance.  Normalizing them
    with the reference statistics gives (about) zero mean and unit variance; normalizing
    with ``(mean, var)`` shifts them by ``z = (ref_mean - mean) / sqrt(var + eps)`` and
    scales them by ``sqrt((ref_var + eps) / (var + eps))``.  With ``r = (var + eps) /
    (ref_var + eps)`` and ``z`` measured in ``sqrt(ref_var + eps)`` units, the KL divergence
    of the first output from the second is ``0.5 * (log r + (1 + z**2) / r - 1)``, which
    for ``eps = 0`` equals ``KL(N(ref_mean, ref_var) || N(mean, var))``.  Using ``var +
    eps`` (the layer's own divisor) in place of ``var`` changes nothing when the variance is
    well above ``eps`` and keeps near-constant channels from giving meaningless large
    values.  Only the first two moments enter: a non-Gaussian channel gets the KL of the
    Gaussians with its mean and variance.
    """
    ref_s2 = ref_var + eps
    z2 = (mean - ref_mean).square() / ref_s2
    log_r = torch.log((var + eps) / ref_s2)
    return kl_from_z_logr(z2, log_r)


def kl_from_z_logr(z2: Tensor, log_r: Tensor) -> Tensor:
    """``0.5 * (log r + (1 + z2) / r - 1)`` from ``z2 = z**2`` and ``log r``."""
    return 0.5 * (log_r + (1.0 + z2) * torch.exp(-log_r) - 1.0)
