"""The monitor's vectorised compare stage against per-layer computations: each layer's
scores equal ``divergence.compare`` on that layer's own summaries and edges, channel
aggregates equal plain numpy, and merging host flats equals merging the summaries."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from shiftwatch.compare import Layout, compare_all, edges_from_sample, layer_stats, merge_flats
from shiftwatch.divergence import METRICS, MOMENT_METRICS, compare, moment_scores
from shiftwatch.summary import summarize

CHANNELS = (3, 1, 2, 7)
BINS = 16


def sample(g, shift, edges=None):
    xs = [torch.randn(16, c, 5, generator=g) * (1 + i) + shift * torch.arange(c).view(1, c, 1)
          for i, c in enumerate(CHANNELS)]
    return [summarize(x, channel_dim=1, edges=None if edges is None else edges[i])
            for i, x in enumerate(xs)]


def layout():
    return Layout(tuple(f"l{i}" for i in range(len(CHANNELS))), CHANNELS, BINS)


def test_layer_scores_equal_per_layer_compare_with_own_edges():
    g = torch.Generator().manual_seed(0)
    lay = layout()
    first = lay.pack(sample(g, 0.0), torch.device("cpu")).numpy().copy()
    lo, hi = edges_from_sample(layer_stats(lay.split(first), lay))
    edges = [torch.linspace(a, b, BINS + 1, dtype=torch.float64) for a, b in zip(lo, hi,
                                                                                   strict=True)]
    cur_s, ref_s = sample(g, 0.4, edges), sample(g, 0.0, edges)
    cur = lay.split(lay.pack(cur_s, torch.device("cpu")).numpy().copy())
    ref = lay.split(lay.pack(ref_s, torch.device("cpu")).numpy().copy())
    ((layer, _),) = compare_all(cur, [ref], lay, np.stack([lo, hi], 1))
    for i in range(len(CHANNELS)):
        # the per-layer API, on the layer's real (different) edges
        expect = compare(cur_s[i], ref_s[i])
        for j, m in enumerate(METRICS):
            assert layer["value"][j, i] == pytest.approx(expect[m].value, rel=1e-9, abs=1e-12), m
            assert layer["noise"][j, i] == pytest.approx(expect[m].noise, rel=1e-9, abs=1e-12), m


def test_channel_aggregates_equal_plain_numpy():
    g = torch.Generator().manual_seed(1)
    lay = layout()
    a = lay.split(lay.pack(sample(g, 0.3), torch.device("cpu")).numpy().copy())
    b = lay.split(lay.pack(sample(g, 0.0), torch.device("cpu")).numpy().copy())
    ((_, ch),) = compare_all(a, [b], lay, np.full((len(CHANNELS), 2), np.nan))
    ms = moment_scores(a.table, b.table)
    for j, m in enumerate(MOMENT_METRICS):
        r, v, n = ms[m].ratio, ms[m].value, ms[m].noise
        for i, c in enumerate(CHANNELS):
            rows = np.arange(lay.layer_rows[i] - c, lay.layer_rows[i])
            order = np.argsort(-r[rows], kind="stable")  # numpy as the reference
            assert ch["worst"][j, i] == order[0]
            assert ch["max_ratio"][j, i] == pytest.approx(r[rows].max())
            assert ch["worst_value"][j, i] == pytest.approx(v[rows][order[0]])
            assert ch["worst_noise"][j, i] == pytest.approx(n[rows][order[0]])
            assert ch["max_value"][j, i] == pytest.approx(v[rows].max())
            assert ch["argmax_value"][j, i] == np.argmax(v[rows])
            assert ch["mean_value"][j, i] == pytest.approx(v[rows].mean())
            assert list(ch["top"][j, i]) == [*order[:3]] + [-1] * (3 - min(3, c))


def test_merging_flats_equals_merging_summaries():
    g = torch.Generator().manual_seed(2)
    lay = layout()
    edges = [torch.linspace(-4, 4, BINS + 1, dtype=torch.float64)] * len(CHANNELS)
    s1, s2 = sample(g, 0.0, edges), sample(g, 1.0, edges)
    f1 = lay.pack(s1, torch.device("cpu")).numpy().copy()
    f2 = lay.pack(s2, torch.device("cpu")).numpy().copy()
    merged = merge_flats(f1, f2, lay)
    expect = lay.pack([a.merge(b) for a, b in zip(s1, s2, strict=True)], torch.device("cpu"))
    np.testing.assert_allclose(merged, expect.numpy(), rtol=1e-12, atol=1e-12)
    # and an empty (placeholder) flat is the identity
    np.testing.assert_allclose(merge_flats(lay.empty(), f1, lay), f1, rtol=1e-12, atol=1e-12)


def test_cached_spread_terms_and_remembered_splits_change_no_score():
    """A sample's spread terms are cached on its Parts and splits are remembered by the
    flat's identity, so the previous sample and the reference reuse them; the scores
    are bitwise those of fresh Parts, with the pool on as in the monitor."""
    g = torch.Generator().manual_seed(2)
    lay = layout()
    flats = [lay.pack(sample(g, 0.1 * k), torch.device("cpu")).numpy().copy()
             for k in range(3)]
    ranges = np.full((len(CHANNELS), 2), np.nan)
    cur, prev, ref = (lay.split(f) for f in flats)
    compare_all(prev, [ref], lay, ranges, pool=ref)  # prev and ref get cached terms
    assert lay.split(flats[1]) is prev and prev._spread is not None
    got = compare_all(cur, [lay.split(flats[1]), lay.split(flats[2])], lay, ranges,
                      pool=lay.split(flats[2]))
    fresh = Layout(lay.names, lay.channels, lay.bins)  # nothing remembered, nothing cached
    want = compare_all(fresh.split(flats[0]), [fresh.split(flats[1]), fresh.split(flats[2])],
                       fresh, ranges, pool=fresh.split(flats[2]))
    for (gl, gc), (wl, wc) in zip(got, want, strict=True):
        for key in wl:
            np.testing.assert_array_equal(gl[key], wl[key])
        for key in wc:
            np.testing.assert_array_equal(gc[key], wc[key])
    # an equal copy is another sample; a split is forgotten with its flat
    assert lay.split(flats[1].copy()) is not prev
    for _ in range(10):
        lay.split(flats[0].copy())  # each copy dies at once
    assert len(lay._splits) == 3 and lay.split(flats[1]) is prev
    del flats[1]
    assert len(lay._splits) == 2
