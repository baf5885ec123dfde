"""Capture: module selection, gated hooks, phases, input rules; checked against PyTorch."""

from __future__ import annotations

import gc
import warnings
import weakref

import pytest
import torch
from torch import nn

from shiftwatch import ConfigError, ShiftWatchWarning
from shiftwatch.capture import DEFAULT_TYPES, Capture, pick_tensor, select_modules


class Net(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.emb = nn.Embedding(10, 4)
        self.conv1 = nn.Conv2d(3, 4, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(4)
        self.act = nn.ReLU()
        self.gn = nn.GroupNorm(2, 4)
        self.inorm = nn.InstanceNorm2d(4)
        self.head = nn.Sequential(nn.Flatten(), nn.Linear(4 * 4 * 4, 8), nn.LayerNorm(8),
                                  nn.Linear(8, 2))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.act(self.bn1(self.conv1(x)))
        return self.head(self.inorm(self.gn(x)))


def test_default_selection_matches_pytorch_types():
    net = Net()
    names = [n for n, _ in select_modules(net)]
    # independent check with PyTorch's own classes
    wanted = (nn.Conv2d, nn.Linear, nn.BatchNorm2d, nn.GroupNorm, nn.LayerNorm, nn.InstanceNorm2d)
    expected = [n for n, m in net.named_modules() if n and isinstance(m, wanted)]
    assert names == expected
    assert "emb" not in names and "act" not in names
    assert all(isinstance(t, type) for t in DEFAULT_TYPES)


def test_include_exclude_and_types():
    net = Net()
    assert [n for n, _ in select_modules(net, layers="head.*")] == ["head.1", "head.2", "head.3"]
    assert [n for n, _ in select_modules(net, exclude=["head.*", "gn"])] == [
        "conv1", "bn1", "inorm"]
    got = select_modules(net, types=[nn.Conv2d, "LayerNorm"])
    assert [n for n, _ in got] == ["conv1", "head.2"]
    assert [n for n, _ in select_modules(net, layers="emb", types=[nn.Embedding])] == ["emb"]


def test_pattern_matching_nothing_lists_near_names():
    net = Net()
    with pytest.raises(ConfigError, match=r"'layers' pattern 'conv_1'.*'conv1'"):
        select_modules(net, layers="conv_1")
    with pytest.raises(ConfigError, match=r"'exclude' pattern 'hed\.\*'.*head"):
        select_modules(net, exclude="hed.*")
    with pytest.raises(ConfigError, match=r"only modules of type ReLU.*types"):
        select_modules(net, layers="act")
    with pytest.raises(ConfigError, match="'model' must be a torch.nn.Module"):
        select_modules("not a model")


def test_disarmed_hooks_record_nothing_and_armed_summary_matches_torch():
    torch.manual_seed(0)
    net = Net()
    cap = Capture(net)
    x = torch.randn(5, 3, 4, 4) * 2 + 1
    net(x)
    assert cap.phases() == []
    cap.arm()
    net(x)
    cap.disarm()
    s = dict(zip([t.name for t in cap.taps], cap.take("train"), strict=True))
    conv_in = s["conv1"]
    # outside reference: PyTorch's own reductions over (N, H, W) per channel
    # (float32 sums inside summarize: relative tolerance 1e-5)
    torch.testing.assert_close(conv_in.mean(layer=False), x.double().mean(dim=(0, 2, 3)),
                               rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(
        conv_in.var(layer=False), x.double().var(dim=(0, 2, 3), unbiased=False), rtol=1e-5,
        atol=1e-6)
    assert float(conv_in.count) == x.numel()
    assert s["head.1"].channels == 64 and s["head.3"].channels == 8  # linear: last dim
    cap.close()


def test_eval_forwards_are_labelled_val_and_kept_apart():
    net = Net()
    cap = Capture(net)
    cap.arm()
    net(torch.randn(4, 3, 4, 4))
    net.eval()
    net(torch.randn(6, 3, 4, 4) + 5)
    assert cap.phases() == ["train", "val"]
    train, val = cap.take("train"), cap.take("val")
    assert float(train[0].count) == 4 * 48 and float(val[0].count) == 6 * 48
    assert float(val[0].mean()) > 3 > float(train[0].mean())
    cap.arm(phase="val")  # forced label, whatever the module mode
    net.train()
    net(torch.randn(2, 3, 4, 4))
    assert cap.phases() == ["val"]
    with pytest.raises(ConfigError, match="'phase' must be one of"):
        cap.arm(phase="test")
    cap.close()


def test_repeated_calls_merge_exactly():
    lin = nn.Linear(3, 3)
    model = nn.Sequential(lin)
    cap = Capture(model)
    cap.arm()
    a, b = torch.randn(4, 3), torch.randn(7, 3) + 2
    model(a)
    model(b)
    (s,) = cap.take("train")
    both = torch.cat([a, b]).double()
    assert float(s.count) == both.numel()
    torch.testing.assert_close(s.mean(layer=False), both.mean(0), rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(s.var(layer=False), both.var(0, unbiased=False), rtol=1e-5,
                               atol=1e-6)


def test_no_autograd_graph_is_kept():
    net = Net()
    cap = Capture(net)
    cap.arm()
    x = torch.randn(4, 3, 4, 4, requires_grad=True)
    out = net(x)
    summaries = [s for s in cap.take("train") if s is not None]
    assert summaries and all(
        not t.requires_grad and t.grad_fn is None
        for s in summaries for t in (s.table, s.extrema)
    )
    # the activations die with the graph: nothing in the capture refers to them
    probe = weakref.ref(net.conv1.weight)  # keep a handle on the model only
    ref_x = weakref.ref(x)
    out.sum().backward()
    del out, x
    gc.collect()
    assert ref_x() is None and probe() is not None
    cap.close()


class Picky(nn.Module):
    """Takes odd inputs to exercise the tensor-picking rule."""

    def __init__(self) -> None:
        super().__init__()
        self.lin = nn.Linear(3, 3)

    def forward(self, *args, **kwargs):
        return args


def test_documented_rule_for_tuple_dict_and_keyword_inputs():
    f = torch.ones(2, 3)
    i = torch.ones(2, 3, dtype=torch.long)
    assert pick_tensor((i, f))[0] is f
    assert pick_tensor(((i, [f]),))[0] is f
    assert pick_tensor(({"mask": i.bool(), "x": f},))[0] is f
    assert pick_tensor((), {"x": f})[0] is f
    assert pick_tensor((i,)) == (None, i)
    assert pick_tensor(("text", 3)) == (None, None)


def test_int_bool_and_empty_inputs_are_skipped_with_one_warning():
    m = nn.Sequential(Picky())
    cap = Capture(m, types=[Picky])
    cap.arm()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(3):
            m(torch.ones(2, 3, dtype=torch.long))
        for _ in range(3):
            m(torch.zeros(0, 3))
    msgs = [str(w.message) for w in caught if issubclass(w.category, ShiftWatchWarning)]
    assert len(msgs) == 2  # one per layer and reason
    assert "torch.int64" in msgs[0] and "empty" in msgs[1] and "exclude=['0']" in msgs[0]
    assert cap.phases() == []
    cap.close()


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_half_precision_inputs_are_summarised_in_float32(dtype):
    model = nn.Sequential(nn.LayerNorm(256))
    cap = Capture(model, types=[nn.LayerNorm])
    cap.arm()
    # sums returned in the input precision would be rounded to 8 (bf16) or 11 (fp16)
    # mantissa bits, a relative error of ~1e-3 that the tolerances below reject
    x32 = 1 + 0.1 * torch.randn(512, 256)
    x = x32.to(dtype)
    model.to(dtype)(x)
    (s,) = cap.take("train")
    ref = x.float().double()  # the values as stored, summed in float64 by PyTorch
    assert s.table.dtype == torch.float64
    torch.testing.assert_close(s.mean(), ref.mean(), rtol=1e-5, atol=0)
    torch.testing.assert_close(s.var(), ref.var(unbiased=False), rtol=1e-4, atol=0)
    cap.close()


def test_outputs_and_entry_layers():
    class Normalised(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.a, self.b = nn.Linear(3, 3), nn.Linear(3, 3)

        def forward(self, x):
            return self.b(self.a((x - 1) / 2))  # no watched layer sees x itself

    net = Net()
    cap = Capture(net, outputs=True, layers=["conv1", "bn1"])
    assert [t.name for t in cap.taps] == ["conv1", "conv1:out", "bn1", "bn1:out"]
    cap.arm()
    net(torch.randn(2, 3, 4, 4))
    assert cap.entry_names() == ["conv1"]  # shares storage with the model input
    got = dict(zip([t.name for t in cap.taps], cap.take("train"), strict=True))
    assert got["conv1:out"].channels == 4
    torch.testing.assert_close(got["conv1:out"].table, got["bn1"].table)  # same tensor
    cap.close()
    model = Normalised()
    cap = Capture(model)
    cap.arm()
    model(torch.randn(2, 3))
    assert cap.entry_names() == ["a"]  # first watched layer to run
    cap.close()


def test_close_removes_every_hook_and_is_safe_twice():
    net = Net()
    before = {n: (len(m._forward_pre_hooks), len(m._forward_hooks))
              for n, m in net.named_modules()}
    cap = Capture(net, outputs=True)
    assert sum(len(m._forward_pre_hooks) for m in net.modules()) > 0
    with cap:
        pass
    cap.close()
    assert {n: (len(m._forward_pre_hooks), len(m._forward_hooks))
            for n, m in net.named_modules()} == before
    assert cap.closed


def test_bad_options():
    with pytest.raises(ConfigError, match="'max_hist_values' must be a positive int"):
        Capture(Net(), max_hist_values=0)
    with pytest.raises(ConfigError, match="'outputs' must be True or False"):
        Capture(Net(), outputs="yes")
    with pytest.raises(ConfigError, match="'layers' must be a glob"):
        Capture(Net(), layers=[""])
