"""ShiftCallback with a real Lightning Trainer on CPU (single process and ddp_spawn).

Scenario (our own): a regression model reads 8 sensor channels; partway through the run the
sensor gains an offset (the input mean moves by ``shift`` standard deviations).  The
TensorBoard files are read back with TensorBoard's own ``EventAccumulator``.
"""

from __future__ import annotations

import gc
import json
import os
import subprocess
import sys
from pathlib import Path

import lightning.pytorch as pl
import pytest
import torch
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
from torch import nn
from torch.utils.data import DataLoader, Dataset

from shiftwatch.errors import ConfigError, ShiftAlertError
from shiftwatch.lightning import ShiftCallback
from shiftwatch.rules import Rule, default_rules

FEATURES = 8
BATCH = 16


# ---------------------------------------------------------------- scenario pieces
class SensorData(Dataset):
    """Deterministic samples (seeded by index).  Sample ``i`` belongs to optimizer step
    ``i // step_size`` (no shuffling); from ``shift_step`` on its input mean is moved by
    ``shift`` standard deviations.  With ``odd_only`` only odd indices move: under DDP
    with two ranks those are exactly rank 1's samples (DistributedSampler, no shuffle).
    With ``period`` the samples repeat every ``period`` steps."""

    def __init__(self, steps: int, *, step_size: int = BATCH, shift_step: int | None = None,
                 shift: float = 2.0, seed: int = 0, odd_only: bool = False,
                 period: int | None = None) -> None:
        self.n, self.step_size, self.shift_step = steps * step_size, step_size, shift_step
        self.shift, self.seed, self.odd_only = shift, seed, odd_only
        self.wrap = self.n if period is None else period * step_size

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int):
        g = torch.Generator().manual_seed(self.seed * 1_000_003 + i % self.wrap)
        x = torch.randn(FEATURES, generator=g)
        moved = self.shift_step is not None and i // self.step_size >= self.shift_step
        if moved and (not self.odd_only or i % 2 == 1):
            x = x + self.shift
        return x, x[:2].sum(0, keepdim=True)


class Regressor(pl.LightningModule):
    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.net = nn.Sequential(nn.Linear(FEATURES, 16), nn.ReLU(), nn.LayerNorm(16),
                                 nn.Linear(16, 1))

    def forward(self, x):
        return self.net(x)

    def training_step(self, batch, batch_idx):
        x, y = batch
        loss = nn.functional.mse_loss(self(x), y)
        self.log("train_loss", loss)
        return loss

    def validation_step(self, batch, batch_idx):
        x, y = batch
        self.log("val_loss", nn.functional.mse_loss(self(x), y))

    def configure_optimizers(self):
        return torch.optim.SGD(self.parameters(), lr=0.01)


class CompiledRegressor(Regressor):
    def configure_model(self) -> None:
        # Compiled after ShiftCallback.setup registered its hooks; traced at the first
        # forward.  Backend "aot_eager": the same Dynamo tracing (which decides whether
        # the hooks fire) without Inductor's C++ code generation, which here took 96 s
        # from a cold cache because the armed hooks are traced into the graph.
        if not isinstance(self.net, torch._dynamo.eval_frame.OptimizedModule):
            self.net = torch.compile(self.net, backend="aot_eager")


class ShardedRegressor(Regressor):
    """Feeds each rank a fixed shard: rank r gets samples r, r + 2, ... in order (a plain
    DistributedSampler without shuffling; Lightning's automatic one always shuffles
    training data, which would mix rank 1's samples into rank 0's batches)."""

    def __init__(self, data: Dataset, batch_size: int) -> None:
        super().__init__()
        self.data, self.batch_size = data, batch_size

    def train_dataloader(self) -> DataLoader:
        sampler = torch.utils.data.DistributedSampler(self.data, shuffle=False)
        return DataLoader(self.data, batch_size=self.batch_size, sampler=sampler)


