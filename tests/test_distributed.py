"""Merging summaries across processes: exactness, cost accounting, real gloo processes.

The multi-process tests start real ``torch.distributed`` processes with the gloo backend
(``torch.multiprocessing``), on a free loopback port, with a join deadline so a broken
collective fails the test instead of hanging it.
"""

from __future__ import annotations

import datetime
import gc
import json
import os
import socket
import sys
import time
import traceback
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import ShiftMonitor
from shiftwatch.distributed import PackLayout, SummaryReducer, merge_tables
from shiftwatch.divergence import compare
from shiftwatch.errors import ConfigError
from shiftwatch.summary import FIELDS, Summary, make_edges, summarize

IX = {k: i for i, k in enumerate(FIELDS)}


# ---------------------------------------------------------------- helpers for processes
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _entry(rank: int, fn, world: int, port: int, out_dir: str, args: tuple) -> None:
    torch.set_num_threads(1)
    torch.distributed.init_process_group(
        "gloo",
        init_method=f"tcp://127.0.0.1:{port}",
        rank=rank,
        world_size=world,
        timeout=datetime.timedelta(seconds=60),
    )
    try:
        fn(rank, world, Path(out_dir), *args)
    except BaseException:
        (Path(out_dir) / f"error{rank}.txt").write_text(traceback.format_exc())
        torch.distributed.destroy_process_group()
        raise
    # Orderly teardown.  Rarely (about 1 full suite run in 5 on CI) a rank used to die by
    # SIGABRT ("terminate called without an active exception") after its work was done:
    # a C++ thread of the gloo group torn down during interpreter exit.  So: drop objects
    # that still hold the group (a DistributedDataParallel wrapper sits in reference
    # cycles until a collection), wait until every rank is done with collectives, destroy
    # the group while the interpreter is intact, and skip interpreter teardown
    # (everything a test reads was written and closed by ``fn``).
    gc.collect()
    torch.distributed.barrier()
    torch.distributed.destroy_process_group()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)


def run_ranks(fn, out_dir: Path, *args, world: int = 2, deadline_s: float = 120.0) -> None:
    """Run ``fn(rank, world, out_dir, *args)`` in ``world`` real gloo processes; fail
    (and kill the processes) if they have not finished within ``deadline_s``."""
    import torch.multiprocessing as mp

    ctx = mp.start_processes(
        _entry, args=(fn, world, free_port(), str(out_dir), args), nprocs=world,
        join=False, start_method="spawn",
    )
    end = time.monotonic() + deadline_s
    try:
        while not ctx.join(timeout=1.0):
            if time.monotonic() > end:
                pytest.fail(f"ranks did not finish within {deadline_s} s (hung collective?)")
    except mp.ProcessRaisedException as exc:
        errors = "\n".join(p.read_text() for p in sorted(out_dir.glob("error*.txt")))
        pytest.fail(f"a rank failed:\n{errors or exc}")
    finally:
        for p in ctx.processes:
            if p.is_alive():
                p.kill()


# ---------------------------------------------------------------- data shared by the tests
def layer_inputs(seed: int, rows: int = 32):
    """Inputs of three 'layers' of different shapes (conv-like, linear-like, offset)."""
    g = torch.Generator().manual_seed(seed)
    return [
        torch.randn(rows, 3, 5, 5, generator=g, dtype=torch.float64) * 2 + 1,
        torch.randn(rows, 7, generator=g, dtype=torch.float64).exp(),
        torch.randn(rows, 2, 64, generator=g, dtype=torch.float64) + 1e4,  # mean 1e4, sd 1
    ]


CHANNEL_DIMS = (1, -1, 1)
EDGES = [make_edges(-6, 8, 20), make_edges(0, 10, 12), make_edges(1e4 - 4, 1e4 + 4, 16)]


def summaries_of(xs, edges=EDGES):
    return [
        summarize(x, channel_dim=d, edges=e, max_hist_values=None)
        for x, d, e in zip(xs, CHANNEL_DIMS, edges, strict=True)
    ]


