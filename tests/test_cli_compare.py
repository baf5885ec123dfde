"""``shiftwatch compare``: verdicts only where the difference exceeds noise."""

from __future__ import annotations

import json
from html.parser import HTMLParser

import numpy as np
import pytest
from eventlog_factory import Scenario, load_naive, write_log

from shiftwatch.cli import main

LAYERS = ["stem.conv", "block1.norm", "block1.conv", "head.fc"]


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    root = tmp_path_factory.mktemp("cmp")
    a = write_log(root / "a", Scenario(shifts={"block1.conv": (300, 1.0)}, samples=60, seed=11))
    b = write_log(root / "b", Scenario(samples=60, seed=12))
    return a, b


def _compare(capsys, *argv) -> dict:
    assert main(["compare", *map(str, argv), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_names_the_steadier_run_layer_by_layer(pair, capsys):
    a, b = pair
    c = _compare(capsys, a.path.parent, b.path.parent)
    verdicts = {r["layer"]: r["steadier"] for r in c["layers"]}
    assert verdicts == {"stem.conv": None, "block1.norm": None, "block1.conv": "B",
                        "head.fc": None}
    assert c["overall"] == "B" and c["tally"]["B"] == 1
    # swapping the runs swaps the verdict
    c2 = _compare(capsys, b.path.parent, a.path.parent)
    assert {r["layer"]: r["steadier"] for r in c2["layers"]}["block1.conv"] == "A"


def test_typical_and_peak_values_come_from_the_logs(pair, capsys):
    a, b = pair
    c = _compare(capsys, a.path.parent, b.path.parent)
    row = next(r for r in c["layers"] if r["layer"] == "block1.conv")
    vals = np.array([rec["layers"]["block1.conv"]["vs_reference"]["mean_shift"]["value"]
                     for rec in load_naive(a.path) if rec["kind"] == "step"
                     and rec["phase"] == "train" and rec["layers"]["block1.conv"]["vs_reference"]])
    assert row["A"]["samples"] == len(vals)
    assert row["A"]["peak"] == vals.max()  # exact
    # typical = median from 1/16-decade histograms: within a bin of numpy's median bracket
    lo = np.quantile(vals, 0.5, method="lower") / 10 ** (1 / 16)
    hi = np.quantile(vals, 0.5, method="higher") * 10 ** (1 / 16)
    assert lo <= row["A"]["typical"] <= hi


def test_no_verdict_when_both_runs_sit_at_noise_level_whatever_their_batch_size(tmp_path, capsys):
    """Run A has twice the noise (a quarter of the batch): raw values differ, shifts do not."""
    for seed in range(3):
        a = write_log(tmp_path / f"a{seed}", Scenario(noise_scale=dict.fromkeys(LAYERS, 2.0),
                                                      samples=200, seed=seed))
        b = write_log(tmp_path / f"b{seed}", Scenario(samples=200, seed=100 + seed))
        c = _compare(capsys, a.path.parent, b.path.parent)
        assert [r["verdict"] for r in c["layers"]] == ["no clear difference"] * 4
        assert c["overall"] is None
        medians = [r["A"]["typical"] / r["B"]["typical"] for r in c["layers"]]
        assert all(1.5 < m < 2.7 for m in medians)  # the raw values do differ, by ~2x


def test_text_output_layers_only_in_one_run_and_min_samples(tmp_path, pair, capsys):
    a, _ = pair
    other = write_log(tmp_path / "o", Scenario(
        layers=[("stem.conv", "Conv2d", 3), ("extra.fc", "Linear", 4)], samples=4))
    assert main(["compare", str(a.path.parent), str(other.path.parent)]) == 0
    out = capsys.readouterr().out
    assert "too few samples" in out
    assert "only in A: block1.norm, block1.conv, head.fc" in out
    assert "only in B: extra.fc" in out
    assert "a verdict needs |A - B| > 2 x sqrt(noise_A^2 + noise_B^2)" in out
    unrelated = write_log(tmp_path / "u", Scenario(layers=[("x", "Linear", 2)], samples=4))
    assert main(["compare", str(a.path.parent), str(unrelated.path.parent)]) == 2
    assert "no layer name in common" in capsys.readouterr().err
    assert main(["compare", str(a.path.parent), str(a.path.parent), "--margin", "-1"]) == 2
    assert "'--margin' must be a positive number" in capsys.readouterr().err


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def test_comparison_page(pair, tmp_path, capsys):
    a, b = pair
    out = tmp_path / "cmp.html"
    assert main(["compare", str(a.path.parent), str(b.path.parent), "-o", str(out)]) == 0
    assert f"wrote {out}" in capsys.readouterr().out
    p = _Tags()
    p.feed(out.read_text())
    imgs = [t for t in p.tags if t[0] == "img"]
    assert len(imgs) == 1 and imgs[0][1]["src"].startswith("data:image/png;base64,")
    assert [t for t in p.tags if t[0] == "script"] == [("script", {})]
