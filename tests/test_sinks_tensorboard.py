"""TensorBoard sink, checked with TensorBoard's own parts: its event-file reader
(EventAccumulator, EventFileLoader), its display conversion (data_compat), its checksum
and a real TensorBoard server on loopback queried through its HTTP data API."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from tensorboard import data_compat
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
from tensorboard.backend.event_processing.event_file_loader import EventFileLoader
from tensorboard.compat.tensorflow_stub.pywrap_tensorflow import masked_crc32c as tb_crc
from tensorboard.plugins.custom_scalar import layout_pb2
from tensorboard.util import tensor_util
from tensorboard_server import get_json, start_tensorboard, stop_tensorboard
from torch.utils.tensorboard import SummaryWriter

from shiftwatch.errors import ConfigError, ShiftWatchWarning
from shiftwatch.sinks import (
    HistogramData,
    TensorBoardSink,
    histogram_tag,
    layer_regex,
    metric_regex,
    scalar_tag,
    stat_tag,
)
from shiftwatch.sinks.eventfile import _CHUNK, crc32c, masked_crc32c
from shiftwatch.summary import make_edges, summarize

ROOT = Path(__file__).resolve().parents[1]
LAYOUT_TAG = "custom_scalars__config__"


def accumulate(path) -> EventAccumulator:
    acc = EventAccumulator(str(path), size_guidance={"scalars": 0, "histograms": 0, "tensors": 0})
    acc.Reload()
    return acc


def raw_values(log_dir, tag: str):
    """(step, Summary.Value) pairs of ``tag`` straight from the event files."""
    out = []
    for name in sorted(os.listdir(log_dir)):
        if "tfevents" in name:
            for event in EventFileLoader(os.path.join(log_dir, name)).Load():
                out += [(event.step, v) for v in event.summary.value if v.tag == tag]
    return out


# ----------------------------------------------------------------------- checksum
@settings(max_examples=60, deadline=None)
@given(st.binary(max_size=3 * _CHUNK + 7))
def test_checksum_equals_tensorboards_own(data):
    # reference: TensorBoard's pure-Python masked CRC-32C, used by its record reader
    assert masked_crc32c(data) == tb_crc(data)


@pytest.mark.parametrize("n", [0, 1, 3, 4, 5, 63, 64, 65, _CHUNK - 1, _CHUNK, _CHUNK + 1, 20000])
def test_checksum_at_block_boundaries(n):
    data = np.random.default_rng(n).integers(0, 256, n, dtype=np.uint8).tobytes()
    assert masked_crc32c(data) == tb_crc(data)


def test_checksum_check_value():
    # CRC-32C check value of "123456789" (RFC 3720 family catalogue value, from memory)
    assert crc32c(b"123456789") == 0xE3069283


# ---------------------------------------------------------------------------- tags
def test_tag_scheme_groups_by_metric_and_keeps_layer_dots():
    assert scalar_tag("train", "reference", "mean_shift", "features.0") == (
        "shift.train.mean_shift.vs_reference/features.0"
    )
    assert scalar_tag("val", "previous", "psi", "head.fc", kind="noise") == (
        "shift.val.psi.vs_previous.noise/head.fc"
    )
    assert stat_tag("train", "std", "conv1") == "input.train.std/conv1"
    assert histogram_tag("train", "blocks.3") == "hist.train/blocks.3"
    assert scalar_tag("train", "reference", "w1", "my block:in") == (
        "shift.train.w1.vs_reference/my_block_in"
    )
    assert histogram_tag("train", "") == "hist.train/_root"


@pytest.mark.parametrize(
    "args, kwargs, field",
    [
        (("train", "reference", "mean.shift", "x"), {}, "'metric'"),
        (("tr.ain", "reference", "psi", "x"), {}, "'phase'"),
        (("train", "ref/x", "psi", "x"), {}, "'against'"),
        (("train", "reference", "psi", "x"), {"kind": "ratios"}, "'kind'"),
        (("train", "reference", "psi", 3), {}, "'layer'"),
    ],
)
def test_bad_tag_fields_are_config_errors(args, kwargs, field):
    with pytest.raises(ConfigError, match=field):
        scalar_tag(*args, **kwargs)


# ----------------------------------------------------------------------- histograms
def test_histogram_data_validates_its_shape():
    good = dict(edges=[0.0, 1.0], counts=[0, 1, 0], min=0.5, max=0.5, num=1, sum=0.5,
                sum_squares=0.25)  # fmt: skip
    HistogramData(**good)
    with pytest.raises(ValueError, match="len\\(edges\\) \\+ 1"):
        HistogramData(**{**good, "counts": [0, 1]})
    with pytest.raises(ValueError, match="strictly increasing"):
        HistogramData(**{**good, "edges": [1.0, 1.0]})
    with pytest.raises(ValueError, match="non-negative"):
        HistogramData(**{**good, "counts": [0, -1, 0]})


def test_histograms_from_core_counts_match_numpy(tmp_path):
    gen = torch.Generator().manual_seed(3)
    x = torch.randn(40, 3, 5, 5, generator=gen, dtype=torch.float64) * 1.5 + 0.2
    edges = make_edges(-2.0, 2.0, 16)
    summary = summarize(x, edges=edges, max_hist_values=None)
    hist = HistogramData.from_summary(summary)
    with TensorBoardSink(tmp_path) as sink:
        sink.write_step(7, "train", {}, {histogram_tag("train", "conv1"): hist})

    xs, e = x.numpy().ravel(), edges.numpy()
    inside, _ = np.histogram(xs[(xs >= e[0]) & (xs < e[-1])], bins=e)  # reference: numpy
    under, over = int((xs < e[0]).sum()), int((xs >= e[-1]).sum())
    assert under > 0 and over > 0  # the test data exercises both outer buckets

    (event,) = accumulate(tmp_path).Histograms("hist.train/conv1")
    value = event.histogram_value
    assert event.step == 7
    assert value.num == xs.size
    assert value.sum == pytest.approx(xs.sum(), rel=1e-9, abs=1e-9)
    assert value.sum_squares == pytest.approx((xs**2).sum(), rel=1e-9)
    assert value.min == xs.min() and value.max == xs.max()

    # TensorBoard's own conversion to displayed [left, right, count] buckets
    ((_, proto_value),) = raw_values(tmp_path, "hist.train/conv1")
    shown = tensor_util.make_ndarray(data_compat.migrate_value(proto_value).tensor)
    expected = np.array(
        [[xs.min(), e[0], under]]
        + [[e[i], e[i + 1], inside[i]] for i in range(len(e) - 1)]
        + [[e[-1], xs.max(), over]],
        dtype=np.float32,
    )
    np.testing.assert_allclose(shown, expected, rtol=1e-6)


def test_outer_empty_buckets_are_dropped_and_empty_histograms_stay_empty(tmp_path):
    narrow = HistogramData(edges=[0, 1, 2, 3, 4], counts=[0, 0, 5, 2, 0, 0], min=1.2,
                           max=2.9, num=7, sum=13.0, sum_squares=26.0)  # fmt: skip
    empty = HistogramData(edges=[0, 1], counts=[0, 0, 0], min=float("inf"),
                          max=float("-inf"), num=0, sum=0, sum_squares=0)  # fmt: skip
    assert narrow.buckets() == ([2.0, 3.0], [5.0, 2.0])
    assert empty.buckets() == ([], [])
    with TensorBoardSink(tmp_path) as sink:
        sink.write_step(1, "train", {}, {"hist.train/a": narrow, "hist.train/b": empty})
    ((_, a),) = raw_values(tmp_path, "hist.train/a")
    ((_, b),) = raw_values(tmp_path, "hist.train/b")
    shown = tensor_util.make_ndarray(data_compat.migrate_value(a).tensor)
    np.testing.assert_allclose(shown, [[1.2, 2.0, 5.0], [2.0, 2.9, 2.0]], rtol=1e-6)
    assert tensor_util.make_ndarray(data_compat.migrate_value(b).tensor).shape == (0, 3)


# ---------------------------------------------------------------- scalars, text, layout
LAYERS = ("features.0", "features.0.bn", "head fc")  # a prefix of another; a space
METRICS = ("mean_shift", "psi")
# the monitor's comparisons: val samples are also compared with the training sample
AGAINST = {"train": ("previous", "reference"), "val": ("previous", "reference", "train")}


def write_demo_run(sink: TensorBoardSink) -> dict[str, list[tuple[int, float]]]:
    """Write a small run; return tag -> [(step, value)] of the scalars written."""
    written: dict[str, list[tuple[int, float]]] = {}
    sink.write_layout(METRICS, LAYERS, ("train", "val"), against=AGAINST)
    for step in (10, 20, 30):
        for phase in ("train", "val"):
            scalars = {}
            for i, layer in enumerate(LAYERS):
                for j, metric in enumerate(METRICS):
                    for against in AGAINST[phase]:
                        ratio = step / 10 + i + 0.25 * j
                        scalars[scalar_tag(phase, against, metric, layer)] = ratio
                        scalars[scalar_tag(phase, against, metric, layer, kind="value")] = 0.01
                scalars[stat_tag(phase, "std", layer)] = 1.0
            scalars[scalar_tag(phase, "previous", "psi", "late")] = None  # not available
            sink.write_step(step, phase, scalars, walltime=1000.0 + step)
            for tag, value in scalars.items():
                if value is not None:
                    written.setdefault(tag, []).append((step, value))
    sink.write_alert(20, "**features.0** `mean_shift` vs reference = 9.1 x noise")
    return written


def test_scalars_text_and_layout_read_back(tmp_path):
    with TensorBoardSink(tmp_path / "run") as sink:
        written = write_demo_run(sink)
        sink.write_layout(METRICS, LAYERS, ("train", "val"), against=AGAINST)  # not rewritten
    acc = accumulate(tmp_path / "run")
    assert set(acc.Tags()["scalars"]) == set(written)
    for tag, points in written.items():
        events = acc.Scalars(tag)
        assert [(e.step, e.value) for e in events] == [
            (s, pytest.approx(v, rel=1e-6))
            for s, v in points  # stored as float32
        ]
        assert [e.wall_time for e in events] == [1000.0 + s for s, _ in points]

    (alert,) = acc.Tensors("shift.alerts/text_summary")
    assert alert.step == 20
    assert alert.tensor_proto.string_val[0].decode() == (
        "**features.0** `mean_shift` vs reference = 9.1 x noise"
    )
    assert acc.SummaryMetadata("shift.alerts/text_summary").plugin_data.plugin_name == "text"

    layouts = acc.Tensors(LAYOUT_TAG)
    assert len(layouts) == 1  # written once
    layout = layout_pb2.Layout.FromString(layouts[0].tensor_proto.string_val[0])
    tags = set(written)
    ratio = {t for t in tags if re.fullmatch(r"shift\.[a-z]+\.[a-z_]+\.vs_[a-z]+/.*", t)}
    seen = 0
    for category in layout.category:
        for chart in category.chart:
            (regex,) = chart.multiline.tag
            matched = {t for t in tags if re.match(regex, t)}  # TensorBoard uses re.match
            phase = category.title.split("(")[1].split(")")[0]
            against = chart.title.split(" vs ")[1].split(" ")[0]
            name = chart.title.split(" vs ")[0]
            if name in METRICS:  # one chart per metric and comparison, all layers
                want = {scalar_tag(phase, against, name, layer) for layer in LAYERS}
            else:  # one chart per layer and comparison, all metrics
                (layer,) = [x for x in LAYERS if x.replace(" ", "_") == name]
                want = {scalar_tag(phase, against, m, layer) for m in METRICS}
                assert category.closed
            assert matched == want and matched <= ratio
            seen += 1
    n_against = len(AGAINST["train"]) + len(AGAINST["val"])
    assert seen == (len(METRICS) + len(LAYERS)) * n_against
    vs_train = [c.title for cat in layout.category if "(val)" in cat.title
                for c in cat.chart if c.title.split(" vs ")[1].startswith("train ")]
    assert len(vs_train) == len(METRICS) + len(LAYERS)


def test_layout_comparisons_per_phase_must_name_charted_phases(tmp_path):
    with TensorBoardSink(tmp_path) as sink, pytest.raises(ConfigError, match="'against'.*val"):
        sink.write_layout(METRICS, LAYERS, ("train",), against={"val": ("train",)})


def test_new_layout_arguments_replace_the_layout(tmp_path):
    with TensorBoardSink(tmp_path) as sink:
        sink.write_layout(["psi"], ["a"])
        sink.write_step(5, "train", {scalar_tag("train", "reference", "psi", "a"): 1.0})
        sink.write_layout(["psi", "w1"], ["a", "b"])
    layouts = accumulate(tmp_path).Tensors(LAYOUT_TAG)
    assert [e.step for e in layouts] == [0, 5]
    last = layout_pb2.Layout.FromString(layouts[-1].tensor_proto.string_val[0])
    regexes = [c.multiline.tag[0] for cat in last.category for c in cat.chart]
    assert metric_regex("train", "w1", "previous") in regexes
    assert layer_regex("train", ["psi", "w1"], "reference", "b") in regexes


def test_real_tensorboard_server_serves_tags_layout_and_matches_regexes(tmp_path):
    logdir = tmp_path / "logs"
    with TensorBoardSink(logdir / "exp1") as sink:
        written = write_demo_run(sink)
    proc, port = start_tensorboard(logdir)
    try:
        deadline = time.monotonic() + 60
        tags: dict = {}
        while time.monotonic() < deadline:  # the server loads the files in the background
            tags = get_json(port, "data/plugin/scalars/tags").get("exp1", {})
            if set(tags) == set(written):
                break
            time.sleep(0.5)
        assert set(tags) == set(written)

        layout = get_json(port, "data/plugin/custom_scalars/layout")
        titles = [c["title"] for c in layout["category"]]
        assert titles == [
            "shift (train): metrics across layers",
            "shift (train): layers across metrics",
            "shift (val): metrics across layers",
            "shift (val): layers across metrics",
        ]
        charts = {ch["title"]: ch["multiline"]["tag"][0] for ch in layout["category"][0]["chart"]}
        regex = charts["mean_shift vs reference (ratio to noise)"]
        assert regex == metric_regex("train", "mean_shift", "reference")
        # the server applies the regex itself: one line per layer
        served = get_json(port, "data/plugin/custom_scalars/scalars", run="exp1", tag=regex)
        assert served["regex_valid"]
        assert set(served["tag_to_events"]) == {
            scalar_tag("train", "reference", "mean_shift", layer) for layer in LAYERS
        }
        tag = scalar_tag("train", "reference", "mean_shift", "features.0.bn")
        assert [[s, v] for _, s, v in served["tag_to_events"][tag]] == [
            [s, pytest.approx(v, rel=1e-6)] for s, v in written[tag]
        ]
        texts = get_json(port, "data/plugin/text/text", run="exp1", tag="shift.alerts/text_summary")
        assert "<strong>features.0</strong>" in texts[0]["text"]
    finally:
        stop_tensorboard(proc)


# ------------------------------------------------------------------ sharing a writer
def test_shared_writer_is_used_and_left_open(tmp_path):
    writer = SummaryWriter(str(tmp_path))
    sink = TensorBoardSink(writer=writer)
    assert sink.writer is writer and not sink.owns_writer and sink.event_file is None
    sink.write_step(3, "train", {scalar_tag("train", "reference", "psi", "fc"): 2.0})
    sink.close()
    sink.close()  # idempotent
    writer.add_scalar("loss", 0.5, 3)  # still open: the user's writer keeps working
    writer.close()
    acc = accumulate(tmp_path)
    assert set(acc.Tags()["scalars"]) == {"loss", "shift.train.psi.vs_reference/fc"}


def test_lightning_logger_experiment_can_be_shared(tmp_path):
    from lightning.pytorch.loggers import TensorBoardLogger

    logger = TensorBoardLogger(save_dir=str(tmp_path), name="demo")
    sink = TensorBoardSink(writer=logger.experiment)
    sink.write_step(4, "train", {scalar_tag("train", "previous", "w1", "conv1"): 1.5})
    sink.write_alert(4, "conv1 moved")
    sink.close()
    logger.log_metrics({"train_loss": 0.25}, step=4)  # Lightning keeps logging
    logger.finalize("success")
    acc = accumulate(logger.log_dir)
    assert {"train_loss", "shift.train.w1.vs_previous/conv1"} <= set(acc.Tags()["scalars"])
    assert acc.Scalars("shift.train.w1.vs_previous/conv1")[0].value == 1.5


def test_foreign_writer_objects_are_refused(tmp_path):
    with pytest.raises(TypeError, match="'writer' must be a torch.utils.tensorboard"):
        TensorBoardSink(writer=object())


# --------------------------------------------------------------------------- errors
def test_unwritable_log_dir_fails_at_construction(tmp_path):
    blocker = tmp_path / "somefile"
    blocker.write_text("a file, not a directory")  # fails even for root
    with pytest.raises(ConfigError, match=r"'log_dir' must be a directory .*somefile/sub"):
        TensorBoardSink(blocker / "sub")


# torch's writer thread dies with the error (and reports it); that is the failure we want
@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_write_error_in_shared_writer_warns_once_and_training_goes_on(tmp_path):
    before = set(threading.enumerate())
    writer = SummaryWriter(str(tmp_path))
    (worker,) = set(threading.enumerate()) - before  # the writer's background thread
    sink = TensorBoardSink(writer=writer)
    tag = scalar_tag("train", "reference", "psi", "fc")
    sink.write_step(1, "train", {tag: 1.0})
    sink.flush()
    # TensorBoard's writer re-opens its file for every record: put a directory in its
    # place and the next write fails in its writer thread (IsADirectoryError).
    (event_file,) = [p for p in tmp_path.iterdir() if "tfevents" in p.name]
    event_file.unlink()
    event_file.mkdir()
    with pytest.warns(ShiftWatchWarning, match="could not write TensorBoard events") as caught:
        for step in range(2, 8):
            sink.write_step(step, "train", {tag: float(step)})
            sink.flush()
            sink.write_alert(step, "still training")
    assert len([w for w in caught if issubclass(w.category, ShiftWatchWarning)]) == 1
    assert sink.events_dropped >= 10
    sink.close()
    worker.join(timeout=10)  # it died with the error; let it finish reporting
    assert not worker.is_alive()


def test_file_size_limit_mid_run_keeps_earlier_events_readable(tmp_path):
    # A real mid-run failure of the sink's own file: the OS file-size limit (EFBIG).
    script = textwrap.dedent(
        f"""
        import json, resource, signal, warnings
        from shiftwatch.sinks import TensorBoardSink, scalar_tag
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        sink = TensorBoardSink({str(tmp_path)!r})
        soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
        resource.setrlimit(resource.RLIMIT_FSIZE, (4000, hard))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            for step in range(40):
                scalars = {{scalar_tag("train", "reference", f"m{{k}}", "conv1"): float(step)
                           for k in range(5)}}
                sink.write_step(step, "train", scalars)
        sink.close()
        print(json.dumps({{"warnings": [str(w.message) for w in caught],
                           "written": sink.events_written, "dropped": sink.events_dropped}}))
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60, cwd=ROOT
    )
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout.splitlines()[-1])
    assert len(report["warnings"]) == 1 and "File too large" in report["warnings"][0]
    assert report["written"] > 3 and report["dropped"] == 40 - report["written"]
    steps = [e.step for e in accumulate(tmp_path).Scalars("shift.train.m0.vs_reference/conv1")]
    assert steps == list(range(report["written"]))  # everything before the cut reads back