def _merge_worker(rank: int, world: int, out: Path) -> None:
    reducer = SummaryReducer()
    assert reducer.active and reducer.world_size == world and reducer.rank == rank
    per = 32 // world
    # current batch: this rank's slice of the global 32-row batch
    cur = [x[rank * per : (rank + 1) * per] for x in layer_inputs(1)]
    ref = [x[rank * per : (rank + 1) * per] for x in layer_inputs(2)]
    # edges: rank 1 starts with wrong ones; broadcast gives everyone rank 0's
    mine = EDGES if rank == 0 else [e + 1.0 for e in EDGES]
    edges = [reducer.broadcast(e) for e in mine]
    merged_cur = reducer.reduce_summaries(summaries_of(cur, edges))
    merged_ref = reducer.reduce_summaries(summaries_of(ref, edges))
    total = reducer.sum(torch.tensor([rank + 1, 10 * rank], dtype=torch.int64))
    stop = reducer.any(rank == world - 1)  # only the last rank wants to stop
    quiet = reducer.any(False)
    # layouts with the same total length but different content must raise on every rank:
    # first seen (caught by the layout handshake), then both known but used at the same
    # call by different ranks (caught by the fingerprint that travels with the data)
    a = summarize(torch.randn(per, 3, 4), channel_dim=1)
    b = summarize(torch.randn(per, 5, 4), channel_dim=1)
    errors = []
    for ab in ([a, b], [b, a]) if rank == 0 else ([b, a], [a, b]):
        try:
            reducer.reduce_summaries(ab)
            errors.append("no error")
        except ConfigError as exc:
            errors.append(str(exc))
    reducer.reduce_summaries([a, b])  # both ranks: layout (3, 5) is now known everywhere
    reducer.reduce_summaries([b, a])  # ... and so is (5, 3)
    try:
        reducer.reduce_summaries([a, b] if rank == 0 else [b, a])
        errors.append("no error")
    except ConfigError as exc:
        errors.append(str(exc))
    mismatch = errors
    torch.save(
        {
            "cur": [s.pack() for s in merged_cur],
            "ref": [s.pack() for s in merged_ref],
            "edges": edges,
            "stop": stop,
            "total": total,
            "quiet": quiet,
            "mismatch": mismatch,
            "stats": (reducer.stats.collectives, reducer.stats.bytes_sent,
                      reducer.stats.bytes_received, dict(reducer.stats.by_kind)),
        },
        out / f"rank{rank}.pt",
    )


# ---------------------------------------------------------------- single-process tests
def test_inactive_reducer_returns_inputs_and_communicates_nothing():
    reducer = SummaryReducer()
    assert not reducer.active and reducer.rank == 0 and reducer.world_size == 1
    ss = summaries_of(layer_inputs(0, rows=4))
    flat = torch.cat([s.pack() for s in ss])
    assert reducer.reduce(flat, PackLayout.of(ss)) is flat
    assert reducer.reduce_summaries(ss)[0] is ss[0]
    assert reducer.broadcast(EDGES[0]) is EDGES[0]
    assert reducer.any(True) is True and reducer.any(False) is False
    assert reducer.stats.collectives == 0 and reducer.stats.bytes_sent == 0


def test_layout_size_matches_pack():
    ss = summaries_of(layer_inputs(0, rows=4))
    layout = PackLayout.of(ss)
    assert layout.size == sum(s.pack().numel() for s in ss)
    assert layout.size == sum(Summary.packed_size(s.channels, s.bins) for s in ss)
    assert PackLayout((3, 5), (0, 0)).fingerprint != PackLayout((5, 3), (0, 0)).fingerprint
    with pytest.raises(ConfigError, match="hist_sizes"):
        PackLayout((3,), (0, 0))


