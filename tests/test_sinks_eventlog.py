"""The JSON Lines event log: records as README.md (schema 1) says, and failures
that never stop training.  Lines are read back with Python's own ``json`` parser in strict
mode (no NaN/Infinity tokens), the reference for what "valid JSON" means here."""

from __future__ import annotations

import ast
import json
import math
import os
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

from shiftwatch.errors import ConfigError, ShiftWatchWarning
from shiftwatch.sinks import EventLog, eventlog
from shiftwatch.sinks.eventlog import dumps_line, to_json_value

ROOT = Path(__file__).resolve().parents[1]


def _reject_constant(token: str):
    raise AssertionError(f"non-standard JSON token {token!r} in the event log")


def read_lines(path: Path) -> list[dict]:
    """Parse every line strictly (RFC 8259 JSON: NaN/Infinity are not allowed)."""
    return [
        json.loads(line, parse_constant=_reject_constant)
        for line in path.read_text(encoding="utf-8").splitlines()
    ]


def test_records_get_schema_and_time_and_keep_caller_dict(tmp_path):
    path = tmp_path / "run" / "events.jsonl"  # parent created on demand
    record = {"step": 3, "kind": "step", "phase": "train", "layers": {}}
    before = time.time()
    with EventLog(path) as log:
        assert log.path == path.absolute()
        assert log.write(record) is True
        assert log.write({"kind": "alert", "time": 12.5, "step": 3, "layer": "conv1"})
    after = time.time()
    assert record == {"step": 3, "kind": "step", "phase": "train", "layers": {}}  # unchanged
    first, second = read_lines(path)
    assert list(first)[:3] == ["schema", "kind", "time"]  # readable order
    assert first["schema"] == 1 and first["kind"] == "step" and first["step"] == 3
    assert before <= first["time"] <= after
    assert second["time"] == 12.5  # a given time is kept
    assert log.records_written == 2 and log.write_errors == 0


def test_nonfinite_floats_become_null_and_array_scalars_become_numbers(tmp_path):
    path = tmp_path / "events.jsonl"
    with EventLog(path) as log:
        log.write(
            {
                "kind": "step",
                "nan": float("nan"),
                "inf": math.inf,
                "ninf": -math.inf,
                "np32": np.float32(0.25),
                "np64_nan": np.float64("nan"),
                "npint": np.int64(7),
                "npbool": np.bool_(True),
                "tensor0d": torch.tensor(1.5),
                "tensor1d": torch.tensor([1.0, float("inf")]),
                "array": np.array([[1, 2], [3, 4]]),
                "path": tmp_path / "x",
                "nested": {"a": [float("nan"), {"b": math.inf}], 3: "int key"},
                "text": 'NaN "Infinity"',
            }
        )
    (line,) = read_lines(path)
    assert line["nan"] is None and line["inf"] is None and line["ninf"] is None
    assert line["np32"] == 0.25 and line["np64_nan"] is None
    assert line["npint"] == 7 and line["npbool"] is True
    assert line["tensor0d"] == 1.5 and line["tensor1d"] == [1.0, None]
    assert line["array"] == [[1, 2], [3, 4]]
    assert line["path"] == str(tmp_path / "x")
    assert line["nested"] == {"a": [None, {"b": None}], "3": "int key"}
    assert line["text"] == 'NaN "Infinity"'


json_leaf = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**70), 2**70),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=8),
)
json_tree = st.recursive(
    json_leaf,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4)
    ),
    max_leaves=25,
)