class RankRecorder(pl.Callback):
    """Writes what each rank ended with (a real callback, one JSON file per rank)."""

    def __init__(self, out_dir: str) -> None:
        self.out_dir = out_dir

    def _write(self, trainer, **extra) -> None:
        rec = {"rank": trainer.global_rank, "global_step": trainer.global_step,
               "should_stop": trainer.should_stop, **extra}
        Path(self.out_dir, f"rank{trainer.global_rank}.json").write_text(json.dumps(rec))

    def on_train_end(self, trainer, pl_module) -> None:
        self._write(trainer, ended="normally")

    def on_exception(self, trainer, pl_module, exception) -> None:
        self._write(trainer, ended=type(exception).__name__,
                    step=getattr(exception, "step", None))

    def teardown(self, trainer, pl_module, stage: str) -> None:
        # Lightning leaves a gloo group to interpreter exit, where a rank rarely died by
        # SIGABRT after its work was done (seen once in ~20 full runs); end it in order
        # here instead, as tests/test_distributed.py does: no collective follows fit's
        # teardown under ddp_spawn (rank 0 then only saves the weights for the parent).
        dist = torch.distributed
        if stage == "fit" and dist.is_available() and dist.is_initialized():
            gc.collect()  # a DistributedDataParallel wrapper holds the group in cycles
            dist.barrier()
            dist.destroy_process_group()


def loader(data: Dataset) -> DataLoader:
    return DataLoader(data, batch_size=BATCH)


def make_trainer(root: Path, callbacks: list, **options) -> pl.Trainer:
    settings = dict(
        default_root_dir=str(root), accelerator="cpu", devices=1, max_steps=20,
        enable_progress_bar=False, enable_model_summary=False, enable_checkpointing=False,
        log_every_n_steps=1, limit_val_batches=0,
    )
    settings.update(options)
    return pl.Trainer(callbacks=callbacks, **settings)


def read_events(path: Path) -> list[dict]:
    return [json.loads(line) for line in Path(path).read_text().splitlines()]


def step_records(records, phase="train"):
    return [r for r in records if r["kind"] == "step" and r["phase"] == phase]


def accumulate(log_dir) -> EventAccumulator:
    acc = EventAccumulator(str(log_dir), size_guidance={"scalars": 0, "tensors": 0})
    acc.Reload()
    return acc


