"""The demo-suite example examples/probe_bn_vs_gn.py runs and finds what it claims."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest
import torch

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "probe_bn_vs_gn.py"


@pytest.fixture(scope="module")
def findings(tmp_path_factory):
    before = torch.get_num_threads()
    torch.set_num_threads(1)  # tiny convolutions; avoids thread contention on 2 cores
    spec = importlib.util.spec_from_file_location("probe_bn_vs_gn_example", EXAMPLE)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    out = tmp_path_factory.mktemp("example")
    try:
        yield module.main(["--out", str(out)]), out
    finally:
        torch.set_num_threads(before)


def test_example_batchnorm_vs_groupnorm(findings):
    f, out = findings
    bn, gn = f["probe_bn"], f["probe_gn"]
    assert all(lr.kind == "batch" for lr in bn.layers)
    assert all(lr.kind == "group" and lr.batch_sizes is None for lr in gn.layers)
    assert f["kl_ratio_2_vs_32"] > 8  # BatchNorm's distortion rises steeply as b shrinks
    assert bn.recommended_batch_size is None or bn.recommended_batch_size > 2


def test_example_site_b_is_stale_and_recalibration_repairs_it(findings):
    f, out = findings
    assert f["probe_site_b"].stale_layers  # gain and offset at site B
    assert all(kl < 0.05 for kl in f["held_out_kl_after"].values())  # on held-out site B
    acc = f["accuracy"]
    assert acc["bn_site_b_recalibrated"] > acc["bn_site_b_before"] + 0.2
    assert {p.name for p in out.iterdir()} >= {"probe_site_a_bn.json", "probe_site_a_bn.png"}