@settings(max_examples=40, deadline=None)
@given(
    sizes=st.lists(st.integers(0, 6), min_size=1, max_size=5),
    offset=st.sampled_from([0.0, 3.0, 1e4]),
    seed=st.integers(0, 2**16),
)
def test_merge_tables_equals_summary_of_concatenation(sizes, offset, seed):
    """k-way merge of row slices = summary of all rows; moments checked against numpy's
    mean/var of the raw values (population variance, numpy.var ddof=0)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(sum(sizes), 3, 8, generator=g, dtype=torch.float64) + offset
    if x.shape[0] == 0:
        return
    parts = torch.split(x, sizes)
    tables = torch.stack([summarize(p, channel_dim=1).table for p in parts])
    merged = merge_tables(tables)
    whole = summarize(x, channel_dim=1).table
    torch.testing.assert_close(merged, whole, rtol=1e-9, atol=1e-9)
    # outside check: numpy on the raw values, per channel (rows 0..C-1) and layer (row C)
    xn = x.numpy()
    per_ch = xn.transpose(1, 0, 2).reshape(3, -1)
    np.testing.assert_allclose(merged[:3, IX["mean"]].numpy(), per_ch.mean(1), rtol=1e-12)
    np.testing.assert_allclose(
        merged[:3, IX["m2"]].numpy() / per_ch.shape[1], per_ch.var(1), rtol=1e-8
    )
    np.testing.assert_allclose(float(merged[3, IX["n"]]), xn.size)
    # spread of row means (per sample), used by the noise floors
    row_means = xn.reshape(xn.shape[0], -1).mean(1)
    np.testing.assert_allclose(
        float(merged[3, IX["row_mean_m2"]]),
        ((row_means - row_means.mean()) ** 2).sum(),
        rtol=1e-6,
        atol=1e-18,
    )


def test_gather_merge_keeps_row_mean_spread_at_large_offset():
    """Mean 1e4, sd 1, 1024 values per row: power sums would lose ~1e-4 of the row-mean
    M2 (see the module docstring); the Chan merge keeps it to ~1e-9."""
    g = torch.Generator().manual_seed(5)
    x = torch.randn(32, 4, 1024, generator=g, dtype=torch.float64) + 1e4
    tables = torch.stack([summarize(p, channel_dim=1).table for p in torch.chunk(x, 8)])
    merged = merge_tables(tables)
    row_means = x.reshape(32, -1).mean(1).numpy()
    expect = ((row_means - row_means.mean()) ** 2).sum()
    assert abs(float(merged[-1, IX["row_mean_m2"]]) / expect - 1) < 1e-7


# ---------------------------------------------------------------- real processes
@pytest.mark.timeout(180)
def test_two_gloo_ranks_merge_exactly_like_one_process(tmp_path):
    run_ranks(_merge_worker, tmp_path)
    r0, r1 = (torch.load(tmp_path / f"rank{r}.pt") for r in (0, 1))

    # edges: everyone ends with rank 0's
    for e0, e1, e in zip(r0["edges"], r1["edges"], EDGES, strict=True):
        assert torch.equal(e0, e) and torch.equal(e1, e)

    # both ranks hold bit-identical merged summaries
    for a, b in zip(r0["cur"] + r0["ref"], r1["cur"] + r1["ref"], strict=True):
        assert torch.equal(a, b)

    # ... equal to the summaries one process computes from all 32 rows
    one_cur, one_ref = summaries_of(layer_inputs(1)), summaries_of(layer_inputs(2))
    for flat, s in zip(r0["cur"], one_cur, strict=True):
        m = Summary.unpack(flat, s.channels, s.edges)
        torch.testing.assert_close(m.table, s.table, rtol=1e-10, atol=1e-9)
        # extrema to rounding (summarize() takes them after its per-channel shift)
        torch.testing.assert_close(m.extrema, s.extrema, rtol=1e-12, atol=1e-12)
        assert torch.equal(m.hist, s.hist)

    # ... and so are the metrics, to 1e-5 relative
    for fc, fr, sc, sr in zip(r0["cur"], r0["ref"], one_cur, one_ref, strict=True):
        mc = Summary.unpack(fc, sc.channels, sc.edges)
        mr = Summary.unpack(fr, sr.channels, sr.edges)
        two, one = compare(mc, mr), compare(sc, sr)
        for name in one:
            assert float(two[name].value) == pytest.approx(float(one[name].value), rel=1e-5)
            assert float(two[name].noise) == pytest.approx(float(one[name].noise), rel=1e-5)

    # integer sums are exact and reach every rank
    assert r0["total"].tolist() == r1["total"].tolist() == [3, 10]
    # a stop wanted by one rank reaches all; none wanted, none taken
    assert r0["stop"] and r1["stop"] and not r0["quiet"] and not r1["quiet"]
    # differing layouts raise on every rank: twice at the handshake, then in-band
    for r in (r0, r1):
        assert [("packed sizes per rank" in m) for m in r["mismatch"]] == [True, True, False]
        assert "fingerprints" in r["mismatch"][2]

    # cost accounting: per reduce one all_gather of P + 1 float64 values, and one 16-byte
    # handshake the first time each layout is used
    size = PackLayout.of(one_cur).size
    mism = PackLayout((3, 5), (0, 0)).size
    collectives, sent, received, kinds = r0["stats"]
    assert kinds == {"broadcast": 3, "handshake": 5, "all_gather": 5, "all_reduce": 3}
    edge_bytes = sum(e.numel() * 8 for e in EDGES)
    gathers = 2 * (size + 1) + 3 * (mism + 1)
    assert sent == edge_bytes + 8 * gathers + 5 * 16 + 2 * 4 + 16
    assert received == edge_bytes + 2 * 8 * gathers + 2 * 5 * 16 + 2 * 4 + 16
    assert collectives == 16


# ---------------------------------------------------------------- ShiftMonitor under DDP
GLOBAL_BATCH, SHIFT_STEP, MAX_STEPS = 32, 8, 16


def monitor_model() -> torch.nn.Module:
    # no BatchNorm: under DDP it normalises each rank's half batch, so the layers after
    # it would legitimately see other inputs than with the whole batch in one process
    torch.manual_seed(0)
    net = torch.nn.Sequential(torch.nn.Linear(8, 16), torch.nn.ReLU(), torch.nn.LayerNorm(16),
                              torch.nn.Linear(16, 1))
    return net.double()  # float64: DDP's gradient averaging then matches to ~1e-16


def monitor_batch(step: int):
    """The global batch of a step; from SHIFT_STEP on the inputs move by 2 std."""
    g = torch.Generator().manual_seed(1000 + step)
    x = torch.randn(GLOBAL_BATCH, 8, generator=g, dtype=torch.float64)
    if step >= SHIFT_STEP:
        x += 2.0
    return x, x[:, :2].sum(1, keepdim=True)


def val_batch(step: int) -> torch.Tensor:
    """Held-out inputs for an eval-mode pass at a sampled step (never shifted)."""
    g = torch.Generator().manual_seed(5000 + step)
    return torch.randn(GLOBAL_BATCH, 8, generator=g, dtype=torch.float64)


def train_monitored(log_dir: Path, rows: slice, wrap=None) -> tuple[ShiftMonitor, int]:
    model = monitor_model()
    net = model if wrap is None else wrap(model)
    opt = torch.optim.SGD(net.parameters(), lr=0.05)
    monitor = ShiftMonitor(model, log_dir, every_n_steps=2, reference_steps=3,
                           on_alert="stop", tensorboard=False)
    step = -1
    for step in range(MAX_STEPS):
        x, y = monitor_batch(step)
        loss = torch.nn.functional.mse_loss(net(x[rows]), y[rows])
        opt.zero_grad()
        loss.backward()
        if monitor.is_sampled(step):  # an eval pass: phase "val", compared vs_train too
            model.eval()
            with torch.no_grad():
                model(val_batch(step)[rows])
            model.train()
        opt.step()
        monitor.step()
        if monitor.should_stop:
            break
    return monitor, step


def _monitor_worker(rank: int, world: int, out: Path) -> None:
    half = GLOBAL_BATCH // world
    monitor, stopped = train_monitored(
        out / f"rank{rank}", slice(rank * half, (rank + 1) * half),
        wrap=torch.nn.parallel.DistributedDataParallel,
    )
    stats = monitor.reducer.stats
    result = {
        "stopped": stopped, "should_stop": monitor.should_stop,
        "alerts": [a.to_record() for a in monitor.alerts],
        "by_kind": dict(stats.by_kind), "sent": stats.bytes_sent,
        "received": stats.bytes_received, "size": monitor.layout.size,
    }
    monitor.close()
    # the every-step non-finite check, with a NaN in one value of rank 1's data only, at
    # an unsampled step: the counts are summed over ranks, so rank 0 stops too
    model = monitor_model()
    finite = ShiftMonitor(model, out / f"finite{rank}", every_n_steps=4, on_alert="stop",
                          check_finite_every_step=True, tensorboard=False)
    for step in range(6):
        x, _ = monitor_batch(step)
        if step == 3:
            x[-1, 0] = float("nan")  # the last row belongs to rank 1
        with torch.no_grad():
            model(x[rank * half:(rank + 1) * half])
        finite.step()
        if finite.should_stop:
            break
    result["finite"] = {"stopped": step, "alerts": [a.to_record() for a in finite.alerts],
                        "by_kind": dict(finite.reducer.stats.by_kind)}
    finite.close()
    (out / f"result{rank}.json").write_text(json.dumps(result))


def _records(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


@pytest.mark.timeout(180)
def test_shift_monitor_under_ddp_equals_one_process_with_the_whole_batch(tmp_path):
    run_ranks(_monitor_worker, tmp_path)
    ranks = [json.loads((tmp_path / f"result{r}.json").read_text()) for r in (0, 1)]
    one, one_stopped = train_monitored(tmp_path / "one", slice(None))
    one.close()

    # both ranks stop at the same step as one process, at the first sample of the shift
    assert ranks[0]["stopped"] == ranks[1]["stopped"] == one_stopped
    assert one_stopped == SHIFT_STEP
    assert ranks[0]["should_stop"] and ranks[1]["should_stop"]
    assert [a["rule"] for a in ranks[1]["alerts"]] == [a["rule"] for a in ranks[0]["alerts"]]

    # rank 0 alone wrote the event log
    assert not (tmp_path / "rank1" / "events.jsonl").exists()
    two = [r for r in _records(tmp_path / "rank0" / "events.jsonl") if r["kind"] == "step"]
    ref = [r for r in _records(tmp_path / "one" / "events.jsonl") if r["kind"] == "step"]
    assert [r["step"] for r in two] == [r["step"] for r in ref] and len(ref) >= 4

    # every metric and noise floor of every layer equals the one-process value (1e-5 rel)
    checked = 0
    for a, b in zip(two, ref, strict=True):
        for layer, ea in a["layers"].items():
            eb = b["layers"][layer]
            assert ea["count"] == eb["count"]
            for against in ("vs_previous", "vs_reference", "vs_train"):
                assert (against in ea) == (against in eb) == (a["phase"] == "val"
                                                              or against != "vs_train")
                if eb.get(against) is None:
                    assert ea.get(against) is None
                    continue
                for metric, d in eb[against].items():
                    for key in ("value", "noise"):
                        got, want = ea[against][metric][key], d[key]
                        if want is None:  # not computable yet (e.g. no histogram edges)
                            assert got is None
                            continue
                        assert got == pytest.approx(want, rel=1e-5, abs=1e-12), (
                            a["step"], layer, metric, key)
                        checked += 1
    assert checked > 100
    assert sum(r["phase"] == "val" and r["layers"]["0"]["vs_train"] is not None
               for r in two) >= 4

    # cost per sampled step: one all_gather of both phases' packed summaries (+ 1 value);
    # once per run a 16-byte layout handshake and one broadcast of the histogram ranges
    r0 = ranks[0]
    samples = len({r["step"] for r in two})  # train and val of a step: one gather
    assert r0["by_kind"] == {"handshake": 1, "all_gather": samples, "broadcast": 1}
    per_gather = 8 * (2 * r0["size"] + 1)
    layers = len(two[0]["layers"])
    assert r0["sent"] == 16 + samples * per_gather + 2 * layers * 8
    assert r0["received"] == 2 * 16 + samples * 2 * per_gather + 2 * layers * 8

    # non-finite values on rank 1 only: both ranks stop at that step, rank 0 logs it
    for r in ranks:
        f = r["finite"]
        assert f["stopped"] == 3
        first = {a["layer"]: a["value"] for a in f["alerts"] if a["rule"] == "nonfinite"}
        assert first["0"] == 1  # the one NaN entering the first layer
        # one summed count per step, and one merge per sampled step (0, 4 not reached)
        assert f["by_kind"]["all_reduce"] == 4 and f["by_kind"]["all_gather"] == 1
    finite_log = _records(tmp_path / "finite0" / "events.jsonl")
    assert any(a["kind"] == "alert" and a["rule"] == "nonfinite" for a in finite_log)
