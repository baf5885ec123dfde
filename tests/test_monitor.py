"""ShiftMonitor in a training loop: schedule, default rules, actions, phases, safety.

Data: scikit-learn's bundled digits images (8x8, 1,797 samples), batch 8, a small CNN.
"""

from __future__ import annotations

import gc
import json
import math
import weakref

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits
from torch import nn

from shiftwatch import ConfigError, Rule, ShiftAlertError, ShiftMonitor

DIGITS = torch.tensor(load_digits().images, dtype=torch.float32).unsqueeze(1) / 16.0


class Offset(nn.Module):
    """Adds ``offset`` to its input: a controllable shift inside the model."""

    def __init__(self) -> None:
        super().__init__()
        self.offset = 0.0

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.offset


def make_model(seed: int = 0) -> nn.Sequential:
    torch.manual_seed(seed)
    return nn.Sequential(
        nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), Offset(),
        nn.Conv2d(8, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
        nn.Flatten(), nn.Linear(8 * 64, 10),
    )


def train(model, monitor, steps, *, seed=0, batch=8, shift_at=None, shift=0.0, inner=False,
          start=0, on_step=None):
    """SGD steps on digits; from ``shift_at`` on, the input (or, with ``inner``, the input
    of the second conv) moves by ``shift`` of its standard deviation."""
    g = torch.Generator().manual_seed(seed)
    for _ in range(start):  # replay the data stream up to ``start``
        torch.randint(0, len(DIGITS), (batch,), generator=g)
        torch.randint(0, 10, (batch,), generator=g)
    opt = torch.optim.SGD(model.parameters(), lr=0.01)
    sd_in = float(DIGITS.std())
    for s in range(start, steps):
        x = DIGITS[torch.randint(0, len(DIGITS), (batch,), generator=g)]
        y = torch.randint(0, 10, (batch,), generator=g)
        if shift_at is not None and s == shift_at and inner:
            with torch.no_grad():
                model[3].offset = shift * float(model[:3](DIGITS[:512]).std())
        if shift_at is not None and s >= shift_at and not inner:
            x = x + shift * sd_in
        nn.functional.cross_entropy(model(x), y).backward()
        opt.step()
        opt.zero_grad()
        if on_step is not None:
            on_step(s, x)
        monitor.step()
        if monitor.should_stop:
            break


def records(log_dir, kind=None):
    with open(log_dir / "events.jsonl") as f:
        recs = [json.loads(line) for line in f]
    return [r for r in recs if kind is None or r["kind"] == kind]


def test_stationary_input_gives_no_alerts_at_batch_8(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=False)
    train(model, mon, 300)
    mon.close()
    assert mon.alerts == []
    steps = records(tmp_path, "step")
    assert len(steps) == 300 and mon.entry_layers == ["0"]
    # the scores were there to fire: vs_reference available from the 6th sample on
    assert steps[5]["layers"]["0"]["vs_reference"] is not None


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_half_std_input_shift_fails_at_first_or_second_sample(seed, tmp_path):
    model = make_model(seed)
    mon = ShiftMonitor(model, tmp_path, every_n_steps=5, warmup_steps=10, tensorboard=False)
    train(model, mon, 80, seed=seed, shift_at=52, shift=0.5)  # sampled: ..., 50, 55, 60
    fails = [a for a in mon.alerts if a.severity == "fail"]
    assert fails, "the shift was not caught"
    assert fails[0].step in (55, 60) and fails[0].layer == "0"
    assert all(a.step >= 55 for a in mon.alerts)
    mon.close()


def test_half_std_shift_of_an_inner_input_is_reported(tmp_path):
    model = make_model(3)
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=False)
    train(model, mon, 40, seed=3, shift_at=30, shift=0.5, inner=True)
    mon.close()
    assert {a.step for a in mon.alerts} <= {30, 31} and mon.alerts
    # the conv after the shift; the BN after it may follow (zero padding at the image
    # border turns the offset into a change of spread there)
    assert "4" in {a.layer for a in mon.alerts} and not {a.layer for a in mon.alerts} & {"0", "1"}
    assert all(a.severity == "warn" for a in mon.alerts)  # inner layers: reported


