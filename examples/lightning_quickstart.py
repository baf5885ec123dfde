"""shiftwatch with Lightning: one callback watches the layer inputs of a LightningModule.

Scenario (our own invention): a parcel-sorting station reads handwritten digits from an
8x8 camera (scikit-learn's bundled digits images).  Two things go wrong:

* the validation images were recorded at a second station whose camera has a higher
  black level (+0.15 of the normalised range) -- the callback reports a *validation
  shift* (phase ``val``, a warning) at every validation run;
* at step 200 the training station's camera gets a firmware update (gain x1.4, black
  level +0.2) -- the callback stops the run (``on_alert="stop"``).

Run: ``.venv/bin/python examples/lightning_quickstart.py`` (about 15-30 s on 2 CPU cores);
``--devices 2`` trains with two CPU processes (``strategy="ddp_spawn"``, gloo): the
statistics of both processes are merged before any metric is computed, and both stop at
the same step.  ``--same-val-camera`` records validation at the training station.
Afterwards: ``tensorboard --logdir <printed directory>`` or ``shiftwatch summary``.
"""

from __future__ import annotations

import argparse
import json
import logging
from pathlib import Path

import lightning.pytorch as pl
import torch
from sklearn.datasets import load_digits
from torch import nn
from torch.utils.data import DataLoader, Dataset

from shiftwatch.lightning import ShiftCallback

BATCH = 32
CHANGE_AT = 200  # optimizer step of the firmware update


class Camera(Dataset):
    """Digit images as the station's camera delivers them.  Sample ``i`` is seen at
    optimizer step ``i // step_size`` (no shuffling), so the update happens at a known
    step; ``black`` adds a constant black level."""

    def __init__(self, images, labels, *, steps, step_size, change_at=None, black=0.0):
        self.images, self.labels = images, labels
        self.n, self.step_size, self.change_at, self.black = steps * step_size, step_size, \
            change_at, black

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int):
        j = i % len(self.images)
        x = self.images[j] + self.black
        if self.change_at is not None and i // self.step_size >= self.change_at:
            x = 1.4 * x + 0.2  # firmware update: gain and black level
        return x, self.labels[j]


class DigitReader(pl.LightningModule):
    def __init__(self, train: Dataset, val: Dataset, batch: int) -> None:
        super().__init__()
        self.train_set, self.val_set, self.batch = train, val, batch
        self.net = nn.Sequential(
            nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
            nn.Conv2d(8, 16, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
            nn.Linear(16, 10),
        )

    def forward(self, x):
        return self.net(x)

    def training_step(self, batch, batch_idx):
        x, y = batch
        loss = nn.functional.cross_entropy(self(x), y)
        self.log("train_loss", loss)
        return loss

    def validation_step(self, batch, batch_idx):
        x, y = batch
        self.log("val_acc", (self(x).argmax(1) == y).float().mean(), sync_dist=True)

    def configure_optimizers(self):
        return torch.optim.Adam(self.parameters(), lr=3e-3)

    def _loader(self, data: Dataset) -> DataLoader:
        # a fixed order per process, so "step 200" means step 200 on every process
        sampler = None
        if torch.distributed.is_available() and torch.distributed.is_initialized():
            sampler = torch.utils.data.DistributedSampler(data, shuffle=False)
        return DataLoader(data, batch_size=self.batch, sampler=sampler)

    def train_dataloader(self) -> DataLoader:
        return self._loader(self.train_set)

    def val_dataloader(self) -> DataLoader:
        return self._loader(self.val_set)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--devices", type=int, default=1, help="CPU processes (1 or 2)")
    parser.add_argument("--same-val-camera", action="store_true",
                        help="validation images from the training station")
    parser.add_argument("--root", default="runs/lightning_quickstart")
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING, format="%(message)s")
    torch.manual_seed(0)

    digits = load_digits()
    images = torch.tensor(digits.images, dtype=torch.float32).unsqueeze(1) / 16.0
    labels = torch.tensor(digits.target)
    split = 1500
    per_process = BATCH // args.devices
    train = Camera(images[:split], labels[:split], steps=400, step_size=BATCH,
                   change_at=CHANGE_AT)
    val = Camera(images[split:], labels[split:], steps=4, step_size=BATCH,
                 black=0.0 if args.same_val_camera else 0.15)

    watch = ShiftCallback(every_n_steps=10, reference_steps=5, on_alert="stop")
    trainer = pl.Trainer(
        callbacks=[watch], default_root_dir=args.root, max_steps=400, accelerator="cpu",
        devices=args.devices,
        strategy="ddp_spawn" if args.devices > 1 else "auto", use_distributed_sampler=False,
        val_check_interval=50, limit_val_batches=4, log_every_n_steps=10,
        enable_checkpointing=False, enable_progress_bar=False, enable_model_summary=False,
    )
    trainer.fit(DigitReader(train, val, per_process))

    # the event log is the record every process agrees on (rank 0 wrote it)
    (events,) = sorted(Path(args.root).rglob("events.jsonl"))[-1:]
    records = [json.loads(line) for line in events.read_text().splitlines()]
    alerts = [r for r in records if r["kind"] == "alert"]
    end = records[-1]
    print(f"\nstopped by shiftwatch: {end.get('stopped')}  (camera update at step {CHANGE_AT},"
          f" run ended at step {end.get('step')})")
    for phase in ("val", "train"):
        mine = [a for a in alerts if a["phase"] == phase]
        print(f"{phase} alerts: {len(mine)}")
        for a in mine[:3]:
            print(f"  {a['message']}")
    print(f"logs: {events.parent}  (tensorboard --logdir {events.parent})")


if __name__ == "__main__":
    main()