def _expected(value):
    """Independent statement of the rule: NaN/inf -> None, containers recursively."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _expected(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_expected(v) for v in value]
    return value


@settings(max_examples=150, deadline=None)
@given(json_tree)
def test_any_tree_round_trips_through_strict_json(tree):
    line = dumps_line({"kind": "step", "data": tree})  # orjson when installed
    assert "\n" not in line  # one record, one line
    parsed = json.loads(line, parse_constant=_reject_constant)
    assert parsed["data"] == _expected(tree)
    # the standard-library path (taken without orjson) gives the same values, and its
    # two branches (json's C encoder, and converting first) the same text
    std = eventlog._dumps_std({"kind": "step", "data": tree})
    assert json.loads(std, parse_constant=_reject_constant) == parsed
    slow = json.dumps(
        to_json_value({"kind": "step", "data": tree}),
        ensure_ascii=False,
        separators=(",", ":"),
        allow_nan=False,
    )
    assert std == slow


def test_log_lines_hold_the_same_values_with_and_without_orjson(tmp_path, monkeypatch):
    pytest.importorskip("orjson")  # the dev install has it: both encoders are compared
    record = {"kind": "step", "a": [0.1, 1e-05, -0.0, 5e-324, 1.7976931348623157e308],
              "nan": float("nan"), "inf": [float("inf"), -math.inf], "np": np.float64(2.5),
              "arr": np.array([1.0, np.nan]), "t": torch.tensor([3.0, 4.0]), "i": 2**70,
              "path": Path("runs/x"), "text": "Grüße ✓", "nested": {"k": (1, None, True)}}
    assert eventlog._orjson is not None
    with EventLog(tmp_path / "fast.jsonl") as log:
        log.write(record)
        log.write({k: v for k, v in record.items() if k != "i"})  # orjson takes this one
    monkeypatch.setattr(eventlog, "_orjson", None)
    with EventLog(tmp_path / "std.jsonl") as log:
        log.write(record)
        log.write({k: v for k, v in record.items() if k != "i"})

    def lines(name):
        rows = (tmp_path / name).read_text(encoding="utf-8").splitlines()
        return [{k: v for k, v in json.loads(r).items() if k != "time"} for r in rows]

    fast, std = lines("fast.jsonl"), lines("std.jsonl")
    assert fast == std
    assert fast[0]["nan"] is None and fast[0]["inf"] == [None, None] and fast[0]["i"] == 2**70
    assert fast[1]["arr"] == [1.0, None] and fast[1]["path"] == "runs/x"
    assert [math.copysign(1, v) for v in fast[1]["a"]][2] == -1.0  # -0.0 kept
    # what the standard library refuses, the orjson path refuses too, with its message
    import dataclasses
    import datetime

    @dataclasses.dataclass
    class Point:
        x: float

    monkeypatch.undo()
    assert eventlog._orjson is not None
    for bad, kind in ((Point(1.0), "Point"), (datetime.datetime(2026, 1, 1), "datetime")):
        with pytest.raises(TypeError, match=rf"record\['v'\] has type {kind}"):
            dumps_line({"v": bad})


def test_unsupported_values_name_their_place():
    with pytest.raises(TypeError, match=r"record\['layers'\]\['conv1'\]\[1\] has type object"):
        to_json_value({"layers": {"conv1": [1.0, object()]}})
    with pytest.raises(TypeError, match=r"key \(1, 2\) of type tuple"):
        dumps_line({"layers": {(1, 2): 1.0, "x": float("nan")}})


def test_bad_arguments_are_reported(tmp_path):
    with EventLog(tmp_path / "e.jsonl") as log:
        with pytest.raises(ValueError, match="'schema' must be 1"):
            log.write({"schema": 2, "kind": "run"})
        with pytest.raises(TypeError, match="'record' must be a dict"):
            log.write([1, 2])
    with pytest.raises(ConfigError, match="'fsync' must be True or False"):
        EventLog(tmp_path / "f.jsonl", fsync=1)
    with pytest.raises(ConfigError, match="'path' must be a str or os.PathLike"):
        EventLog(3)


def test_append_keeps_earlier_records(tmp_path):
    path = tmp_path / "events.jsonl"
    with EventLog(path) as log:
        log.write({"kind": "run", "step": 0})
        log.write({"kind": "end", "step": 10})
    with EventLog(path, fsync=True) as log:  # a resumed run appends
        log.write({"kind": "run", "step": 10})
    assert [r["kind"] for r in read_lines(path)] == ["run", "end", "run"]


def test_fragment_left_by_a_killed_run_stays_on_its_own_line(tmp_path):
    path = tmp_path / "events.jsonl"
    path.write_text('{"schema":1,"kind":"run"}\n{"schema":1,"kind":"st', encoding="utf-8")
    with EventLog(path) as log:
        log.write({"kind": "run", "step": 5})
    lines = path.read_text(encoding="utf-8").splitlines()
    assert lines[1] == '{"schema":1,"kind":"st'
    assert json.loads(lines[2])["step"] == 5


def test_unwritable_location_fails_at_construction(tmp_path):
    # A path below a regular file cannot be created, even by root (tests run as root, so
    # a chmod-ed directory would not stop them).
    blocker = tmp_path / "somefile"
    blocker.write_text("not a directory")
    target = blocker / "sub" / "events.jsonl"
    with pytest.raises(ConfigError) as info:
        EventLog(target)
    message = str(info.value)
    assert str(target) in message and "choose another log_dir" in message
    assert not target.parent.exists()
    with pytest.raises(ConfigError, match="IsADirectoryError"):
        EventLog(tmp_path)  # an existing directory is no file


def test_write_errors_warn_once_and_return_false():
    # /dev/full accepts the open and fails every write with ENOSPC, like a full disk.
    log = EventLog("/dev/full")
    with pytest.warns(ShiftWatchWarning, match="could not write to the event log") as caught:
        assert log.write({"kind": "step", "step": 1}) is False
        assert log.write({"kind": "step", "step": 2}) is False
    assert len([w for w in caught if issubclass(w.category, ShiftWatchWarning)]) == 1
    assert "No space left on device" in str(caught[0].message)
    assert log.write_errors == 2 and log.records_written == 0
    log.close()


def test_write_after_close_returns_false_and_close_is_idempotent(tmp_path):
    log = EventLog(tmp_path / "e.jsonl")
    log.close()
    log.close()
    assert log.closed
    with pytest.warns(ShiftWatchWarning, match="closed"):
        assert log.write({"kind": "step"}) is False


def test_file_size_limit_mid_run_loses_only_the_cut_line(tmp_path):
    # A real mid-run failure: the OS file-size limit (RLIMIT_FSIZE) is hit after a few
    # records (lines of ~130 bytes), cutting one line short (EFBIG); the limit is then lifted
    # and logging goes on.
    path = tmp_path / "events.jsonl"
    script = textwrap.dedent(
        f"""
        import json, resource, signal, warnings
        from shiftwatch.sinks import EventLog, eventlog
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # get EFBIG instead of being killed
        log = EventLog({str(path)!r})
        soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
        results = []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            resource.setrlimit(resource.RLIMIT_FSIZE, (400, hard))
            for step in range(6):
                results.append(log.write({{"kind": "step", "step": step, "pad": "x" * 60}}))
            resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
            results.append(log.write({{"kind": "end", "step": 6}}))
        print(json.dumps({{"results": results, "warnings": [str(w.message) for w in caught],
                           "errors": log.write_errors}}))
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60, cwd=ROOT
    )
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout.splitlines()[-1])
    results = report["results"]
    assert results[0] and results[1] and results[-1]  # before the limit, and after it
    assert not all(results[:-1])  # some records were refused while the limit held
    assert report["errors"] == results.count(False)
    assert len(report["warnings"]) == 1 and "File too large" in report["warnings"][0]
    lines = path.read_text(encoding="utf-8").splitlines()
    parsed, broken = [], []
    for line in lines:
        try:
            parsed.append(json.loads(line))
        except json.JSONDecodeError:
            broken.append(line)
    assert len(broken) <= 1  # at most the line cut by the limit
    assert [r["step"] for r in parsed] == [i for i, ok in enumerate(results) if ok]
    assert parsed[-1]["kind"] == "end"


