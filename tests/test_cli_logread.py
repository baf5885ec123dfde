"""The streaming reader and its aggregates, checked against loading the whole log.

The oracle is deliberately naive: every record of a small log loaded with the standard
library's json and reduced with numpy (max, median).  The streaming reader must agree.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from eventlog_factory import Scenario, corrupt_line, cut_last_line, load_naive, write_log
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftwatch.cli import main
from shiftwatch.cli.aggregate import _NQ, METRICS, _qbin, quantile
from shiftwatch.cli.logread import LogError
from shiftwatch.cli.runread import _scan, read_run

SHIFTED = "block1.conv"


@pytest.fixture(scope="module")
def shifted_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("shifted")
    truth = write_log(d, Scenario(shifts={SHIFTED: (400, 1.0)}, samples=70, seed=3))
    return d, truth


def naive_layer_values(path: Path, phase: str, against: str):
    """{(layer, metric): [(step, value, noise, ratio), ...]} from the whole log."""
    out: dict[tuple[str, str], list[tuple[int, float, float, float]]] = {}
    for rec in load_naive(path):
        if rec["kind"] != "step" or rec["phase"] != phase:
            continue
        for name, lay in rec["layers"].items():
            block = lay.get(f"vs_{against}")
            for m, e in (block or {}).items():
                if e is not None:
                    out.setdefault((name, m), []).append(
                        (rec["step"], e.get("value"), e.get("noise"), e.get("ratio")))
    return out


def test_peaks_counts_and_medians_match_the_whole_log(shifted_run):
    d, truth = shifted_run
    run = read_run(d)
    for against in ("reference", "previous"):
        t = run.table("train", against)
        naive = naive_layer_values(truth.path, "train", against)
        for li, name in enumerate(run.layers):
            for mi, m in enumerate(METRICS):
                rows = naive[(name, m)]
                steps, values, noises, ratios = (np.array(c) for c in zip(*rows, strict=True))
                k = int(np.argmax(ratios))  # numpy's argmax: first of equal maxima
                assert t["samples"][li, mi] == len(rows)
                assert t["peak_ratio"][li, mi] == ratios[k]
                assert t["peak_step"][li, mi] == steps[k]
                assert t["peak_value"][li, mi] == values[k]
                assert t["vpeak_value"][li, mi] == values.max()
                # medians come from 1/16-decade log bins: within one bin width of the
                # bracket of numpy's median (any value between the middle order statistics)
                for got, ref in ((t["median_ratio"], ratios), (t["median_value"], values),
                                 (t["median_noise"], noises)):
                    lo = np.quantile(ref, 0.5, method="lower") / 10 ** (1 / 16)
                    hi = np.quantile(ref, 0.5, method="higher") * 10 ** (1 / 16)
                    assert lo <= got[li, mi] <= hi, (name, m)
    assert run.acc.alerts.total == len(truth.alerts)
    counts = {s: sum(a["severity"] == s for a in truth.alerts) for s in ("warn", "fail")}
    assert {k: run.acc.alerts.by_severity.get(k, 0) for k in counts} == counts
    assert run.phase("train").records == truth.train_records
    assert run.phase("val").records == truth.val_records
    assert run.complete and run.notes == []


def test_binned_maxima_cover_every_record(shifted_run):
    d, truth = shifted_run
    run = read_run(d, bins=7)
    t = run.table("train", "reference")
    naive = naive_layer_values(truth.path, "train", "reference")
    li, mi = run.layers.index(SHIFTED), METRICS.index("mean_shift")
    expect = np.full(run.grid.nbins, np.nan)
    for step, _v, _n, ratio in naive[(SHIFTED, "mean_shift")]:
        k = (step - run.grid.lo) // run.grid.width
        expect[k] = np.fmax(expect[k], ratio)
    np.testing.assert_allclose(t["bin_ratio"][:, li, mi], expect, rtol=1e-6)  # float32 bins
    assert run.grid.nbins <= 7 and run.grid.width % 10 == 0  # whole multiples of every_n_steps


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(q=st.floats(0.05, 0.95), sigma=st.floats(0.1, 3.0), n=st.integers(20, 400),
       seed=st.integers(0, 2**16))
def test_log_histogram_quantile_matches_numpy(q, sigma, n, seed):
    x = np.random.default_rng(seed).lognormal(0.0, sigma, n)
    hist = np.bincount(_qbin(x), minlength=_NQ)
    got = quantile(hist, q)
    # numpy's default (linear) quantile lies between the two order statistics around q*n;
    # the histogram estimate may be off by at most one bin width from that bracket
    lo = np.quantile(x, q, method="lower") / 10 ** (1 / 16)
    hi = np.quantile(x, q, method="higher") * 10 ** (1 / 16)
    assert lo <= got <= hi


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(frac=st.floats(0.0, 1.0))
def test_accumulators_split_anywhere_merge_exactly(shifted_run, frac):
    d, _ = shifted_run
    whole = read_run(d, workers=1)
    path, size = whole.path, whole.size
    body = len(path.read_bytes().split(b"\n", 1)[0]) + 1
    cut = body + int((size - body) * frac)
    a = _scan(str(path), body, cut, whole.layers, whole.grid, None, False, 5000)
    b = _scan(str(path), cut, size, whole.layers, whole.grid, None, True, 5000)
    a.merge(b)
    for phase, acc in whole.acc.phases.items():
        for name, arr in acc.arrays.items():
            np.testing.assert_array_equal(a.phases[phase].arrays[name], arr, err_msg=name)
    assert a.alerts.kept == whole.acc.alerts.kept
    assert a.alerts.first_by_layer == whole.acc.alerts.first_by_layer
    assert a.end == whole.acc.end


def test_parallel_processes_and_both_decoders_give_identical_results(shifted_run):
    d, _ = shifted_run
    ref = read_run(d, workers=1, decoder_name="json")
    for kw in ({"workers": 2, "parallel_bytes": 0}, {"workers": 1, "decoder_name": "orjson"}):
        got = read_run(d, **kw)
        for phase, acc in ref.acc.phases.items():
            for name, arr in acc.arrays.items():
                np.testing.assert_array_equal(got.phase(phase).arrays[name], arr, err_msg=name)
        assert got.acc.alerts.kept == ref.acc.alerts.kept


def test_memory_does_not_grow_with_the_number_of_records(tmp_path):
    sizes = []
    for samples in (320, 1600):  # spans of 320 and 1600 steps: 32 bins of 10 and 50 steps
        write_log(tmp_path / str(samples), Scenario(samples=samples, val_every=None,
                                                   every_n_steps=1, channels=False))
        run = read_run(tmp_path / str(samples), bins=32)
        sizes.append(sum(a.nbytes for a in run.phase("train").arrays.values()))
        assert run.grid.nbins <= 32
    assert sizes[0] == sizes[1]


def test_cut_off_last_line_is_ignored_with_a_note(tmp_path, capsys):
    truth = write_log(tmp_path, Scenario(samples=30, end=False))
    cut_last_line(truth.path)
    run = read_run(tmp_path)
    assert run.phase("train").records == truth.train_records
    assert any("cut off" in n for n in run.notes)
    assert not run.complete
    assert main(["summary", str(tmp_path)]) == 0
    assert "cut off" in capsys.readouterr().out


def _err(capsys) -> str:
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1, lines  # one clear message
    return lines[0]


def test_corrupt_middle_line_names_the_line_and_exits_2(tmp_path, capsys):
    truth = write_log(tmp_path, Scenario(samples=30))
    corrupt_line(truth.path, 5)
    for cmd in ("summary", "gate"):
        assert main([cmd, str(tmp_path)]) == 2
        msg = _err(capsys)
        assert "line 5" in msg and "corrupt" in msg
    assert main(["report", str(tmp_path), "-o", str(tmp_path.parent / "x.html")]) == 2
    assert "line 5" in _err(capsys)


def test_wrong_value_type_is_reported_with_field_and_line(tmp_path, capsys):
    truth = write_log(tmp_path, Scenario(samples=12))
    lines = truth.path.read_text().splitlines()
    rec = json.loads(lines[6])
    assert rec["kind"] == "step"
    next(iter(rec["layers"].values()))["vs_previous"]["psi"]["ratio"] = "high"
    lines[6] = json.dumps(rec)
    truth.path.write_text("\n".join(lines) + "\n")
    assert main(["summary", str(tmp_path)]) == 2
    msg = _err(capsys)
    assert "line 7" in msg and "'high'" in msg and "ratio" in msg


@pytest.mark.parametrize("where", ["first", "middle"])
def test_unknown_schema_version_exits_2(tmp_path, capsys, where):
    truth = write_log(tmp_path, Scenario(samples=12, schema=2 if where == "first" else 1))
    if where == "middle":
        lines = truth.path.read_text().splitlines()
        rec = json.loads(lines[8])
        rec["schema"] = 2
        lines[8] = json.dumps(rec)
        truth.path.write_text("\n".join(lines) + "\n")
    assert main(["summary", str(tmp_path), "--json"]) == 2
    msg = _err(capsys)
    assert "schema version 2" in msg and "reads schema 1" in msg


def test_missing_or_empty_log_exits_2_with_a_hint(tmp_path, capsys):
    assert main(["summary", str(tmp_path / "nope")]) == 2
    assert "does not exist" in _err(capsys)
    assert main(["gate", str(tmp_path)]) == 2
    assert "no event log" in _err(capsys)
    write_log(tmp_path / "runs" / "a", Scenario(samples=3))
    assert main(["summary", str(tmp_path / "runs")]) == 2
    msg = _err(capsys)
    assert "sub-directories" in msg and str(tmp_path / "runs" / "a") in msg
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "events.jsonl").write_bytes(b"")
    assert main(["summary", str(tmp_path / "empty")]) == 2
    assert "empty" in _err(capsys)
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "events.jsonl").write_text('{"kind": "step", "step": 1}\n')
    assert main(["summary", str(tmp_path / "other")]) == 2
    assert "kind 'run'" in _err(capsys)


def test_summary_of_a_run_that_is_still_writing(tmp_path, capsys):
    """A real writer thread appends half lines and flushes while summary reads."""
    src = write_log(tmp_path / "src", Scenario(samples=120, end=False)).path
    lines = src.read_bytes().splitlines(keepends=True)
    live = tmp_path / "live"
    live.mkdir()
    out = open(live / "events.jsonl", "wb")  # noqa: SIM115
    out.write(b"".join(lines[:20]))
    out.flush()
    stop = threading.Event()

    def writer():
        for line in lines[20:]:
            if stop.is_set():
                break
            half = len(line) // 2
            out.write(line[:half])
            out.flush()
            time.sleep(0.002)
            out.write(line[half:])
            out.flush()
        out.close()

    th = threading.Thread(target=writer)
    th.start()
    try:
        seen = []
        for _ in range(3):
            assert main(["summary", str(live), "--json"]) == 0
            seen.append(json.loads(capsys.readouterr().out)["steps"]["train"]["samples"])
    finally:
        stop.set()
        th.join(30)
    at_start = sum(b'"kind":"step"' in x and b'"phase":"train"' in x for x in lines[:20])
    assert seen == sorted(seen) and seen[0] >= at_start


def test_commands_never_write_into_the_run_directory(tmp_path, shifted_run, capsys):
    d, _ = shifted_run
    before = {p: p.stat().st_mtime_ns for p in Path(d).rglob("*")}
    for argv in (["summary", str(d)], ["summary", str(d), "--json"], ["gate", str(d)],
                 ["compare", str(d), str(d)]):
        main(argv)
    capsys.readouterr()
    assert {p: p.stat().st_mtime_ns for p in Path(d).rglob("*")} == before


def test_bad_options_are_refused(shifted_run, capsys):
    d, _ = shifted_run
    assert main(["summary", str(d), "--workers", "0"]) == 2
    assert "'--workers' must be at least 1" in _err(capsys)
    with pytest.raises(ValueError, match="'bins' must be a positive integer"):
        read_run(d, bins=0)
    with pytest.raises(LogError):
        read_run(Path(d) / "missing")


def test_irregular_blocks_take_the_slow_path_with_the_same_results(tmp_path):
    """Null metric entries, a metric this reader does not know, a missing key, keys in
    another order: read entry by entry, nulls skipped, the unknown metric noted."""
    truth = write_log(tmp_path, Scenario(samples=20, val_every=None, seed=8))
    lines = truth.path.read_text().splitlines()
    edited = 0
    for i, line in enumerate(lines):
        rec = json.loads(line)
        if rec["kind"] != "step" or not rec["layers"]["head.fc"]["vs_reference"]:
            continue
        blk = rec["layers"]["head.fc"]["vs_reference"]
        blk["psi"] = None
        blk["future_metric"] = {"value": 1.0, "noise": 1.0, "ratio": 99.0}
        del blk["js"]["noise"]
        rec["layers"]["head.fc"]["vs_reference"] = dict(reversed(list(blk.items())))
        rec["layers"]["stem.conv"]["channels"]["vs_reference"]["gauss_kl"] = None
        lines[i] = json.dumps(rec)
        edited += 1
    truth.path.write_text("\n".join(lines) + "\n")
    run = read_run(tmp_path)
    assert any("metric 'future_metric'" in n for n in run.notes)
    t = run.table("train", "reference")
    naive = naive_layer_values(truth.path, "train", "reference")
    li = run.layers.index("head.fc")
    assert t["samples"][li, METRICS.index("psi")] == 0
    assert t["samples"][li, METRICS.index("js")] == edited  # a missing noise is just null
    for m in ("mean_shift", "w1", "js"):
        rows = [r for r in naive[("head.fc", m)] if r]
        assert t["peak_ratio"][li, METRICS.index(m)] == max(r[3] for r in rows)
    c = run.channel_table("train", "reference")
    assert c["ch_samples"][run.layers.index("stem.conv"), 2] == 0
    assert c["ch_samples"][run.layers.index("stem.conv"), 0] == edited


def _same_arrays(a, b) -> None:
    for phase, acc in b.phases.items():
        for name, arr in acc.arrays.items():
            np.testing.assert_array_equal(a.phases[phase].arrays[name], arr, err_msg=name)


def test_work_sharing_forward_backward_and_three_processes_match_one_pass(shifted_run):
    """Chunks claimed from both ends of a region (backward chunks merged in file order),
    in this process with 4 KiB chunks, and with three real processes (two regions, one of
    them read by a single process): the same arrays, alerts, reference and end as one
    pass over the log."""
    import multiprocessing

    from shiftwatch.cli.runread import _scan_region

    d, _ = shifted_run
    whole = read_run(d, workers=1)
    path, size = str(whole.path), whole.size
    body = len(whole.path.read_bytes().split(b"\n", 1)[0]) + 1
    for forward in (True, False):
        bounds = multiprocessing.Array("q", [body, size])
        first, acc = _scan_region(path, 0, forward, size, whole.layers, whole.grid, None,
                                  5000, 4096, bounds=bounds)
        assert first == body and bounds[0] == bounds[1]
        _same_arrays(acc, whole.acc)
        assert acc.alerts.kept == whole.acc.alerts.kept
        assert acc.alerts.first_by_layer == whole.acc.alerts.first_by_layer
        assert acc.references == whole.acc.references and acc.end == whole.acc.end
    got = read_run(d, workers=3, parallel_bytes=0)
    _same_arrays(got.acc, whole.acc)
    assert got.acc.alerts.kept == whole.acc.alerts.kept
    assert got.acc.references == whole.acc.references and got.acc.end == whole.acc.end
    assert got.notes == whole.notes


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**16), digits=st.sampled_from([None, 3]),
       nulls=st.floats(0.0, 0.2), channels=st.booleans())
def test_whole_record_path_equals_layer_by_layer(tmp_path_factory, seed, digits, nulls,
                                                 channels):
    """A step record folded in one go (the monitor's regular records) and the same record
    read layer by layer (forced by an extra layer this reader does not know) give the same
    arrays; null values (NaN) included.  Oracle: the per-layer path, itself checked
    against the whole log above."""
    from shiftwatch.cli.aggregate import Grid, PhaseAcc

    d = tmp_path_factory.mktemp("whole")
    truth = write_log(d, Scenario(samples=12, val_every=None, seed=seed, digits=digits,
                                  channels=channels))
    rng = np.random.default_rng(seed)
    recs = [r for r in load_naive(truth.path) if r["kind"] == "step"]
    names = [n for n, _, _ in Scenario().layers]
    lidx = {n: i for i, n in enumerate(names)}
    grid = Grid.spanning(recs[0]["step"], recs[-1]["step"], bins=5, stride=10)
    fast, slow = PhaseAcc(len(names), grid), PhaseAcc(len(names), grid)
    unknown: set[str] = set()
    for rec in recs:
        for lay in rec["layers"].values():
            for blk in (lay.get("vs_previous"), lay.get("vs_reference")):
                for e in (blk or {}).values():
                    for k in e:
                        if rng.random() < nulls:
                            e[k] = None
        fast.add(rec["step"], rec["layers"], lidx, set())
        slow.add(rec["step"], {**rec["layers"], "not.watched": {}}, lidx, unknown)
    assert unknown == {"layer 'not.watched'"}
    for name, arr in slow.arrays.items():
        np.testing.assert_array_equal(fast.arrays[name], arr, err_msg=name)
