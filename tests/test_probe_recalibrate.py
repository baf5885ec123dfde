"""Exact recalibration against numpy float64 and PyTorch's own BatchNorm update."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from torch import nn

from shiftwatch.errors import ConfigError
from shiftwatch.probe import probe_normalization, recalibrate


def _model(seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    m = nn.Sequential(
        nn.Conv2d(3, 6, 3), nn.BatchNorm2d(6), nn.ReLU(),
        nn.Conv2d(6, 4, 3), nn.BatchNorm2d(4), nn.ReLU(),
        nn.Flatten(), nn.Linear(4 * 3 * 3, 5), nn.BatchNorm1d(5),
    )
    with torch.no_grad():  # running statistics far from anything the data gives
        for bn in (m[1], m[4], m[8]):
            bn.running_mean.uniform_(-3, 3)
            bn.running_var.uniform_(0.1, 5)
    return m


def _batches(sizes=(7, 16, 5, 12), seed: int = 1, shift: float = 0.5) -> list[torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    return [torch.randn(n, 3, 7, 7, generator=g) * 2 + shift for n in sizes]


def _eval_inputs(model: nn.Module, batches, layers) -> dict[int, np.ndarray]:
    """The layer inputs in eval mode, captured by the test's own hooks, as float64."""
    seen: dict[int, list[np.ndarray]] = {i: [] for i in layers}
    handles = [model[i].register_forward_pre_hook(
        lambda mod, args, i=i: seen[i].append(args[0].double().numpy())) for i in layers]
    model.eval()
    with torch.no_grad():
        for x in batches:
            model(x)
    for h in handles:
        h.remove()
    return {i: np.concatenate(v) for i, v in seen.items()}


def _population(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    axes = (0,) + tuple(range(2, x.ndim))
    # numpy float64: population mean and unbiased variance over all values of a channel,
    # as BatchNorm's definition of the running variance (unbiased estimate) requires
    return x.mean(axis=axes), x.var(axis=axes, ddof=1)


def test_recalibrated_running_stats_equal_numpy_population_mean_and_unbiased_var():
    model, batches = _model(), _batches()
    res = recalibrate(model, batches)
    new = res.model
    assert new is not model and not res.in_place
    # every layer is a fixed point: its inputs under the recalibrated model have exactly
    # its running statistics (unequal batch sizes: each sample weighs the same)
    inputs = _eval_inputs(new, batches, (1, 4, 8))
    for i, x in inputs.items():
        mean, var = _population(x)
        np.testing.assert_allclose(new[i].running_mean.double().numpy(), mean, rtol=2e-6,
                                   atol=2e-6)
        np.testing.assert_allclose(new[i].running_var.double().numpy(), var, rtol=2e-6,
                                   atol=2e-6)
        assert res.after[str(i)].kl < 1e-9 and res.before[str(i)].stale


def test_first_layer_matches_pytorch_cumulative_update_on_one_full_batch():
    # PyTorch's own BatchNorm with momentum=None keeps a cumulative average; after one
    # training-mode batch holding all samples its running_var is that batch's unbiased
    # variance: the same as exact recalibration of the first layer (reference library).
    model, batches = _model(), _batches()
    res = recalibrate(model, batches)
    ref = copy.deepcopy(model)
    ref[1].reset_running_stats()
    ref[1].momentum = None
    ref.train()
    with torch.no_grad():
        ref[1](ref[0](torch.cat(batches)))
    torch.testing.assert_close(res.model[1].running_mean, ref[1].running_mean, rtol=1e-5,
                               atol=1e-5)
    torch.testing.assert_close(res.model[1].running_var, ref[1].running_var, rtol=1e-5,
                               atol=1e-5)


def test_copy_by_default_in_place_only_when_asked():
    model, batches = _model(), _batches()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    recalibrate(model, batches)
    probe_normalization(model, batches, recalibrate=True)
    for k, v in model.state_dict().items():
        assert torch.equal(v, before[k]), k
    res = recalibrate(model, batches, in_place=True)
    assert res.model is model and res.in_place
    assert not torch.equal(model[4].running_mean, before["4.running_mean"])
    # buffers other than the running statistics are untouched
    assert torch.equal(model[4].num_batches_tracked, before["4.num_batches_tracked"])
    assert torch.equal(model[0].weight, before["0.weight"])


def test_recalibration_generalises_to_held_out_data_of_the_same_distribution():
    # the meaningful 'after': measured on other samples of the same distribution
    model = _model()
    calib, held_out = _batches(seed=1, sizes=(64,) * 4), _batches(seed=2, sizes=(64,) * 4)
    res = recalibrate(model, calib)
    check = probe_normalization(res.model, held_out)
    stale_before = probe_normalization(model, held_out).stale_layers
    assert stale_before == ["1", "4", "8"]
    assert check.stale_layers == []
    for lr in check.layers:
        # what remains is sampling noise of two independent sets: their mean difference
        # has sqrt(2) times the standard error of one (3 standard errors allowed)
        rs = lr.running_stats
        assert rs.smd_rms < 3 * np.sqrt(2) * rs.smd_noise, lr.name


def test_generator_batches_are_read_once_and_reused():
    model = _model()
    res = recalibrate(model, (x for x in _batches()))
    assert all(v.kl < 1e-9 for v in res.after.values())


def test_probe_attaches_before_and_after():
    r = probe_normalization(_model(), _batches(), recalibrate=True)
    d = r.to_dict()
    assert d["recalibrated"] == "copy"
    for layer in d["layers"]:
        rc = layer["recalibration"]
        assert rc["before"]["kl"] > 0.05 and rc["after"]["kl"] < 1e-9
    assert "recalibrated on a copy" in r.to_text()


def test_nothing_to_recalibrate_is_a_clear_error():
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.GroupNorm(2, 4))
    with pytest.raises(ConfigError, match="no BatchNorm layer with running statistics"):
        recalibrate(model, _batches())
