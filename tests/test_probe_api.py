"""The Python interface: bad input, the model left unchanged, result forms, staleness."""

from __future__ import annotations

import io
import json
import subprocess
import sys

import numpy as np
import pytest
import torch
from torch import nn

from shiftwatch.errors import ConfigError, UnsupportedInputError
from shiftwatch.probe import plot_probe, probe_normalization
from shiftwatch.probe.capture import _Progress


def _net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(
        nn.Conv2d(2, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), nn.Dropout(0.5),
        nn.Conv2d(8, 8, 3, padding=1), nn.GroupNorm(4, 8), nn.ReLU(),
        nn.Flatten(), nn.Linear(8 * 6 * 6, 12), nn.LayerNorm(12), nn.Linear(12, 6),
        nn.BatchNorm1d(6),
    )


def _data(n_batches: int = 4, size: int = 32, seed: int = 0) -> list[torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    return [torch.randn(size, 2, 6, 6, generator=g) for _ in range(n_batches)]


def _snapshot(model: nn.Module):
    return (
        {k: v.clone() for k, v in model.state_dict().items()},
        [m.training for m in model.modules()],
        [len(m._forward_pre_hooks) + len(m._forward_hooks) for m in model.modules()],
    )


def _assert_unchanged(model: nn.Module, snap) -> None:
    state, flags, hooks = snap
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert [m.training for m in model.modules()] == flags
    assert [len(m._forward_pre_hooks) + len(m._forward_hooks) for m in model.modules()] == hooks


def test_model_left_unchanged_training_mode_included():
    model = _net().train()
    model[3].eval()  # a mixed pattern of flags must come back as it was
    snap = _snapshot(model)
    r = probe_normalization(model, _data(), recalibrate=True)
    _assert_unchanged(model, snap)
    assert r.recalibrated_model is not model


def test_model_left_unchanged_when_the_forward_fails():
    model = _net().train()
    snap = _snapshot(model)
    bad = _data(2) + [torch.randn(4, 3, 6, 6)]  # third batch has the wrong channel count
    with pytest.raises(ConfigError, match="rejected batch 2 of shape"):
        probe_normalization(model, bad)
    _assert_unchanged(model, snap)


def test_layers_and_their_reports():
    r = probe_normalization(_net(), _data())
    assert [(lr.name, lr.type) for lr in r.layers] == [
        ("1", "BatchNorm2d"), ("5", "GroupNorm"), ("9", "LayerNorm"), ("11", "BatchNorm1d")]
    bn2d, gn, ln, bn1d = r.layers
    assert sorted(bn2d.batch_sizes) == [2, 4, 8, 16, 32] and bn2d.batch_dependent
    assert gn.batch_sizes is None and not gn.batch_dependent
    assert gn.statistics.norm == "group" and gn.statistics.values_per_group == 2 * 36
    assert {a.norm for a in gn.alternatives} == {"layer", "group", "instance"}
    assert 4 not in [a.groups for a in gn.alternatives if a.norm == "group"]  # its own
    assert ln.statistics.values_per_group == 12 and ln.alternatives == []
    # BatchNorm1d on (N, 6): instance norm (one value per group) is not offered
    assert "instance" not in {a.norm for a in bn1d.alternatives}
    assert bn2d.running_stats is not None and bn1d.running_stats is not None
    # errors fall as b grows, and the smallest batch size respects monotone "stays under"
    errs = [bn2d.batch_sizes[b].mean_error for b in (2, 4, 8, 16, 32)]
    assert errs == sorted(errs, reverse=True)


def test_json_document_shape():
    r = probe_normalization(_net(), _data())
    d = json.loads(json.dumps(r.to_dict(), allow_nan=False))
    assert d["schema"] == 1 and d["samples"] == 128 and d["batches"] == 4
    assert d["tolerance"]["kl_nats_per_channel"] == 0.05
    for layer in d["layers"]:
        assert {"name", "type", "kind", "batch_sizes", "notes"} <= set(layer)
        if layer["kind"] == "batch":
            assert set(layer["batch_sizes"]) == {"2", "4", "8", "16", "32"}
            for v in layer["batch_sizes"].values():
                assert {"mean_error", "log_var_ratio", "kl", "kl_p90"} <= set(v)
        else:
            assert layer["batch_sizes"] is None


def test_text_table_names_layers_and_the_tolerance():
    text = probe_normalization(_net(), _data()).to_text()
    assert "BatchNorm2d" in text and "group(4) (this layer)" in text
    assert "0.05 nats/channel" in text and "common practice, no source" in text
    assert "not a guarantee of accuracy" in text


def test_batch_sizes_beyond_the_data_are_skipped_with_a_reason():
    r = probe_normalization(_net(), _data(1, 20), batch_sizes=[2, 4, 8, 16])
    bn = r.layers[0]
    assert sorted(bn.batch_sizes) == [2, 4, 8]
    assert bn.skipped_batch_sizes == {16: "needs at least 32 samples (2 x b) in the pool (got 20)"}


def test_stale_running_statistics_are_flagged():
    # running stats of N(0, 1) data; the given data is shifted by 1.5 std in one channel
    bn = nn.BatchNorm1d(4)
    x = torch.randn(512, 4, generator=torch.Generator().manual_seed(3))
    ok = probe_normalization(bn, [x]).layers[0].running_stats
    assert not ok.stale and ok.smd_max_abs < 4 * ok.smd_noise
    x[:, 2] += 1.5
    rs = probe_normalization(bn, [x]).layers[0].running_stats
    assert rs.stale and rs.worst_channel == 2
    # SMD uses the pooled std of data (var 1) and running stats (var 1)
    assert rs.smd_max_abs == pytest.approx(1.5, abs=0.15)
    # closed-form KL between two unit-variance Gaussians 1.5 std apart: z**2 / 2
    assert rs.kl_max == pytest.approx(1.5 ** 2 / 2, rel=0.2)


@pytest.mark.parametrize("model,msg", [
    (nn.Sequential(nn.Linear(4, 4), nn.ReLU()), "no normalization layers"),
    ("not a model", "must be a torch.nn.Module"),
])
def test_no_normalization_layers(model, msg):
    with pytest.raises(ConfigError, match=msg):
        probe_normalization(model, [torch.randn(8, 4)])


def test_too_few_samples():
    with pytest.raises(ConfigError, match=r"at least 4 samples .* but gave 3"):
        probe_normalization(nn.BatchNorm1d(3), [torch.randn(3, 3)])


@pytest.mark.parametrize("kwargs,msg", [
    ({"batch_sizes": [1, 4]}, "'batch_sizes' must be"),
    ({"batch_sizes": []}, "'batch_sizes' must be"),
    ({"draws": 3}, "'draws' must be"),
    ({"tolerance": -1.0}, "'tolerance' must be"),
    ({"quantile": 1.5}, "'quantile' must be"),
    ({"in_place": True}, "'in_place' only applies"),
])
def test_bad_options(kwargs, msg):
    with pytest.raises(ConfigError, match=msg):
        probe_normalization(nn.BatchNorm1d(3), [torch.randn(64, 3)], **kwargs)


def test_unusable_batches():
    with pytest.raises(UnsupportedInputError, match="iterable of input batches"):
        probe_normalization(nn.BatchNorm1d(3), 42)
    with pytest.raises(UnsupportedInputError, match="forward=lambda"):
        probe_normalization(nn.BatchNorm1d(3), [{"x": torch.randn(8, 3)}])
    with pytest.raises(ConfigError, match="at least one batch"):
        probe_normalization(nn.BatchNorm1d(3), [])


def test_dataloader_pairs_custom_forward_and_single_tensor():
    x = torch.randn(64, 3)
    loader = torch.utils.data.DataLoader(torch.utils.data.TensorDataset(x, torch.zeros(64)),
                                         batch_size=10)
    a = probe_normalization(nn.BatchNorm1d(3), loader).to_dict()
    b = probe_normalization(nn.BatchNorm1d(3), x).to_dict()  # one tensor = one batch
    c = probe_normalization(nn.BatchNorm1d(3), [{"inp": x}],
                            forward=lambda m, batch: m(batch["inp"])).to_dict()
    for d in (a, b, c):
        d["layers"][0].pop("calls")  # one call per batch: 7, 1, 1
    assert a["layers"] == b["layers"] == c["layers"]  # how the data is batched does not matter
    assert a["batches"] == 7 and b["batches"] == 1


def test_max_samples_stops_reading():
    r = probe_normalization(nn.BatchNorm1d(3), [torch.randn(16, 3) for _ in range(10)],
                            max_samples=40)
    assert r.samples == 48 and r.batches == 3


def test_nonfinite_layer_input_is_reported_not_analysed():
    x = torch.randn(32, 3)
    x[5, 1] = float("nan")
    r = probe_normalization(nn.BatchNorm1d(3), [x])
    assert r.layers[0].batch_sizes is None and "NaN" in r.layers[0].notes[0]


def test_shared_module_called_twice_is_noted():
    bn = nn.BatchNorm1d(3)
    model = nn.Sequential(bn, nn.ReLU(), bn)
    r = probe_normalization(model, [torch.randn(32, 3)])
    assert r.layers[0].calls == 2 and "called 2 times" in r.layers[0].notes[0]


def test_progress_lines_only_when_asked_or_on_a_terminal(capsys):
    probe_normalization(nn.BatchNorm1d(3), [torch.randn(32, 3)])
    assert capsys.readouterr().err == ""
    probe_normalization(nn.BatchNorm1d(3), [torch.randn(32, 3)], progress=True)
    assert "shiftwatch probe: probe: batch 1/1, 32 samples" in capsys.readouterr().err
    stream = io.StringIO()
    stream.isatty = lambda: True  # a terminal gets one self-overwriting line
    bar = _Progress(None, "probe", 2, stream)
    bar.update(1, 8)
    bar.update(2, 16)
    bar.close()
    assert stream.getvalue().count("\r") == 2 and stream.getvalue().endswith("\n")


def test_plot_writes_a_png(tmp_path):
    r = probe_normalization(_net(), _data())
    path = tmp_path / "p.png"
    plot_probe(r, path)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plot_without_matplotlib_names_the_extra(tmp_path, monkeypatch):
    r = probe_normalization(_net(), _data())
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # Python's way to block an import
    with pytest.raises(ImportError, match=r"pip install shiftwatch\[plot\]"):
        plot_probe(r, tmp_path / "p.png")


def test_import_leaves_optional_integrations_out():
    code = ("import sys, shiftwatch, shiftwatch.probe, shiftwatch.cli.probe_cmd; "
            "print(sorted(m for m in ('matplotlib', 'lightning', 'tensorboard') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_results_are_deterministic_for_a_seed():
    a = probe_normalization(_net(), _data(), seed=5).to_dict()
    b = probe_normalization(_net(), _data(), seed=5).to_dict()
    c = probe_normalization(_net(), _data(), seed=6).to_dict()
    assert a == b
    ka = a["layers"][0]["batch_sizes"]["2"]["kl"]
    kc = c["layers"][0]["batch_sizes"]["2"]["kl"]
    assert ka != kc and np.isclose(ka, kc, rtol=0.5)