def test_write_after_close_is_dropped_with_a_warning(tmp_path):
    sink = TensorBoardSink(tmp_path)
    sink.close()
    with pytest.warns(ShiftWatchWarning, match="closed"):
        sink.write_step(1, "train", {"a/b": 1.0})
    assert sink.events_dropped == 1


def test_bad_step_arguments_raise(tmp_path):
    with TensorBoardSink(tmp_path) as sink:
        with pytest.raises(ConfigError, match="'step' must be a non-negative int"):
            sink.write_step(-1, "train", {})
        with pytest.raises(ConfigError, match="'phase'"):
            sink.write_step(1, "tr.ain", {})
        with pytest.raises(TypeError, match="must be a HistogramData"):
            sink.write_step(1, "train", {}, {"hist.train/x": [1, 2]})
        with pytest.raises(ValueError):
            sink.write_step(1, "train", {"a/b": "not a number"})


def test_missing_tensorboard_names_the_extra_and_import_stays_light():
    code = textwrap.dedent(
        """
        import sys
        import shiftwatch, shiftwatch.sinks
        heavy = sorted(m for m in sys.modules
                       if m.split(".")[0] in ("tensorboard", "lightning", "matplotlib")
                       or m == "torch.utils.tensorboard")
        print("loaded:", heavy)
        sys.modules["tensorboard"] = None  # as if the package were not installed
        try:
            shiftwatch.sinks.TensorBoardSink("unused")
        except ImportError as exc:
            print("error:", exc)
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, cwd=ROOT
    )
    assert done.returncode == 0, done.stderr
    assert "loaded: []" in done.stdout
    assert "error: TensorBoard logging needs the tensorboard package: " in done.stdout
    assert "pip install shiftwatch[tensorboard]" in done.stdout
    assert not (ROOT / "unused").exists()
