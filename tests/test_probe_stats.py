"""The probe's statistics against outside references: PyTorch's own functional norms,
numpy float64, scipy, and the sampling law of the batch mean and variance."""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy.special import digamma
from torch import nn

from shiftwatch.probe import layer_statistics, normalized_output_kl, probe_normalization
from shiftwatch.probe.analysis import batch_size_sensitivity, draw_subbatches
from shiftwatch.probe.moments import SampleMoments, channel_moments


def _input(*shape: int, seed: int = 0) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    # offsets and scales differ per channel so that wrong axes give visibly wrong stats
    x = torch.randn(*shape, generator=g)
    c = shape[1] if len(shape) > 1 else 1
    scale = torch.linspace(0.5, 3.0, c).view(1, c, *([1] * (len(shape) - 2)))
    offset = torch.linspace(-4.0, 6.0, c).view(1, c, *([1] * (len(shape) - 2)))
    return x * scale + offset


def _affine(module: nn.Module, seed: int = 1) -> nn.Module:
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        module.weight.copy_(torch.rand(module.weight.shape, generator=g) + 0.5)
        module.bias.copy_(torch.randn(module.bias.shape, generator=g))
    return module


def _channel_affine(y: torch.Tensor, module: nn.Module) -> torch.Tensor:
    shape = (1, -1) + (1,) * (y.ndim - 2)
    return y * module.weight.view(shape) + module.bias.view(shape)


# --- Reference library: PyTorch's own F.batch_norm / F.group_norm / F.layer_norm /
# F.instance_norm.  F.batch_norm with training=False normalizes with whatever statistics
# it is given, per channel; reshaping the input so that each normalization group becomes a
# channel lets it apply the probe's per-sample statistics too.