def test_concurrent_writers_never_interleave_within_a_line(tmp_path):
    path = tmp_path / "events.jsonl"
    log = EventLog(path)

    def worker(k: int) -> None:
        for i in range(50):
            log.write({"kind": "step", "step": i, "thread": k, "pad": "y" * (k * 40)})

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    log.close()
    records = read_lines(path)
    assert len(records) == 200
    for k in range(4):
        assert [r["step"] for r in records if r["thread"] == k] == list(range(50))


def test_event_log_imports_only_the_standard_library():
    # the module's own imports: the standard library (sys.stdlib_module_names),
    # shiftwatch.errors, and orjson only inside a try that catches ImportError
    tree = ast.parse((ROOT / "shiftwatch" / "sinks" / "eventlog.py").read_text())
    imported, guarded = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            imported.add("." * node.level + (node.module or "").split(".")[0])
        elif isinstance(node, ast.Try) and any(
                isinstance(h.type, ast.Name) and h.type.id == "ImportError"
                for h in node.handlers):
            guarded.update(a.name for n in node.body if isinstance(n, ast.Import)
                           for a in n.names)
    assert imported - set(sys.stdlib_module_names) == {"..errors", "orjson"}
    assert guarded == {"orjson"}


def test_descriptor_is_released(tmp_path):
    before = len(os.listdir("/proc/self/fd"))
    for i in range(20):
        EventLog(tmp_path / f"e{i}.jsonl").write({"kind": "run"})  # never closed explicitly
    assert len(os.listdir("/proc/self/fd")) <= before + 1
