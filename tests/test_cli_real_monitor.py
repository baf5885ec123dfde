"""The commands on logs written by the real ShiftMonitor (not the synthetic writer).

Two tiny training runs of one small CNN on random images: in one, the data shifts by
1.5 standard deviations at step 80.  The induced run must gate as failing and the clean
one as passing; summary and compare must point at the data-facing layer.
"""

from __future__ import annotations

import json

import pytest
import torch
from torch import nn

from shiftwatch.cli import main
from shiftwatch.monitor import ShiftMonitor


def _train(log_dir, *, shift_at: int | None, seed: int) -> None:
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                          nn.Flatten(), nn.Linear(8 * 8 * 8, 10))
    opt = torch.optim.SGD(model.parameters(), lr=0.01)
    with ShiftMonitor(model, log_dir=log_dir, every_n_steps=5, warmup_steps=5,
                      reference_steps=4, tensorboard=False) as mon:
        for s in range(120):
            x = torch.randn(16, 3, 8, 8)
            if shift_at is not None and s >= shift_at:
                x = x + 1.5
            loss = model(x).square().mean()
            opt.zero_grad()
            loss.backward()
            opt.step()
            mon.step()


@pytest.fixture(scope="module")
def real_runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("real")
    _train(root / "clean", shift_at=None, seed=0)
    _train(root / "shifted", shift_at=80, seed=0)
    return root / "clean", root / "shifted"


def test_gate_on_real_runs(real_runs, capsys):
    clean, shifted = real_runs
    assert main(["gate", str(shifted), "--fail-on", "fail"]) == 1
    out = capsys.readouterr().out
    assert "gate FAILED" in out and "step 80 [train] 0:" in out
    assert main(["gate", str(clean), "--fail-on", "fail"]) == 0


def test_summary_and_compare_on_real_runs(real_runs, capsys, tmp_path):
    clean, shifted = real_runs
    assert main(["summary", str(shifted), "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["complete"] and s["layers"][0]["name"] == "0"  # the data-facing conv
    assert s["layers"][0]["first_alert"]["step"] == 80
    assert s["steps"]["train"]["samples"] == len(range(5, 120, 5))
    assert main(["compare", str(shifted), str(clean), "--json"]) == 0
    c = json.loads(capsys.readouterr().out)
    assert {r["layer"]: r["steadier"] for r in c["layers"]}["0"] == "B"
    assert main(["report", str(shifted), "-o", str(tmp_path / "r.html")]) == 0