@pytest.mark.parametrize("shape", [(16, 5), (12, 4, 7), (8, 3, 5, 6), (6, 2, 3, 4, 5)])
def test_batchnorm_batch_statistics_reproduce_training_mode_output(shape):
    x = _input(*shape)
    bn = _affine({2: nn.BatchNorm1d, 3: nn.BatchNorm1d, 4: nn.BatchNorm2d,
                  5: nn.BatchNorm3d}[len(shape)](shape[1]))
    mean, var = layer_statistics(bn, x)
    ours = F.batch_norm(x, mean.float(), var.float(), bn.weight, bn.bias, training=False,
                        eps=bn.eps)
    module_out = copy.deepcopy(bn).train()(x)  # a copy: training mode updates running stats
    reference = F.batch_norm(x, None, None, bn.weight, bn.bias, training=True, eps=bn.eps)
    torch.testing.assert_close(ours, module_out, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(ours, reference, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("groups", [1, 2, 4, 8])
def test_groupnorm_statistics_reproduce_module_output(groups):
    x = _input(5, 8, 6, 7, seed=2)
    gn = _affine(nn.GroupNorm(groups, 8))
    mean, var = layer_statistics(gn, x)
    assert mean.shape == (5, groups)
    n, c = x.shape[:2]
    flat = x.reshape(1, n * groups, -1)
    via_bn = F.batch_norm(flat, mean.flatten().float(), var.flatten().float(), training=False,
                          eps=gn.eps).reshape(x.shape)
    via_in = F.instance_norm(flat, running_mean=mean.flatten().float(),
                             running_var=var.flatten().float(), use_input_stats=False,
                             eps=gn.eps).reshape(x.shape)
    reference = F.group_norm(x, groups, gn.weight, gn.bias, eps=gn.eps)
    torch.testing.assert_close(_channel_affine(via_bn, gn), reference, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(_channel_affine(via_in, gn), reference, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(reference, gn(x), rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("shape,normalized", [((4, 9, 12), (12,)), ((6, 3, 4, 5), (3, 4, 5)),
                                              ((7, 10), (10,))])
def test_layernorm_statistics_reproduce_module_output(shape, normalized):
    x = _input(*shape, seed=3) + 7.0
    ln = nn.LayerNorm(normalized)
    with torch.no_grad():
        g = torch.Generator().manual_seed(4)
        ln.weight.copy_(torch.rand(normalized, generator=g) + 0.5)
        ln.bias.copy_(torch.randn(normalized, generator=g))
    mean, var = layer_statistics(ln, x)
    assert mean.shape == x.shape[: x.ndim - len(normalized)]
    rows = mean.numel()
    via_bn = F.batch_norm(x.reshape(1, rows, -1), mean.flatten().float(), var.flatten().float(),
                          training=False, eps=ln.eps).reshape(x.shape)
    ours = via_bn * ln.weight + ln.bias
    reference = F.layer_norm(x, normalized, ln.weight, ln.bias, eps=ln.eps)
    torch.testing.assert_close(ours, reference, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(reference, ln(x), rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("cls,shape", [(nn.InstanceNorm1d, (5, 4, 11)),
                                       (nn.InstanceNorm2d, (3, 6, 5, 4)),
                                       (nn.InstanceNorm3d, (2, 3, 4, 3, 5))])
def test_instancenorm_statistics_reproduce_module_output(cls, shape):
    x = _input(*shape, seed=5)
    inorm = _affine(cls(shape[1], affine=True))
    mean, var = layer_statistics(inorm, x)
    assert mean.shape == shape[:2]
    n, c = shape[:2]
    via_in = F.instance_norm(x.reshape(1, n * c, -1), running_mean=mean.flatten().float(),
                             running_var=var.flatten().float(), use_input_stats=False,
                             eps=inorm.eps).reshape(x.shape)
    reference = F.instance_norm(x, weight=inorm.weight, bias=inorm.bias, eps=inorm.eps)
    torch.testing.assert_close(_channel_affine(via_in, inorm), reference, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(reference, inorm(x), rtol=1e-6, atol=1e-6)


def test_unbatched_instancenorm_input_is_one_sample():
    x = _input(1, 4, 9)[0]  # (C, L): InstanceNorm1d accepts unbatched input
    mean, var = layer_statistics(nn.InstanceNorm1d(4), x)
    np.testing.assert_allclose(mean.numpy()[0], x.double().numpy().mean(1), rtol=1e-6)
    np.testing.assert_allclose(var.numpy()[0], x.double().numpy().var(1), rtol=1e-6)


def test_moments_keep_precision_of_large_offsets():
    # numpy float64 reference on float32 data with mean 1e4, std 1: a one-pass float32
    # sum of squares would lose the variance entirely.
    x = (torch.randn(64, 3, 50, generator=torch.Generator().manual_seed(0)) + 1e4).float()
    m = channel_moments(x)
    ref = x.double().numpy()
    np.testing.assert_allclose(m.var().numpy(), ref.var(2), rtol=1e-6)
    np.testing.assert_allclose(m.pooled()[1].numpy(), ref.transpose(1, 0, 2).reshape(3, -1)
                               .var(1), rtol=1e-6)


# --- Mergeable statistics: exact against numpy float64 (hypothesis property test).


@settings(max_examples=40, deadline=None)
@given(rows=st.integers(2, 9), groups=st.sampled_from([1, 2, 3]), per_group=st.integers(1, 3),
       spatial=st.integers(1, 5), seed=st.integers(0, 10_000), loc=st.floats(-1e3, 1e3))
def test_grouped_pooled_and_subbatch_moments_equal_numpy(rows, groups, per_group, spatial,
                                                         seed, loc):
    c = groups * per_group
    rng = np.random.default_rng(seed)
    data = rng.normal(loc, rng.uniform(0.1, 10), size=(rows, c, spatial))
    m = channel_moments(torch.tensor(data))
    g = m.grouped(groups)
    by_group = data.reshape(rows, groups, per_group * spatial)
    np.testing.assert_allclose(g.mean.numpy(), by_group.mean(2), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(g.var().numpy(), by_group.var(2), rtol=1e-8, atol=1e-9)
    mean, var = m.pooled()
    flat = data.transpose(1, 0, 2).reshape(c, -1)
    np.testing.assert_allclose(mean.numpy(), flat.mean(1), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(var.numpy(), flat.var(1), rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(m.pooled(unbiased=True)[1].numpy(), flat.var(1, ddof=1),
                               rtol=1e-8, atol=1e-9)
    idx = torch.tensor(rng.permutation(rows)[: max(1, rows // 2)]).view(1, -1)
    bmean, bvar = m.subbatch(idx)
    sub = data[idx[0].numpy()].transpose(1, 0, 2).reshape(c, -1)
    np.testing.assert_allclose(bmean[0].numpy(), sub.mean(1), rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(bvar[0].numpy(), sub.var(1), rtol=1e-8, atol=1e-9)


def test_cat_rejects_tables_of_different_shapes():
    a = SampleMoments(3, torch.zeros(2, 4, dtype=torch.float64), torch.zeros(2, 4,
                                                                             dtype=torch.float64))
    b = SampleMoments(5, torch.zeros(2, 4, dtype=torch.float64), torch.zeros(2, 4,
                                                                             dtype=torch.float64))
    with pytest.raises(ValueError, match="different shapes"):
        SampleMoments.cat([a, b])


# --- The KL formula against scipy numerical integration and torch.distributions.


@pytest.mark.parametrize("mean,var,ref_mean,ref_var", [(0.3, 1.7, -0.2, 0.9), (5.0, 0.2, 4.0, 2.5),
                                                      (0.0, 1.0, 0.0, 1.0)])
def test_normalized_output_kl_equals_gaussian_kl(mean, var, ref_mean, ref_var):
    ours = float(normalized_output_kl(torch.tensor(mean), torch.tensor(var),
                                      torch.tensor(ref_mean), torch.tensor(ref_var), eps=0.0))
    p = stats.norm(ref_mean, math.sqrt(ref_var))
    q = stats.norm(mean, math.sqrt(var))
    # scipy.integrate.quad of p log(p/q): the definition of KL(P || Q)
    numeric, _ = integrate.quad(lambda t: p.pdf(t) * (p.logpdf(t) - q.logpdf(t)), -np.inf, np.inf)
    closed = torch.distributions.kl_divergence(  # PyTorch's own closed form
        torch.distributions.Normal(ref_mean, math.sqrt(ref_var)),
        torch.distributions.Normal(mean, math.sqrt(var)))
    assert ours == pytest.approx(numeric, rel=1e-6, abs=1e-9)
    assert ours == pytest.approx(float(closed), rel=1e-5, abs=1e-7)


# --- Sampling law of the batch mean and variance (statistical facts).


def _iid_pool(n: int, c: int, seed: int) -> torch.Tensor:
    return torch.randn(n, c, generator=torch.Generator().manual_seed(seed)) * 3.0 + 5.0


@pytest.mark.parametrize("seed", [0, 1])
def test_mean_error_scales_as_standard_error_of_the_mean(seed):
    # Standard error of the mean, sigma / sqrt(b) (statistical fact): on iid data the
    # error at b=2 is sqrt(32/2) = 4 times the error at b=32.  Tolerance 10%: the RMS over
    # 256 draws x 16 channels has a sampling error of about 2% (measured spread of the
    # ratio over seeds: 3.90-4.08).
    r = probe_normalization(nn.BatchNorm1d(16), [_iid_pool(1024, 16, seed)], seed=seed)
    bs = r.layers[0].batch_sizes
    assert bs[2].mean_error / bs[32].mean_error == pytest.approx(4.0, rel=0.10)
    for b in (2, 8, 32):  # and in absolute terms, in channel-std units: 1 / sqrt(b)
        assert bs[b].mean_error * math.sqrt(b) == pytest.approx(1.0, rel=0.10)


def test_finite_population_correction_keeps_large_batches_honest():
    # Sub-batches of 32 from a pool of only 64 vary less than batches from the source
    # distribution by sqrt((N - b) / (N - 1)) (finite-population correction of sampling
    # without replacement, textbook survey sampling; from memory).  Uncorrected the error
    # would read 0.71 / sqrt(32); corrected it reads 1 / sqrt(32) within 10% (64 channels
    # average out the pool's own sampling error).
    m = channel_moments(_iid_pool(64, 64, 3))
    index = draw_subbatches(64, 32, 256, seed=0)
    s = batch_size_sensitivity(m, index, 32, eps=1e-5, tolerance=0.05)
    assert s.mean_error * math.sqrt(32) == pytest.approx(1.0, rel=0.10)


@pytest.mark.parametrize("b", [8, 16, 32])
def test_mean_kl_matches_chi_square_expectation(b):
    # For iid Gaussian values the batch variance is sigma^2 chi2_{b-1} / b and the batch
    # mean N(mu, sigma^2 / b), independent (Cochran's theorem).  Hence
    # E[KL] = 0.5 (E log r + (1 + 1/b) E[1/r] - 1) with E log r = digamma((b-1)/2) + log(2/b)
    # and E[1/r] = b / (b - 3) (derived here from the chi-square law; scipy's digamma).
    # Tolerance 12%: measured deviations over seeds were within 5%.
    r = probe_normalization(nn.BatchNorm1d(16), [_iid_pool(4096, 16, 7)], batch_sizes=[b])
    expected = 0.5 * (digamma((b - 1) / 2) + math.log(2 / b) + (1 + 1 / b) * b / (b - 3) - 1)
    s = r.layers[0].batch_sizes[b]
    assert s.kl == pytest.approx(expected, rel=0.12)
    assert s.log_var_ratio_mean == pytest.approx(digamma((b - 1) / 2) + math.log(2 / b),
                                                 abs=0.02)


def test_default_tolerance_accepts_batch_32_and_rejects_16_on_iid_values():
    # The anchor of KL_TOLERANCE (common practice, no source): on iid values BatchNorm at
    # batch 32 is within tolerance, at 16 it is not.
    r = probe_normalization(nn.BatchNorm1d(64), [_iid_pool(2048, 64, 11)])
    bs = r.layers[0].batch_sizes
    assert bs[32].within_tolerance and not bs[16].within_tolerance
    assert r.layers[0].smallest_batch_size == 32 == r.recommended_batch_size
