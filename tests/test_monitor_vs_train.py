"""``vs_train``: each eval-mode (val) sample against the latest training sample.

Data: scikit-learn's bundled digits images (8x8); a small CNN with BatchNorm.  The layer
inputs are captured independently with PyTorch forward hooks of our own, and the
``mean_shift`` value is recomputed from them with numpy in float64 using the published
formula ``|m_cur - m_ref| / s_ref`` (README, Metrics; population standard deviation).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits
from torch import nn

from shiftwatch import ConfigError, Rule, ShiftMonitor
from shiftwatch.rules import rules_from_toml

DIGITS = torch.tensor(load_digits().images, dtype=torch.float32).unsqueeze(1) / 16.0


def make_model() -> nn.Sequential:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU(),
                         nn.Flatten(), nn.Linear(4 * 64, 10))


def records(log_dir: Path, kind: str | None = None, phase: str | None = None) -> list[dict]:
    recs = [json.loads(line) for line in (log_dir / "events.jsonl").read_text().splitlines()]
    return [r for r in recs if (kind is None or r["kind"] == kind)
            and (phase is None or r.get("phase") == phase)]


class Inputs:
    """A module's input per step and mode, as float64 numpy arrays (our own hook)."""

    def __init__(self, module: nn.Module) -> None:
        self.step = 0
        self.seen: dict[tuple[int, str], np.ndarray] = {}
        module.register_forward_hook(self._hook)

    def _hook(self, m: nn.Module, args: tuple, out: torch.Tensor) -> None:
        self.seen[(self.step, "train" if m.training else "val")] = (
            args[0].detach().double().numpy())


def run(log_dir, steps=6, *, val_every=2, rules=None):
    """Train at batch 4; at every ``val_every``-th step, after the backward pass, an eval
    pass over 16 other images."""
    model = make_model()
    fc = Inputs(model[4])
    opt = torch.optim.SGD(model.parameters(), lr=0.05)
    mon = ShiftMonitor(model, log_dir, every_n_steps=1, reference_steps=2, tensorboard=False,
                       rules=rules)
    g = torch.Generator().manual_seed(0)

    def val_pass(s):
        model.eval()
        with torch.no_grad():
            model(DIGITS[1000 + 16 * s:1016 + 16 * s])
        model.train()

    for s in range(steps):
        fc.step = s
        x = DIGITS[torch.randint(0, 900, (4,), generator=g)]
        nn.functional.cross_entropy(model(x), torch.randint(0, 10, (4,), generator=g)).backward()
        if s % val_every == 0:
            val_pass(s)
        opt.step()
        opt.zero_grad()
        mon.step()
    return mon, fc


def test_val_records_carry_vs_train_against_the_training_sample_of_their_step(tmp_path):
    mon, fc = run(tmp_path)
    mon.close()
    val, train = records(tmp_path, "step", "val"), records(tmp_path, "step", "train")
    assert [r["step"] for r in val] == [0, 2, 4] and len(train) == 6
    # training records are unchanged: no vs_train key, no train_step
    assert all("train_step" not in r for r in train)
    assert all("vs_train" not in e and "vs_train" not in e.get("channels", {})
               for r in train for e in r["layers"].values())
    for r in val:
        assert r["train_step"] == r["step"]
        tr, ev = fc.seen[(r["step"], "train")], fc.seen[(r["step"], "val")]
        d = r["layers"]["4"]["vs_train"]["mean_shift"]
        # outside reference: numpy float64 on the captured inputs, |m_cur - m_ref| / s_ref
        expect = abs(ev.mean() - tr.mean()) / tr.std()
        assert d["value"] == pytest.approx(expect, rel=1e-6)
        assert d["noise"] > 0 and d["ratio"] == pytest.approx(d["value"] / d["noise"])
        # the same inner structure as vs_previous / vs_reference, channel views included
        e = r["layers"]["4"]
        assert set(e["vs_train"]) == set(e["vs_reference"] or e["vs_train"])
        assert set(e["channels"]["vs_train"]["mean_shift"]) == {"mean", "max", "max_ratio",
                                                                "worst"}
    # the existing comparisons are untouched: vs_previous is val against val
    assert val[0]["layers"]["4"]["vs_previous"] is None
    assert val[1]["layers"]["4"]["vs_previous"] is not None


def test_vs_train_is_null_before_any_training_sample_and_names_an_older_one(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=5, tensorboard=False)
    mon.arm("val")  # a validation loop before training, as Lightning's sanity check could
    with torch.no_grad():
        model.eval()(DIGITS[:16])
    mon.observe(0)
    mon.arm()  # back to labelling by module mode for the sampled step 0
    model.train()
    opt = torch.optim.SGD(model.parameters(), lr=0.05)
    for _ in range(7):  # sampled steps 0 and 5
        nn.functional.cross_entropy(model(DIGITS[:4]), torch.zeros(4, dtype=torch.long)).backward()
        opt.step()
        opt.zero_grad()
        mon.step()
    mon.arm("val")  # a validation run between sampled steps: the latest training sample is 5
    with torch.no_grad():
        model.eval()(DIGITS[16:32])
    mon.observe(7)
    mon.close()
    first, later = records(tmp_path, "step", "val")
    assert first["train_step"] is None
    assert all(e["vs_train"] is None for e in first["layers"].values())
    assert later["train_step"] == 5
    assert all(e["vs_train"]["mean_shift"]["value"] >= 0 for e in later["layers"].values())


