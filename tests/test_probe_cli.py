"""``shiftwatch probe`` through the real console entry, with factories in a tmp .py file."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import uuid
from pathlib import Path

import pytest
import torch

from shiftwatch.cli import main
from shiftwatch.cli.probe_cmd import load_factory
from shiftwatch.probe import probe_normalization

FACTORIES = '''
import torch
from torch import nn

def _gen(seed):
    return torch.Generator().manual_seed(seed)

def bn_model():
    torch.manual_seed(0)
    m = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.BatchNorm2d(4), nn.ReLU(),
                      nn.Flatten(), nn.Linear(4 * 6 * 6, 5), nn.BatchNorm1d(5))
    with torch.no_grad():
        m[5].running_mean.fill_(2.0)   # stale on purpose
    return m

def gn_model():
    return nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.GroupNorm(2, 4))

def plain_model():
    return nn.Sequential(nn.Flatten(), nn.Linear(36, 3))

def not_a_model():
    return [1, 2, 3]

def broken_factory():
    raise RuntimeError("weights file missing")

def data():
    g = _gen(1)
    return [torch.randn(16, 1, 6, 6, generator=g) for _ in range(4)]

def few():
    return [torch.randn(3, 1, 6, 6)]

def wrong_shape():
    return [torch.randn(8, 3, 6, 6)]

NOT_CALLABLE = 5
'''


@pytest.fixture
def fac(tmp_path: Path) -> Path:
    path = tmp_path / f"probe_factories_{uuid.uuid4().hex[:8]}.py"
    path.write_text(textwrap.dedent(FACTORIES))
    return path


def _run(capsys, *args: str) -> tuple[int, str, str]:
    code = main(["probe", *args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_probe_prints_table_and_writes_json_and_plot(fac, tmp_path, capsys):
    js, png = tmp_path / "r.json", tmp_path / "r.png"
    code, out, err = _run(capsys, "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
                          "--batch-sizes", "2,4,8", "--json", str(js), "--plot", str(png))
    assert code == 0, err
    assert "BatchNorm2d" in out and "b=8" in out and "STALE" in out
    doc = json.loads(js.read_text())
    assert doc["batch_sizes_requested"] == [2, 4, 8]
    names = [(lr["name"], lr["type"]) for lr in doc["layers"]]
    assert names == [("1", "BatchNorm2d"), ("5", "BatchNorm1d")]
    for lr in doc["layers"]:
        assert set(lr["batch_sizes"]) == {"2", "4", "8"}
        assert all(v["mean_error"] > 0 for v in lr["batch_sizes"].values())
    assert "5" in doc["stale_layers"]
    assert png.read_bytes()[:4] == b"\x89PNG"


def test_dotted_module_from_the_current_directory(fac, capsys, monkeypatch):
    monkeypatch.chdir(fac.parent)
    monkeypatch.setattr(sys, "path", list(sys.path))  # the CLI adds the cwd; undo after
    code, out, err = _run(capsys, "--model", f"{fac.stem}:gn_model", "--data", f"{fac.stem}:data")
    assert code == 0, err
    assert "group(2) (this layer)" in out
    sys.modules.pop(fac.stem, None)


def test_recalibrate_and_save_state_dict(fac, tmp_path, capsys):
    sd = tmp_path / "recal.pt"
    code, out, err = _run(capsys, "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
                          "--save-recalibrated", str(sd))
    assert code == 0, err
    assert "recalibrated on a copy" in out and "STALE -> recalibrated" in out
    factories = load_factory("--model", f"{fac}:bn_model").__globals__
    model = factories["bn_model"]()
    model.load_state_dict(torch.load(sd))
    check = probe_normalization(model, factories["data"]())
    assert check.stale_layers == [] and max(lr.running_stats.kl for lr in check.layers) < 1e-9


def _one_error_line(code: int, err: str, *needles: str) -> None:
    assert code == 2
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("shiftwatch probe: error: "), err
    for needle in needles:
        assert needle in lines[0], err


@pytest.mark.parametrize("model,data,needles", [
    ("plain_model", "data", ["no normalization layers"]),
    ("bn_model", "few", ["at least 4 samples", "gave 3"]),
    ("bn_model", "wrong_shape", ["rejected batch 0", "expected input"]),
    ("missing", "data", ["'--model' factory 'missing' not found", "bn_model"]),
    ("NOT_CALLABLE", "data", ["zero-argument callable"]),
    ("broken_factory", "data", ["raised RuntimeError: weights file missing"]),
    ("not_a_model", "data", ["must return a torch.nn.Module"]),
])
def test_bad_input_gives_one_message_and_exit_2(fac, capsys, model, data, needles):
    code, out, err = _run(capsys, "--model", f"{fac}:{model}", "--data", f"{fac}:{data}")
    _one_error_line(code, err, *needles)
    assert out == ""


@pytest.mark.parametrize("spec,needles", [
    ("no_such_module_x9:make", ["'--model' module 'no_such_module_x9' is not importable"]),
    ("nowhere/file.py:make", ["'--model' file 'nowhere/file.py' does not exist"]),
    ("just_a_name", ["must be MODULE:FACTORY"]),
])
def test_factory_path_that_does_not_import(fac, capsys, spec, needles):
    code, _, err = _run(capsys, "--model", spec, "--data", f"{fac}:data")
    _one_error_line(code, err, *needles)


def test_module_that_fails_on_import(tmp_path, fac, capsys):
    bad = tmp_path / "bad_factories.py"
    bad.write_text("import torch\nraise ValueError('config file not found')\n")
    code, _, err = _run(capsys, "--model", f"{bad}:make", "--data", f"{fac}:data")
    _one_error_line(code, err, "failed to import", "ValueError: config file not found")


def test_bad_batch_sizes(fac, capsys):
    code, _, err = _run(capsys, "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
                        "--batch-sizes", "1,x")
    _one_error_line(code, err, "'--batch-sizes' must be comma-separated integers >= 2")


def test_existing_output_is_kept_unless_overwrite(fac, tmp_path, capsys):
    js = tmp_path / "mine.json"
    js.write_text("my notes")
    code, _, err = _run(capsys, "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
                        "--json", str(js))
    _one_error_line(code, err, "exists; pass --overwrite")
    assert js.read_text() == "my notes"
    code, _, err = _run(capsys, "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
                        "--json", str(js), "--overwrite")
    assert code == 0 and json.loads(js.read_text())["schema"] == 1


def test_plot_skipped_without_batchnorm(fac, tmp_path, capsys):
    png = tmp_path / "p.png"
    code, _, err = _run(capsys, "--model", f"{fac}:gn_model", "--data", f"{fac}:data",
                        "--plot", str(png))
    assert code == 0 and not png.exists() and "no plot written" in err


def test_console_script_subprocess(fac, tmp_path):
    exe = Path(sys.executable).with_name("shiftwatch")  # .venv/bin/shiftwatch
    assert exe.exists(), exe
    js = tmp_path / "sub.json"
    proc = subprocess.run(
        [str(exe), "probe", "--model", f"{fac}:bn_model", "--data", f"{fac}:data",
         "--json", str(js)],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 0, proc.stderr
    assert "Batch statistics (BatchNorm)" in proc.stdout
    assert json.loads(js.read_text())["layers"][0]["batch_sizes"]["2"]["mean_error"] > 0
    bad = subprocess.run([str(exe), "probe", "--model", f"{fac}:plain_model", "--data",
                          f"{fac}:data"], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "no normalization layers" in bad.stderr
