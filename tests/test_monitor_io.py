"""ShiftMonitor outputs and persistence: event log, TensorBoard files (read back with
TensorBoard's own reader), state_dict round trip, saved references, bad log_dir."""

from __future__ import annotations

import copy
import json
import os
import subprocess
import sys
import time

import numpy as np
import pytest
import torch
from tensorboard_server import get_json, start_tensorboard, stop_tensorboard
from test_monitor import DIGITS, make_model, records, train

from shiftwatch import ConfigError, ShiftMonitor


def strip(recs):
    return [{k: v for k, v in r.items() if k != "time"} for r in recs]


def test_event_log_records_follow_the_schema(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=2, reference_steps=2, tensorboard=False)
    train(model, mon, 20, shift_at=14, shift=1.0)
    # flushed line by line: readable while the run is still going
    assert records(tmp_path, "alert")
    mon.close()
    recs = records(tmp_path)
    assert all(r["schema"] == 1 and isinstance(r["time"], float) for r in recs)
    assert [r["kind"] for r in recs][:2] == ["run", "step"] and recs[-1]["kind"] == "end"
    run = recs[0]
    assert run["settings"]["every_n_steps"] == 2 and run["shiftwatch"]
    assert [x["name"] for x in run["layers"]] == ["0", "1", "4", "5", "8"]
    assert {x["name"] for x in run["rules"]} >= {"nonfinite", "entry-shift"}
    step = next(r for r in recs if r["kind"] == "step" and r["step"] == 10)
    layer = step["layers"]["4"]
    assert set(layer) >= {"count", "nonfinite", "mean", "std", "min", "max", "vs_previous",
                          "vs_reference", "channels"}
    ms = layer["vs_reference"]["mean_shift"]
    assert ms["ratio"] == pytest.approx(ms["value"] / ms["noise"])
    assert set(layer["vs_previous"]) == {"mean_shift", "log_std_ratio", "gauss_kl", "hist_kl",
                                         "js", "psi", "w1"}
    ch = layer["channels"]["vs_reference"]["mean_shift"]
    assert set(ch) == {"mean", "max", "max_ratio", "worst"} and len(ch["worst"]) == 3
    assert ch["max"] >= ch["mean"] and all(0 <= c < 8 for c in ch["worst"])
    first = next(r for r in recs if r["kind"] == "step")
    assert first["layers"]["0"]["vs_previous"] is None
    second = [r for r in recs if r["kind"] == "step"][1]
    assert second["layers"]["0"]["vs_previous"]["js"]["value"] is None  # no histogram yet
    alert = next(r for r in recs if r["kind"] == "alert")
    assert {"step", "layer", "metric", "value", "threshold", "severity"} <= set(alert)


def test_state_dict_round_trip_continues_identically(tmp_path):
    kw = {"every_n_steps": 2, "reference_steps": 3, "tensorboard": False}
    # one uninterrupted run
    model = make_model()
    full = ShiftMonitor(model, tmp_path / "full", **kw)
    train(model, full, 40, shift_at=30, shift=0.5)
    full.close()
    # the same run stopped at step 17 and resumed from a checkpoint
    model = make_model()
    first = ShiftMonitor(model, tmp_path / "resumed", **kw)
    train(model, first, 17)
    ckpt = tmp_path / "ckpt.pt"
    torch.save({"monitor": first.state_dict(), "model": model.state_dict()}, ckpt)
    first.close()
    state = torch.load(ckpt, weights_only=True)  # tensors and plain types only
    model2 = make_model(seed=99)
    model2.load_state_dict(state["model"])
    second = ShiftMonitor(model2, tmp_path / "resumed", **kw)
    second.load_state_dict(state["monitor"])
    assert second.global_step == 17 and second.reference_ready
    train(model2, second, 40, shift_at=30, shift=0.5, start=17)
    second.close()
    a = [r for r in strip(records(tmp_path / "full")) if r["kind"] in ("step", "alert")]
    b = [r for r in strip(records(tmp_path / "resumed")) if r["kind"] in ("step", "alert")]
    assert a == b and any(r["kind"] == "alert" for r in a)
    assert [x.to_record() for x in full.alerts] == [x.to_record() for x in second.alerts]


def test_load_state_dict_refuses_other_layers(tmp_path):
    mon = ShiftMonitor(make_model(), None, every_n_steps=1)
    state = mon.state_dict()
    other = ShiftMonitor(make_model(), None, exclude=["8"])
    with pytest.raises(ConfigError, match="saved for other layers"):
        other.load_state_dict(state)
    with pytest.raises(ConfigError, match="must be a ShiftMonitor.state_dict"):
        other.load_state_dict({"step": 3})