def test_resumed_monitor_keeps_the_training_sample_step(tmp_path):
    mon, _ = run(tmp_path / "a", steps=3)
    state = mon.state_dict()
    mon.close()
    assert state["previous_steps"] == {"train": 2, "val": 2}
    again = ShiftMonitor(make_model(), tmp_path / "b", every_n_steps=1, reference_steps=2,
                         tensorboard=False)
    again.load_state_dict(state)
    assert again._prev_step == {"train": 2, "val": 2}
    older = {k: v for k, v in state.items() if k != "previous_steps"}  # a state from before
    again.load_state_dict(older)
    assert again._prev_step == {}
    again.close()


# ---------------------------------------------------------------- rules
def test_rule_against_train_judges_val_samples_only(tmp_path):
    # threshold 0: every available value fires, so the alerts show which samples it sees
    rule = Rule("mean_shift", against="train", phase="val", threshold=0.0, layers=["4"],
                name="val-mismatch")
    mon, _ = run(tmp_path, rules=[rule])
    mon.close()
    alerts = records(tmp_path, "alert")
    assert [(a["step"], a["phase"], a["against"]) for a in alerts] == [
        (0, "val", "train"), (2, "val", "train"), (4, "val", "train")]
    val = {r["step"]: r for r in records(tmp_path, "step", "val")}
    for a in alerts:
        assert a["raw"] == val[a["step"]]["layers"]["4"]["vs_train"]["mean_shift"]["value"]
    assert "mean_shift vs train" in alerts[0]["message"]


@pytest.mark.parametrize("phase", ["train", "any"])
def test_rule_against_train_outside_the_val_phase_is_a_clear_error(phase):
    with pytest.raises(ConfigError, match=r"'against' 'train'.*needs 'phase' 'val'.*"
                                          rf"\(got '{phase}'\); set phase = 'val'"):
        Rule("mean_shift", against="train", phase=phase, threshold=8.0)


def test_toml_rule_against_train_names_the_file_the_rule_and_the_fix():
    good = rules_from_toml('use_defaults = false\n[[rule]]\nmetric = "mean_shift"\n'
                           'against = "train"\nphase = "val"\nthreshold = 8.0\n')
    assert good[0].against == "train" and good[0].name == "mean_shift-vs-train"
    with pytest.raises(ConfigError, match=r"r\.toml: rule 1: 'against' 'train'.*set phase"):
        rules_from_toml('[[rule]]\nmetric = "mean_shift"\nagainst = "train"\nthreshold = 8.0\n',
                        source="r.toml")
    with pytest.raises(ConfigError, match=r"'against' must be one of 'previous', 'reference', "
                                          r"'train' \(got 'training'\)"):
        Rule("mean_shift", against="training", phase="val", threshold=8.0)


# ---------------------------------------------------------------- TensorBoard
def test_tensorboard_gets_vs_train_ratios_for_val_only(tmp_path):
    pytest.importorskip("tensorboard")
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=True)
    for s in range(2):
        model(DIGITS[4 * s:4 * s + 4])
        with torch.no_grad():
            model.eval()(DIGITS[100:116])
        model.train()
        mon.step()
    mon.close()
    acc = EventAccumulator(str(tmp_path), size_guidance={"scalars": 0})  # the real reader
    acc.Reload()
    tags = set(acc.Tags()["scalars"])
    assert "shift.val.mean_shift.vs_train/4" in tags
    assert not [t for t in tags if t.startswith("shift.train.") and ".vs_train" in t]
    (val,) = records(tmp_path, "step", "val")[1:]
    got = [e.value for e in acc.Scalars("shift.val.mean_shift.vs_train/4")]
    want = [r["layers"]["4"]["vs_train"]["mean_shift"]["ratio"]
            for r in records(tmp_path, "step", "val")]
    assert got == pytest.approx(want, rel=1e-6) and val["train_step"] == 1
    # the custom-scalars layout charts vs_train for the val phase, and only there; its
    # regexes match the tags written (TensorBoard applies them with re.match)
    import re

    from tensorboard.plugins.custom_scalar import layout_pb2

    acc = EventAccumulator(str(tmp_path), size_guidance={"tensors": 0})
    acc.Reload()
    (layout_event,) = acc.Tensors("custom_scalars__config__")[-1:]
    layout = layout_pb2.Layout.FromString(layout_event.tensor_proto.string_val[0])
    charts = {c.title: (cat.title, c.multiline.tag[0]) for cat in layout.category
              for c in cat.chart}
    vs_train = {t: v for t, v in charts.items() if " vs train " in t}
    assert vs_train and all("(val)" in cat for cat, _ in vs_train.values())
    _, regex = charts["mean_shift vs train (ratio to noise)"]
    assert "shift.val.mean_shift.vs_train/4" in {t for t in tags if re.match(regex, t)}
