"""Summary statistics checked against numpy float64 (reference library) and merge laws."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shiftwatch import ConfigError, Summary, UnsupportedInputError, make_edges, summarize
from shiftwatch.summary import FIELDS

IX = {k: i for i, k in enumerate(FIELDS)}


def channel_last(x: np.ndarray, cdim: int) -> np.ndarray:
    """(N, ..., C) view with values of one channel along the last axis, rows first."""
    x = np.moveaxis(x, cdim, -1)
    return x.reshape(x.shape[0], -1, x.shape[-1])


@pytest.mark.parametrize(
    ("shape", "cdim"),
    [((8, 3, 5, 7), 1), ((16, 10), -1), ((4, 6, 5), -1), ((2, 4, 3, 3, 3), 1), ((1, 5), 1)],
)
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_moments_match_numpy_float64(shape, cdim, dtype):
    g = torch.Generator().manual_seed(0)
    x = torch.randn(*shape, generator=g, dtype=dtype) * 3 + 2
    s = summarize(x, channel_dim=cdim)
    ref = channel_last(x.double().numpy(), cdim)  # numpy float64 is the reference
    np.testing.assert_allclose(s.mean(layer=False).numpy(), ref.mean(axis=(0, 1)), rtol=1e-6)
    np.testing.assert_allclose(s.var(layer=False).numpy(), ref.var(axis=(0, 1)), rtol=1e-5)
    np.testing.assert_allclose(float(s.mean()), ref.mean(), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(float(s.var()), ref.var(), rtol=1e-5)
    np.testing.assert_allclose(float(s.var(unbiased=True)), ref.var(ddof=1), rtol=1e-5)
    assert float(s.count) == x.numel()
    assert float(s.min) == pytest.approx(float(x.min())) and float(s.max) == pytest.approx(
        float(x.max())
    )
    # row statistics: the spread of per-sample means (numpy reference)
    row_means = ref.mean(axis=(1, 2))
    t = s.table[-1]
    assert float(t[IX["rows"]]) == shape[0]
    np.testing.assert_allclose(float(t[IX["row_mean"]]), row_means.mean(), rtol=1e-6, atol=1e-9)
    m2 = ((row_means - row_means.mean()) ** 2).sum()
    np.testing.assert_allclose(float(t[IX["row_mean_m2"]]), m2, rtol=1e-5, atol=1e-9)


def test_float32_large_offset_variance_is_stable():
    # mean 1e4, std 1 in float32: a naive float32 sum of squares loses the variance entirely
    g = torch.Generator().manual_seed(1)
    x = (torch.randn(64, 16, 32, 32, generator=g, dtype=torch.float64) + 1e4).float()
    s = summarize(x)
    ref = channel_last(x.double().numpy(), 1)  # numpy float64 on the same float32 values
    assert abs(float(s.var()) / ref.var() - 1) < 1e-3
    np.testing.assert_allclose(s.var(layer=False).numpy(), ref.var(axis=(0, 1)), rtol=1e-3)
    naive = (x.pow(2).mean() - x.mean().pow(2)).item()  # what the stable path avoids
    assert abs(naive / ref.var() - 1) > 1e-3


def test_nonfinite_values_are_excluded_and_counted():
    x = torch.randn(6, 4, 10, generator=torch.Generator().manual_seed(5))
    x[0, 0, 0] = math.nan
    x[2, 1, 3] = math.inf
    x[5, 3, :] = -math.inf  # a whole (row, channel) cell
    s = summarize(x, edges=make_edges(-3, 3, 12), max_hist_values=None)
    xn = x.double().numpy()
    finite = np.where(np.isfinite(xn), xn, np.nan)
    per_ch = np.moveaxis(finite, 1, -1).reshape(-1, 4)
    # float32 sums: absolute error ~1e-7 of the values' scale (unit std here)
    np.testing.assert_allclose(s.mean(layer=False).numpy(), np.nanmean(per_ch, 0), atol=1e-6)
    np.testing.assert_allclose(s.var(layer=False).numpy(), np.nanvar(per_ch, 0), rtol=1e-5)
    assert float(s.nonfinite) == 12
    assert s.field("nonfinite", layer=False).tolist() == [1, 1, 0, 10]
    assert float(s.count) == x.numel() - 12
    assert float(s.min) == pytest.approx(np.nanmin(finite), rel=1e-6)
    assert float(s.max) == pytest.approx(np.nanmax(finite), rel=1e-6)
    assert float(s.hist.sum()) == x.numel() - 12
    assert torch.isfinite(s.table).all()


def test_histogram_matches_numpy_histogram():
    g = torch.Generator().manual_seed(2)
    x = torch.randn(50, 3, 20, generator=g)
    edges = make_edges(-2.0, 2.0, 16)
    s = summarize(x, edges=edges, max_hist_values=None)
    v = x.double().numpy().ravel()
    inner, _ = np.histogram(v, bins=edges.numpy())  # numpy reference (values never hit edges)
    assert s.hist[1:-1].tolist() == inner.tolist()
    assert float(s.hist[0]) == (v < -2).sum() and float(s.hist[-1]) == (v >= 2).sum()
    # non-uniform edges take the binary-search path and must agree
    odd = torch.tensor([-3.0, -1.0, -0.2, 0.0, 0.5, 2.5], dtype=torch.float64)
    s2 = summarize(x, edges=odd, max_hist_values=None)
    inner2, _ = np.histogram(v, bins=odd.numpy())
    assert s2.hist[1:-1].tolist() == inner2.tolist()


def test_histogram_subsample_is_capped():
    x = torch.randn(64, 8, 32, 32)
    s = summarize(x, edges=make_edges(-4, 4, 32), max_hist_values=10_000)
    assert 5_000 <= float(s.hist.sum()) <= 10_000
    assert float(s.count) == x.numel()  # moments always use every value


@pytest.mark.parametrize(
    "x",
    [
        torch.zeros(0, 3, 4),
        torch.zeros(0, 5),
        torch.full((1, 3, 4, 4), 7.0),
        torch.full((9, 2), -2.0),
        torch.randn(1, 4),
        torch.tensor(3.0),
        torch.randn(5),
    ],
    ids=["empty4d", "empty2d", "one-constant", "constant", "batch-of-one", "scalar", "vector"],
)
def test_degenerate_inputs_give_defined_results(x):
    edges = make_edges(-1, 1, 4)
    s = summarize(x, edges=edges, channel_dim=1)
    assert torch.isfinite(s.table).all()
    assert (s.var() >= 0).all()
    from shiftwatch.divergence import compare, compare_channels

    for other in (s, summarize(torch.randn(x.shape) if x.numel() else x, edges=edges)):
        for score in compare(s, other).values():
            assert math.isfinite(score.value) and math.isfinite(score.noise)
            assert math.isfinite(float(score.ratio))
        for score in compare_channels(other, s).values():
            assert np.isfinite(score.value).all() and np.isfinite(score.ratio).all()


@pytest.mark.parametrize(
    "dtype", [torch.int64, torch.int32, torch.bool, torch.uint8, torch.complex64]
)
def test_non_float_inputs_are_rejected(dtype):
    x = torch.zeros(4, 3, dtype=dtype)
    with pytest.raises(UnsupportedInputError, match="dtype"):
        summarize(x)


def test_bad_settings_name_the_field():
    with pytest.raises(ConfigError, match="channel_dim"):
        summarize(torch.randn(4, 3), channel_dim=0)
    with pytest.raises(ConfigError, match="channel_dim"):
        summarize(torch.randn(4, 3), channel_dim=5)
    with pytest.raises(ConfigError, match="max_hist_values"):
        summarize(torch.randn(4, 3), max_hist_values=0)
    with pytest.raises(ConfigError, match="bins"):
        make_edges(0, 1, 0)


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_half_precision_is_summarised_in_float32(dtype):
    x = (torch.randn(32, 4, 8, 8) * 0.5 + 3).to(dtype)
    s = summarize(x)
    ref = channel_last(x.double().numpy(), 1)  # exact values of the half tensor, in float64
    np.testing.assert_allclose(s.var(layer=False).numpy(), ref.var(axis=(0, 1)), rtol=1e-5)
    assert s.table.dtype == torch.float64


def test_merge_rejects_mismatches():
    a = summarize(torch.randn(4, 3), edges=make_edges(-1, 1, 4))
    with pytest.raises(ConfigError, match="edges"):
        a.merge(summarize(torch.randn(4, 3), edges=make_edges(-2, 2, 4)))
    with pytest.raises(ConfigError, match="channels"):
        a.merge(summarize(torch.randn(4, 5), edges=make_edges(-1, 1, 4)))
    with pytest.raises(ConfigError, match="histogram"):
        a.merge(summarize(torch.randn(4, 3)))


def test_dict_and_pack_round_trips():
    s = summarize(torch.randn(7, 3, 5), edges=make_edges(-2, 2, 8))
    back = Summary.from_dict(s.to_dict())
    assert torch.equal(back.table, s.table) and torch.equal(back.hist, s.hist)
    assert torch.equal(back.extrema, s.extrema) and torch.equal(back.edges, s.edges)
    flat = s.pack()
    assert flat.numel() == Summary.packed_size(3, 8)
    un = Summary.unpack(flat, 3, s.edges)
    assert torch.equal(un.table, s.table) and torch.equal(un.hist, s.hist)
    empty = summarize(torch.zeros(0, 2))
    assert Summary.from_dict(empty.to_dict()).extrema.tolist() == [math.inf, -math.inf]
    with pytest.raises(ConfigError, match="schema"):
        Summary.from_dict({**s.to_dict(), "schema": 99})


# --------------------------------------------------------------------- merge property
def _assert_same_summary(m: Summary, f: Summary):
    """Merged vs concatenated, to float64 rounding of quantities of the data's scale."""
    n = FIELDS.index
    for col in ("n", "nonfinite", "rows"):
        assert torch.equal(m.table[:, n(col)], f.table[:, n(col)]), col
    for col in ("mean", "row_mean"):
        diff = (m.table[:, n(col)] - f.table[:, n(col)]).abs()
        sd = (f.table[:, n("m2")] / f.table[:, n("n")].clamp_min(1)).sqrt()
        # float32 partial sums (order depends on layout and buffer alignment): ~1e-6 of scale
        assert (diff <= 1e-6 * (f.table[:, n(col)].abs() + sd + 1e-3)).all(), col
    # Sums of squares are accumulated in float32 per (row, channel) about a per-part shift
    # (the first value of the part), so the two sides round differently: ~1e-6 relative.
    var = f.table[:, n("m2")] / f.table[:, n("n")].clamp_min(1)
    scale2 = var + f.table[:, n("mean")] ** 2  # squared scale of the values
    for col in ("m2", "row_var"):
        a, b = m.table[:, n(col)], f.table[:, n(col)]
        assert ((a - b).abs() <= 1e-5 * b.abs() + 1e-9 * b.abs().max() + 1e-12).all(), col
    # Row means carry float32 rounding of ~1e-7 of the values' scale, so the spread of
    # nearly equal row means is compared with an absolute tolerance on that scale.
    a, b = m.table[:, n("row_mean_m2")], f.table[:, n("row_mean_m2")]
    rows = f.table[:, n("rows")]
    assert ((a - b).abs() <= 1e-5 * b.abs() + 1e-8 * rows * scale2 + 1e-12).all()
    # The spread of within-row variances is a second-order quantity built from float32
    # per-row sums (whose rounding depends on memory alignment): ~1e-5 relative.
    a, b = m.table[:, n("row_var_m2")], f.table[:, n("row_var_m2")]
    rv = f.table[:, n("row_var")]
    assert ((a - b).abs() <= 1e-4 * b.abs() + 1e-6 * rv * rv + 1e-12).all()
    # min/max are recovered as min(x - shift) + shift: exact up to float32 rounding of
    # x - shift, and the two sides use different shifts
    spread = (f.extrema[1] - f.extrema[0]).abs() + f.extrema.abs()
    assert torch.allclose(m.extrema, f.extrema, rtol=0, atol=float(2.4e-7 * spread.max()) + 1e-30)
    assert torch.equal(m.hist, f.hist)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    rows=st.integers(1, 40),
    channels=st.integers(1, 6),
    inner=st.sampled_from([(), (1,), (3,), (4, 5), (50,), (30, 30)]),
    split=st.floats(0.0, 1.0),
    offset=st.sampled_from([0.0, 3.0, -250.0, 1e4]),
    scale=st.sampled_from([1e-3, 1.0, 40.0]),
    nonfinite=st.floats(0.0, 0.2),
    seed=st.integers(0, 2**31 - 1),
    channel_last=st.booleans(),
)
def test_merge_equals_concatenation(
    rows, channels, inner, split, offset, scale, nonfinite, seed, channel_last
):
    """Merging the summaries of two parts equals the summary of their concatenation
    (Chan et al. 1983 pairwise update); sizes range from 1 to 10^5 values."""
    g = torch.Generator().manual_seed(seed)
    shape = (rows, *inner, channels) if channel_last else (rows, channels, *inner)
    x = torch.randn(*shape, generator=g) * scale + offset
    if nonfinite > 0:
        mask = torch.rand(shape, generator=g) < nonfinite
        choice = torch.randint(0, 3, shape, generator=g)
        bad = torch.tensor([math.nan, math.inf, -math.inf])[choice]
        x = torch.where(mask, bad, x)
    cdim = -1 if channel_last else 1
    edges = make_edges(offset - 2 * scale, offset + 2 * scale, 10)
    k = int(round(split * rows))
    kw = dict(channel_dim=cdim, edges=edges, max_hist_values=None)
    merged = summarize(x[:k], **kw).merge(summarize(x[k:], **kw))
    full = summarize(x, **kw)
    _assert_same_summary(merged, full)
    # associativity of a three-way split
    j = (k + rows) // 2
    three = Summary.merge_all(
        [summarize(x[:k], **kw), summarize(x[k:j], **kw), summarize(x[j:], **kw)]
    )
    _assert_same_summary(three, full)