@pytest.mark.parametrize("suffix", [".json", ".npz"])
def test_saved_reference_is_reused_by_another_run(suffix, tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path / "a", every_n_steps=1, reference_steps=4,
                       tensorboard=False)
    with pytest.raises(ConfigError, match="not ready yet"):
        mon.save_reference(tmp_path / f"ref{suffix}")
    train(model, mon, 6)
    path = mon.save_reference(tmp_path / f"ref{suffix}")
    mon.close()
    if suffix == ".npz":
        with np.load(path, allow_pickle=False) as z:  # loads without pickle
            assert "meta" in z.files
    else:
        assert json.loads(path.read_text())["kind"] == "shiftwatch.reference"
    model2 = copy.deepcopy(model)
    mon2 = ShiftMonitor(model2, tmp_path / "b", every_n_steps=1, reference=path,
                        tensorboard=False)
    assert mon2.reference_ready and mon2.bins == mon.bins
    np.testing.assert_array_equal(mon2._ref.flat, mon._ref.flat)
    np.testing.assert_array_equal(mon2._ranges, mon._ranges)
    train(model2, mon2, 3)
    mon2.close()
    ref_rec = records(tmp_path / "b", "reference")[0]
    assert ref_rec["source"] == "file" and ref_rec["path"] == os.fspath(path)
    first = records(tmp_path / "b", "step")[0]["layers"]["0"]
    assert first["vs_reference"]["js"]["value"] is not None  # histograms from sample one
    # a reference for another model is refused with the reason
    with pytest.raises(ConfigError, match="no summary for watched layer"):
        ShiftMonitor(make_model(), None, layers=["0", "4"], outputs=True, reference=path)
    with pytest.raises(ConfigError, match="'bins' must match"):
        ShiftMonitor(make_model(), None, reference=path, bins=10)


def test_reference_file_errors(tmp_path):
    for name, content, msg in [
        ("ref.txt", "x", "must end in .json or .npz"),
        ("missing.json", None, "does not exist"),
        ("bad.json", "{", "cannot be read"),
        ("other.json", '{"kind": "something"}', "not a shiftwatch reference"),
    ]:
        path = tmp_path / name
        if content is not None:
            path.write_text(content)
        with pytest.raises(ConfigError, match=msg):
            ShiftMonitor(make_model(), None, reference=path)