def test_step_record_matches_torch_and_reference_is_the_pool(tmp_path):
    model = make_model()
    seen = {}
    mon = ShiftMonitor(model, tmp_path, every_n_steps=2, reference_steps=3, tensorboard=False)
    train(model, mon, 12, on_step=lambda s, x: seen.__setitem__(s, x.clone()))
    mon.close()
    steps = {r["step"]: r for r in records(tmp_path, "step")}
    assert sorted(steps) == [0, 2, 4, 6, 8, 10]
    # outside reference: torch's own mean/std of the batch the first conv received
    e = steps[8]["layers"]["0"]
    x = seen[8].double()
    assert e["count"] == x.numel()
    assert e["mean"] == pytest.approx(float(x.mean()), rel=1e-6)
    assert e["std"] == pytest.approx(float(x.std(unbiased=False)), rel=1e-5)
    # the reference pools steps 0, 2, 4: mean_shift = |m - m_ref| / s_ref
    pooled = torch.cat([seen[s] for s in (0, 2, 4)]).double()
    expect = abs(float(x.mean() - pooled.mean())) / float(pooled.std(unbiased=False))
    assert e["vs_reference"]["mean_shift"]["value"] == pytest.approx(expect, rel=1e-5)
    ref = records(tmp_path, "reference")[0]
    assert ref["steps"] == [0, 2, 4] and ref["source"] == "pooled" and ref["entry"] == ["0"]
    assert steps[4]["layers"]["0"]["vs_reference"] is None  # still pooling


def test_on_alert_raise_stop_and_record(tmp_path):
    rule = [Rule("mean_shift", threshold=6, against="previous", layers=["<entry>"],
                 severity="fail", name="jump")]
    model = make_model()
    mon = ShiftMonitor(model, tmp_path / "raise", every_n_steps=1, rules=rule,
                       on_alert="raise", tensorboard=False)
    with pytest.raises(ShiftAlertError) as info:
        train(model, mon, 30, shift_at=20, shift=1.0)
    err = info.value
    assert (err.step, err.layer, err.metric, err.threshold) == (20, "0", "mean_shift", 6.0)
    assert err.value >= 6 and err.alert.action == "raise" and "step 20" in str(err)
    mon.close()
    alerts = records(tmp_path / "raise", "alert")
    assert [(a["step"], a["action"]) for a in alerts] == [(20, "raise")]

    model = make_model()
    mon = ShiftMonitor(model, tmp_path / "stop", every_n_steps=1, rules=rule, on_alert="stop",
                       tensorboard=False)
    train(model, mon, 30, shift_at=20, shift=1.0)  # breaks on should_stop
    assert mon.should_stop and mon.global_step == 21 and "mean_shift" in mon.stop_reason
    mon.close()
    end = records(tmp_path / "stop", "end")[0]
    assert end["stopped"] is True and end["alerts"] == {"warn": 0, "fail": 1}

    model = make_model()
    mon = ShiftMonitor(model, tmp_path / "rec", every_n_steps=1, rules=rule, tensorboard=False)
    train(model, mon, 30, shift_at=20, shift=1.0)
    assert not mon.should_stop and [a.action for a in mon.alerts] == ["record"]
    mon.close()