# ---------------------------------------------------------------- construction
def test_import_without_lightning_names_the_extra_and_front_stays_light():
    code = (
        "import sys\n"
        "import shiftwatch, shiftwatch.distributed, shiftwatch.monitor\n"
        "assert 'lightning' not in sys.modules and 'pytorch_lightning' not in sys.modules\n"
        # documented way to make an import fail as if the package were absent
        "sys.modules['lightning'] = None\n"
        "try:\n"
        "    import shiftwatch.lightning\n"
        "except ModuleNotFoundError as exc:\n"
        "    print(exc)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert "pip install shiftwatch[lightning]" in out.stdout


def test_options_are_checked_at_construction_and_define_the_state_key():
    with pytest.raises(ConfigError, match="'every_n_steps'"):
        ShiftCallback(every_n_steps=0)
    with pytest.raises(ConfigError, match="'on_alert'"):
        ShiftCallback(on_alert="halt")
    with pytest.raises(ConfigError, match="'val_batches'"):
        ShiftCallback(val_batches=-1)
    a = ShiftCallback(layers=["net.0"], every_n_steps=10)
    assert a.state_key == ShiftCallback(layers="net.0", every_n_steps=10,
                                        on_alert="stop").state_key  # not defining
    assert a.state_key != ShiftCallback(layers=["net.3"], every_n_steps=10).state_key
    assert a.state_key != ShiftCallback(layers=["net.0"], every_n_steps=20).state_key


# ---------------------------------------------------------------- single process
@pytest.mark.timeout(120)
def test_fit_stops_within_two_samples_of_a_shift_and_logs_the_alert(tmp_path):
    every, shift_step = 2, 20
    cb = ShiftCallback(every_n_steps=every, reference_steps=3, on_alert="stop")
    trainer = make_trainer(tmp_path, [cb], max_steps=60, limit_val_batches=2,
                           val_check_interval=10)
    trainer.fit(Regressor(), loader(SensorData(60, shift_step=shift_step)),
                loader(SensorData(2, seed=1)))

    # stopped by the monitor, within two samples (steps 20 or 22) of the shift
    assert trainer.should_stop and trainer.global_step < 60
    assert shift_step < trainer.global_step <= shift_step + 2 * every
    log_dir = Path(trainer.logger.log_dir)
    records = read_events(log_dir / "events.jsonl")
    alerts = [r for r in records if r["kind"] == "alert"]
    fails = [a for a in alerts if a["severity"] == "fail"]
    assert fails and all(a["step"] >= shift_step for a in alerts)  # no alarm before it
    first = fails[0]
    assert first["layer"] == "net.0" and first["action"] == "stop"
    assert first["step"] == trainer.global_step - 1  # the stop takes effect at once
    # x-axis: trainer.global_step, one record per sampled optimizer step
    assert [r["step"] for r in step_records(records)] == list(range(0, first["step"] + 1, every))
    # sanity-check batches ignored: the first validation record is after 10 steps
    assert [r["step"] for r in step_records(records, "val")][:2] == [10, 20]
    assert not [a for a in alerts if a["phase"] == "val"]  # validation data did not move

    # TensorBoard: the logger's own writer holds Lightning's scalars and ours
    (events_file,) = [f for f in os.listdir(log_dir) if "tfevents" in f]
    acc = accumulate(log_dir)
    scalars = set(acc.Tags()["scalars"])
    assert "train_loss" in scalars
    tag = "shift.train.mean_shift.vs_reference/net.0"
    points = {e.step: e.value for e in acc.Scalars(tag)}
    assert points[first["step"]] == pytest.approx(first["value"], rel=1e-6)  # float32
    texts = acc.Tensors("shift.alerts/text_summary")
    assert any(t.step == first["step"] and "net.0" in t.tensor_proto.string_val[0].decode()
               for t in texts)


@pytest.mark.timeout(120)
def test_resume_continues_steps_reference_previous_and_rule_counters(tmp_path):
    # fires once the layer has been over 0 (always) for 3 samples with a reference:
    # samples 6, 8 fall in the first run, 10 in the resumed one
    counting = Rule("mean_shift", against="reference", units="raw", threshold=0.0,
                    patience=3, cooldown=100, layers=["net.0"], name="needs-three")
    options = dict(every_n_steps=2, reference_steps=3, rules=[*default_rules(), counting])
    # batches repeat every 10 steps: after a resume at step 10, whether Lightning restarts
    # the (non-stateful) loader or skips ahead, step s sees the same data in both runs
    data = SensorData(20, period=10)

    whole = ShiftCallback(**options)
    make_trainer(tmp_path / "whole", [whole], max_steps=20).fit(Regressor(), loader(data))

    first = ShiftCallback(**options)
    ckpt = pl.callbacks.ModelCheckpoint(dirpath=tmp_path / "ckpt", every_n_train_steps=10)
    make_trainer(tmp_path / "a", [first, ckpt], max_steps=10,
                 enable_checkpointing=True).fit(Regressor(), loader(data))
    path = ckpt.last_model_path or ckpt.best_model_path
    assert path and Path(path).exists()
    saved = torch.load(path, weights_only=True)  # tensors and plain types only
    state = saved["callbacks"][first.state_key]
    assert state["step"] == 10 and state["reference"]["steps"] == [0, 2, 4]

    second = ShiftCallback(**options)
    make_trainer(tmp_path / "b", [second], max_steps=20).fit(
        Regressor(), loader(data), ckpt_path=path)

    def events(root):
        (f,) = Path(root).rglob("events.jsonl")
        return read_events(f)

    ev_whole, ev_a, ev_b = events(tmp_path / "whole"), events(tmp_path / "a"), \
        events(tmp_path / "b")
    steps_b = step_records(ev_b)
    assert [r["step"] for r in steps_b] == [10, 12, 14, 16, 18]
    assert not [r for r in ev_b if r["kind"] == "reference"]  # restored, not pooled again
    assert steps_b[0]["layers"]["net.0"]["vs_previous"] is not None  # previous restored
    # the resumed run computes exactly what the uninterrupted run did from step 10 on
    want = {r["step"]: r for r in step_records(ev_whole) if r["step"] >= 10}
    for r in steps_b:
        for layer, entry in r["layers"].items():
            for against in ("vs_previous", "vs_reference"):
                for metric, d in entry[against].items():
                    expect = want[r["step"]]["layers"][layer][against][metric]["value"]
                    assert d["value"] == pytest.approx(expect, rel=1e-6, abs=1e-12)

    def fired(ev):
        return [a["step"] for a in ev if a["kind"] == "alert" and a["rule"] == "needs-three"]

    assert fired(ev_a) == [] and fired(ev_b) == fired(ev_whole) == [10]


@pytest.mark.timeout(120)
def test_validation_data_from_another_distribution_gives_validation_alerts(tmp_path):
    def run(root, val_shift, **options):
        cb = ShiftCallback(every_n_steps=2, reference_steps=3)
        trainer = make_trainer(root, [cb], max_steps=30, limit_val_batches=4,
                               val_check_interval=10, num_sanity_val_steps=2, **options)
        val = SensorData(4, shift_step=0, shift=val_shift, seed=7)
        trainer.fit(Regressor(), loader(SensorData(30)), loader(val))
        return read_events(Path(trainer.logger.log_dir) / "events.jsonl"), trainer

    records, trainer = run(tmp_path / "shifted", 2.0)
    alerts = [r for r in records if r["kind"] == "alert"]
    val_alerts = [a for a in alerts if a["phase"] == "val"]
    assert not [a for a in alerts if a["phase"] == "train"]  # training data alone: quiet
    assert {a["rule"] for a in val_alerts} == {"val-entry-shift"}
    assert {a["layer"] for a in val_alerts} == {"net.0"}
    assert sorted({a["step"] for a in val_alerts}) == [10, 20, 30]
    # sanity-check batches (also shifted) were ignored: no validation record at step 0
    assert [r["step"] for r in step_records(records, "val")] == [10, 20, 30]
    tags = set(accumulate(trainer.logger.log_dir).Tags()["scalars"])
    assert "shift.val.mean_shift.vs_reference/net.0" in tags
    # vs_train: each validation run (at global_step G, after optimizer step G - 1) against
    # the latest sampled training step before it
    train_steps = [r["step"] for r in step_records(records)]
    for r in step_records(records, "val"):
        assert r["train_step"] == max(s for s in train_steps if s < r["step"])
        assert r["layers"]["net.0"]["vs_train"]["mean_shift"]["ratio"] > 6  # the 2-std shift
    assert "shift.val.mean_shift.vs_train/net.0" in tags

    # control: validation data like the training data, under bf16 mixed precision
    records, _ = run(tmp_path / "same", 0.0, precision="bf16-mixed")
    assert not [r for r in records if r["kind"] == "alert"]
    assert all(r["layers"]["net.0"]["vs_train"]["mean_shift"]["ratio"] < 6
               for r in step_records(records, "val"))
    rec = step_records(records)[-1]["layers"]["net.2"]  # LayerNorm: receives bf16 ReLU output
    assert rec["count"] == BATCH * 16 and rec["nonfinite"] == 0 and 0 < rec["std"] < 10


@pytest.mark.timeout(120)
def test_raise_removes_the_hooks_and_carries_the_alert(tmp_path):
    cb = ShiftCallback(every_n_steps=2, reference_steps=3, on_alert="raise")
    model = Regressor()
    trainer = make_trainer(tmp_path, [cb], max_steps=40)
    with pytest.raises(ShiftAlertError) as info:
        trainer.fit(model, loader(SensorData(40, shift_step=12)))
    assert info.value.layer == "net.0" and info.value.step == 12
    assert all(not m._forward_pre_hooks for m in model.modules())  # on_exception cleaned up
    records = read_events(Path(trainer.logger.log_dir) / "events.jsonl")
    assert records[-1]["kind"] == "end" and "ShiftAlertError" in records[-1]["reason"]


@pytest.mark.timeout(120)
def test_gradient_accumulation_merges_the_batches_of_a_sampled_step(tmp_path):
    cb = ShiftCallback(every_n_steps=2, reference_steps=2, tensorboard=False)
    trainer = make_trainer(tmp_path, [cb], max_steps=6, accumulate_grad_batches=3)
    trainer.fit(Regressor(), loader(SensorData(18)))
    assert trainer.global_step == 6
    (f,) = tmp_path.rglob("events.jsonl")
    steps = step_records(read_events(f))
    assert [r["step"] for r in steps] == [0, 2, 4]  # optimizer steps, not batches
    # one sample = the three micro-batches of its optimizer step; their merged mean is
    # the mean of those 48 samples (computed here directly)
    data = SensorData(18)
    for r in steps:
        first = 3 * BATCH * r["step"]
        xs = torch.stack([data[i][0] for i in range(first, first + 3 * BATCH)])
        assert r["layers"]["net.0"]["count"] == 3 * BATCH * FEATURES
        assert r["layers"]["net.0"]["mean"] == pytest.approx(float(xs.double().mean()),
                                                             rel=1e-6)


@pytest.mark.timeout(180)
def test_compiled_submodule_is_still_sampled(tmp_path):
    cb = ShiftCallback(every_n_steps=2, reference_steps=2, tensorboard=False)
    model = CompiledRegressor()
    make_trainer(tmp_path, [cb], max_steps=6).fit(model, loader(SensorData(6)))
    assert isinstance(model.net, torch._dynamo.eval_frame.OptimizedModule)
    (f,) = tmp_path.rglob("events.jsonl")
    steps = step_records(read_events(f))
    assert [r["step"] for r in steps] == [0, 2, 4]
    for r in steps:
        assert r["layers"]["net.0"]["count"] == BATCH * FEATURES
        assert r["layers"]["net.3"]["count"] == BATCH * 16


# ---------------------------------------------------------------- two processes
@pytest.mark.timeout(240)
def test_ddp_spawn_two_ranks_merge_and_stop_at_the_same_step(tmp_path):
    """Only rank 1's samples move; the merged statistics see it, and both ranks stop at
    the same global step through the strategy's boolean reduction.

    A shift confined to half of the global batch makes the batch's row means bimodal,
    which the noise floor reads as spread: the score then saturates near sqrt(rows)/0.8
    noise units however large the shift (7 at 32 rows, 10 at 64), so 32 rows per rank."""
    every, shift_step, per_rank = 2, 12, 32
    cb = ShiftCallback(every_n_steps=every, reference_steps=3, on_alert="stop")
    out = tmp_path / "ranks"
    out.mkdir()
    trainer = make_trainer(
        tmp_path, [cb, RankRecorder(str(out))], devices=2, strategy="ddp_spawn",
        max_steps=40, use_distributed_sampler=False,
    )
    data = SensorData(40, step_size=2 * per_rank, shift_step=shift_step, shift=3.0,
                      odd_only=True)
    trainer.fit(ShardedRegressor(data, per_rank))

    ranks = [json.loads((out / f"rank{r}.json").read_text()) for r in (0, 1)]
    assert ranks[0]["global_step"] == ranks[1]["global_step"]
    assert all(r["should_stop"] and r["ended"] == "normally" for r in ranks)
    stopped = ranks[0]["global_step"]
    assert shift_step < stopped <= shift_step + 2 * every
    # rank zero alone wrote, and what it wrote is merged over both ranks' batches
    (events_path,) = tmp_path.rglob("events.jsonl")
    records = read_events(events_path)
    for r in step_records(records):
        assert r["layers"]["net.0"]["count"] == 2 * per_rank * FEATURES
    fails = [a for a in records if a["kind"] == "alert" and a["severity"] == "fail"]
    assert fails and fails[0]["step"] == stopped - 1 and fails[0]["layer"] == "net.0"