def test_torch_and_numpy_tails_agree():
    """On CPU the small float64 tail runs in numpy; other devices (CUDA) run the same code
    in torch.  Run the torch variant on CPU to check that both give the same table."""
    from shiftwatch.cells import _finish, _table_single_values

    g = torch.Generator().manual_seed(11)
    n, c, per_row = 7, 5, 12
    s1 = torch.randn(n, c, generator=g, dtype=torch.float64) * 3
    s2 = s1**2 / per_row + torch.rand(n, c, generator=g, dtype=torch.float64) * 10
    nf = torch.randint(0, 3, (n, c), generator=g).double()
    nf[2, 1] = per_row  # a cell with no finite value
    shift = torch.randn(c, generator=g, dtype=torch.float64)
    lo, hi = -torch.rand(c, dtype=torch.float64), torch.rand(c, dtype=torch.float64)
    t_table, t_ext = _finish(s1, s2, nf, shift, lo, hi, per_row)
    n_table, n_ext = _finish(*(t.numpy() for t in (s1, s2, nf, shift, lo, hi)), per_row)
    assert t_table.dtype == torch.float64
    np.testing.assert_allclose(t_table.numpy(), n_table, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(t_ext.numpy(), n_ext, rtol=1e-12)
    x = torch.randn(9, 4, generator=g)
    x[3, 2] = math.nan
    a_table, a_ext = _table_single_values(x, use_numpy=True)
    b_table, b_ext = _table_single_values(x, use_numpy=False)
    assert b_table.dtype == torch.float64
    np.testing.assert_allclose(a_table.numpy(), b_table.numpy(), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(a_ext.numpy(), b_ext.numpy(), rtol=1e-12)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    rows=st.integers(1, 9),
    channels=st.integers(1, 6),
    inner=st.sampled_from([(2, 3), (4, 4), (1, 7), (5, 1)]),
    offset=st.sampled_from([0.0, 3.0, -250.0, 1e4]),
    scale=st.sampled_from([1e-3, 1.0, 40.0]),
    seed=st.integers(0, 2**31 - 1),
)
def test_dense_fast_path_equals_general_path(rows, channels, inner, offset, scale, seed):
    """The CPU fast path (contiguous, all finite: plain means) and the
    general branch-free path (taken for a non-contiguous view of the same cells) agree.
    Both are also checked against numpy float64 above; this pins them to each other."""
    from shiftwatch.cells import _single_values_dense, _table_single_values

    g = torch.Generator().manual_seed(seed)
    x = torch.randn(rows, channels, *inner, generator=g) * scale + offset
    edges = make_edges(offset - 2 * scale, offset + 2 * scale, 10)
    fast = summarize(x, edges=edges, max_hist_values=None)
    general = summarize(x.transpose(2, 3), edges=edges, max_hist_values=None)  # not contiguous
    # the two paths sum different (shifted) values in float32, so M2-type columns differ
    # by float32 rounding (~1e-6 relative), the others by far less
    # (M2 of a few close row statistics cancels, so for those columns the absolute
    # float32 error of the cell sums, ~1e-7 of the values' magnitude per value, bounds
    # the difference instead; the numpy-float64 tests above check accuracy itself)
    mag = scale + abs(offset)
    cols = {name: i for i, name in enumerate(FIELDS)}
    f, gt = fast.table.numpy(), general.table.numpy()
    for name, atol in (("n", 0), ("mean", 1e-6 * mag), ("m2", 1e-6 * mag**2 * x.numel()),
                       ("nonfinite", 0), ("rows", 0), ("row_mean", 1e-6 * mag),
                       ("row_mean_m2", 1e-6 * mag**2 * rows),
                       ("row_var", 1e-6 * mag**2), ("row_var_m2", 1e-6 * mag**4 * rows)):
        np.testing.assert_allclose(f[:, cols[name]], gt[:, cols[name]], rtol=1e-5,
                                   atol=atol, err_msg=name)
    # the fast path takes min/max of the input itself (exact); the general one recovers
    # them as min(x - shift) + shift, exact up to float32 rounding (~1e-7 relative)
    assert fast.extrema.tolist() == [float(x.min()), float(x.max())]
    assert fast.extrema.tolist() == pytest.approx(general.extrema.tolist(), rel=1e-6,
                                                  abs=1e-6 * (scale + abs(offset)))
    assert fast.hist.sum() == general.hist.sum() == x.numel()
    # random normal values land within one float32 rounding of a bin edge with
    # negligible probability, so the counts agree exactly
    assert fast.hist.tolist() == general.hist.tolist()
    v = x.reshape(rows, -1)
    a_table, a_ext = _single_values_dense(v.double().numpy())
    b_table, b_ext = _table_single_values(v)
    np.testing.assert_allclose(a_table, b_table.numpy(), rtol=1e-9, atol=1e-9 * scale)
    np.testing.assert_allclose(a_ext, b_ext.numpy(), rtol=1e-12)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    shapes=st.lists(
        st.tuples(st.sampled_from([3, 8]), st.integers(1, 5),
                  st.sampled_from([(2, 3), (4,), (1, 1), ()])),
        min_size=1, max_size=5),
    offset=st.sampled_from([0.0, -7.0, 300.0]),
    nan_layer=st.booleans(),
    seed=st.integers(0, 2**31 - 1),
)
def test_tails_run_together_equal_each_layer_alone(shapes, offset, nan_layer, seed):
    """finish_staged_many (the dense tails of all layers of one row count in one pass,
    by segment sums) gives each layer's own table: both are float64 arithmetic on the
    same float32 cell sums, so they agree to float64 rounding.  Mixed in: linear-style
    inputs (one value per cell) and an input holding a NaN (the general path), which
    are finished on their own."""
    from shiftwatch.summary import finish_staged_many, summarize_staged

    g = torch.Generator().manual_seed(seed)
    xs = [torch.randn(r, c, *inner, generator=g) * 2 + offset for r, c, inner in shapes]
    if nan_layer:
        xs[0] = xs[0].clone()
        xs[0].view(-1)[0] = math.nan
    edges = make_edges(offset - 4, offset + 4, 8)
    alone = [summarize_staged(x, edges=edges)() for x in xs]
    together = finish_staged_many([summarize_staged(x, edges=edges) for x in xs])
    for x, a, b in zip(xs, alone, together, strict=True):
        scale = (2 + abs(offset)) ** 2 * x.numel()
        np.testing.assert_allclose(b.table.numpy(), a.table.numpy(), rtol=1e-9,
                                   atol=1e-12 * scale)
        assert b.extrema.tolist() == a.extrema.tolist()
        assert b.hist.tolist() == a.hist.tolist()