def test_validation_forwards_are_kept_out_of_training_statistics(tmp_path):
    def run(log_dir, with_val):
        model = make_model()
        mon = ShiftMonitor(model, log_dir, every_n_steps=1, reference_steps=3,
                           tensorboard=False)

        def val(s, x):
            if with_val and s % 2 == 0:  # an eval pass inside a sampled step
                model.eval()
                with torch.no_grad():
                    model(DIGITS[:64] * 3)  # a very different distribution
                model.train()
        train(model, mon, 8, on_step=val)
        mon.close()
        return mon
    a, b = run(tmp_path / "a", False), run(tmp_path / "b", True)
    np.testing.assert_array_equal(a._ref.flat, b._ref.flat)  # reference untouched
    val = [r for r in records(tmp_path / "b", "step") if r["phase"] == "val"]
    assert [r["step"] for r in val] == [0, 2, 4, 6]
    assert val[0]["layers"]["0"]["vs_previous"] is None  # first val sample
    assert val[2]["layers"]["0"]["vs_reference"]["mean_shift"]["ratio"] > 10
    assert all(a.phase == "val" for a in b.alerts if a.step in (4, 6))  # default: phase any


def test_nonfinite_values_fail_and_every_step_check(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=10, check_finite_every_step=True,
                       tensorboard=False)
    for s in range(15):
        x = DIGITS[:8].clone()
        if s == 13:  # an unsampled step
            x[0, 0, 0, 0] = math.nan
        model(x)
        mon.step()
    mon.close()
    bad = [(a.step, a.layer, a.rule, a.value) for a in mon.alerts]
    assert bad[0] == (13, "0", "nonfinite", 1.0)


def test_collapsed_input_fails_after_two_samples(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=False)
    for s in range(6):
        x = DIGITS[:8] if s < 3 else torch.zeros(8, 1, 8, 8)
        model(x)
        mon.step()
    mon.close()
    collapsed = [(a.step, a.layer) for a in mon.alerts if a.rule == "collapsed-input"]
    assert collapsed[0] == (4, "0")  # zeros from step 3; patience 2


def test_schedule_warmup_and_global_step(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=3, warmup_steps=4, tensorboard=False)
    assert [s for s in range(15) if mon.is_sampled(s)] == [4, 7, 10, 13]
    for s in (100, 101, 102, 103, 104, 105, 106, 107):  # caller-numbered steps
        if s == 100:
            mon.disarm()
        model(DIGITS[:8])
        mon.step(global_step=s)
    mon.close()
    assert [r["step"] for r in records(tmp_path, "step")] == [103, 106]


def test_hooks_removed_on_close_and_on_exception(tmp_path):
    model = make_model()

    def hooks():
        return sum(len(m._forward_pre_hooks) + len(m._forward_hooks) for m in model.modules())
    with pytest.raises(RuntimeError, match="boom"), \
            ShiftMonitor(model, tmp_path, tensorboard=False) as mon:
        assert hooks() > 0
        raise RuntimeError("boom")
    assert hooks() == 0 and mon.closed
    end = records(tmp_path, "end")[0]
    assert end["reason"] == "RuntimeError: boom" and end["stopped"] is False
    mon.close()  # safe twice
    with pytest.raises(RuntimeError, match="closed"):
        mon.step()


def test_no_autograd_graph_or_activation_is_kept(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=False)
    x = DIGITS[:8].clone().requires_grad_(True)
    probe = weakref.ref(x)
    out = model(x)
    out.sum().backward()
    mon.step()
    del x, out
    gc.collect()
    assert probe() is None
    mon.close()


def test_bad_options_name_the_field(tmp_path):
    model = make_model()
    for kwargs, msg in [
        ({"every_n_steps": 0}, "'every_n_steps' must be an integer >= 1"),
        ({"warmup_steps": -1}, "'warmup_steps' must be an integer >= 0"),
        ({"on_alert": "halt"}, "'on_alert' must be one of 'record', 'stop', 'raise'"),
        ({"layers": "conv9"}, "'layers' pattern 'conv9' matches no module"),
        ({"rules": [Rule("js", threshold=1, layers=["fc"])]}, "pattern 'fc' matches no"),
        ({"bins": 1}, "'bins' must be an integer >= 2"),
        ({"tensorboard": True}, "'tensorboard=True' needs a 'log_dir'"),
    ]:
        with pytest.raises(ConfigError, match=msg):
            ShiftMonitor(model, None, **kwargs)
    assert sum(len(m._forward_pre_hooks) for m in model.modules()) == 0