def test_unwritable_log_dir_fails_at_construction(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("not a directory")
    model = make_model()
    with pytest.raises(ConfigError, match=r"'log_dir' must be a directory"):
        ShiftMonitor(model, blocker / "run")
    assert sum(len(m._forward_pre_hooks) for m in model.modules()) == 0


def test_tensorboard_events_read_back_with_tensorboards_reader(tmp_path):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    model = make_model()
    mon = ShiftMonitor(model, tmp_path, every_n_steps=2, reference_steps=2)
    train(model, mon, 30, shift_at=20, shift=1.0)
    mon.close()
    acc = EventAccumulator(str(tmp_path), size_guidance={"scalars": 0, "histograms": 0,
                                                         "tensors": 0})
    acc.Reload()
    tags = acc.Tags()
    assert "shift.train.mean_shift.vs_reference/0" in tags["scalars"]
    assert "input.train.std/4" in tags["scalars"]
    assert "hist.train/1" in tags["histograms"]
    series = acc.Scalars("shift.train.mean_shift.vs_reference/0")
    logged = {r["step"]: r["layers"]["0"]["vs_reference"]["mean_shift"]["ratio"]
              for r in records(tmp_path, "step") if r["layers"]["0"]["vs_reference"]}
    assert [e.step for e in series] == sorted(logged)
    assert [e.value for e in series] == pytest.approx([logged[s] for s in sorted(logged)],
                                                      rel=1e-6)  # float32 in the event
    hist = acc.Histograms("hist.train/1")[-1].histogram_value
    assert hist.num == records(tmp_path, "step")[-1]["layers"]["1"]["count"]
    text = [e for e in tags["tensors"] if e.startswith("shift.alerts")]
    assert text, tags["tensors"]


def test_tensorboard_histogram_equals_numpys_of_the_layer_input(tmp_path):
    """The histogram the monitor writes for a layer is numpy's histogram of that layer's
    input at that step over the reference's edges (reference: ``numpy.histogram``), with
    TensorBoard's bucket form: right edges, the overflow bucket ending at the max."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    from shiftwatch.reference import load_reference_file

    model = make_model()
    seen = []
    model[4].register_forward_pre_hook(lambda m, a: seen.append(a[0].detach().clone()))
    mon = ShiftMonitor(model, tmp_path, every_n_steps=1, reference_steps=2)
    train(model, mon, 8, shift_at=6, shift=1.5, inner=True)  # values move past the edges
    mon.save_reference(tmp_path / "ref.json")
    mon.close()
    edges = load_reference_file(tmp_path / "ref.json")[1]["4"].edges.numpy()
    xs = seen[-1].double().numpy().ravel()  # 8 x 8 x 8 x 8 values: no subsample
    inside, _ = np.histogram(xs, bins=edges)
    inside[-1] -= np.sum(xs == edges[-1])  # numpy's last bin is closed; ours is half-open
    want = [np.sum(xs < edges[0]), *inside, np.sum(xs >= edges[-1])]
    limits = [*edges, xs.max()]
    nz = np.flatnonzero(want)
    acc = EventAccumulator(str(tmp_path), size_guidance={"histograms": 0})
    acc.Reload()
    last = acc.Histograms("hist.train/4")[-1]
    h = last.histogram_value
    assert last.step == 7
    assert list(h.bucket) == [float(c) for c in want[nz[0]:nz[-1] + 1]]
    assert list(h.bucket_limit) == pytest.approx(limits[nz[0]:nz[-1] + 1], rel=1e-12)
    assert (h.min, h.max, h.num) == pytest.approx((xs.min(), xs.max(), xs.size), rel=1e-6)
    assert h.sum == pytest.approx(xs.sum(), rel=1e-6, abs=1e-6)
    assert h.sum_squares == pytest.approx((xs * xs).sum(), rel=1e-6)
    assert want[-1] > 0  # the overflow bucket is exercised


def test_works_without_tensorboard_installed(tmp_path):
    code = (
        "import sys; sys.modules['tensorboard'] = None  # import fails as if not installed\n"
        "import torch, shiftwatch\n"
        "m = torch.nn.Sequential(torch.nn.Linear(4, 4))\n"
        f"mon = shiftwatch.ShiftMonitor(m, {str(tmp_path)!r}, every_n_steps=1)\n"
        "for _ in range(3):\n"
        "    m(torch.randn(8, 4)); mon.step()\n"
        "mon.close()\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert os.listdir(tmp_path) == ["events.jsonl"]
    assert len(records(tmp_path, "step")) == 3
    code_required = code.replace("every_n_steps=1", "every_n_steps=1, tensorboard=True")
    out = subprocess.run([sys.executable, "-c", code_required], capture_output=True, text=True)
    assert out.returncode != 0 and "pip install shiftwatch[tensorboard]" in out.stderr


def test_tensorboard_false_writes_only_the_event_log(tmp_path):
    model = make_model()
    with ShiftMonitor(model, tmp_path, every_n_steps=1, tensorboard=False) as mon:
        model(DIGITS[:8])
        mon.step()
    assert os.listdir(tmp_path) == ["events.jsonl"]


def test_live_tensorboard_server_shows_the_monitors_tags_and_layout(tmp_path):
    model = make_model()
    mon = ShiftMonitor(model, tmp_path / "exp1", every_n_steps=2, reference_steps=2)
    train(model, mon, 16)
    mon.close()
    proc, port = start_tensorboard(tmp_path)
    try:
        want = {f"shift.train.{m}.vs_{a}/{layer}" for m in ("mean_shift", "w1")
                for a in ("previous", "reference") for layer in mon.layers}
        deadline, tags = time.monotonic() + 60, {}
        while time.monotonic() < deadline:  # the server loads files in the background
            tags = get_json(port, "data/plugin/scalars/tags").get("exp1", {})
            if want <= set(tags):
                break
            time.sleep(0.5)
        assert want <= set(tags)
        layout = get_json(port, "data/plugin/custom_scalars/layout")
        charts = {c["title"]: c["multiline"]["tag"][0] for cat in layout["category"]
                  for c in cat["chart"]}
        regex = charts["mean_shift vs reference (ratio to noise)"]
        served = get_json(port, "data/plugin/custom_scalars/scalars", run="exp1", tag=regex)
        # one line per watched layer in the chart
        assert set(served["tag_to_events"]) == {
            f"shift.train.mean_shift.vs_reference/{layer}" for layer in mon.layers}
    finally:
        stop_tensorboard(proc)
