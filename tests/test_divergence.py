"""Divergences checked against scipy / PyTorch / closed forms, and noise-floor calibration."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.spatial.distance
import scipy.stats
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from shiftwatch import make_edges, summarize
from shiftwatch.divergence import (
    HIST_METRICS,
    METRICS,
    MOMENT_METRICS,
    SMOOTHING,
    channel_view,
    compare,
    compare_channels,
    design_effect,
    gauss_kl,
    psi_band,
)

EDGES = make_edges(-4.0, 4.0, 32)


def _summ(x, edges=EDGES, **kw):
    return summarize(x, edges=edges, max_hist_values=None, **kw)


def _pair(seed=0, n=2000, shift=0.3, scale=1.2):
    g = torch.Generator().manual_seed(seed)
    a = torch.randn(n, 1, generator=g) * scale + shift
    b = torch.randn(n, 1, generator=g)
    return _summ(a), _summ(b), a.double().numpy().ravel(), b.double().numpy().ravel()


def test_hist_kl_matches_scipy_entropy():
    cur, ref, _, _ = _pair()
    p = cur.hist.numpy() + SMOOTHING
    q = ref.hist.numpy() + SMOOTHING
    # scipy.stats.entropy(p, q) = KL(p || q) after normalising both (reference library)
    assert compare(cur, ref)["hist_kl"].value == pytest.approx(scipy.stats.entropy(p, q), rel=1e-10)


def test_js_matches_scipy_jensenshannon():
    cur, ref, _, _ = _pair(1)
    p = cur.hist.numpy() + SMOOTHING
    q = ref.hist.numpy() + SMOOTHING
    # scipy's jensenshannon returns the JS *distance* (square root of the divergence), base e
    expected = scipy.spatial.distance.jensenshannon(p, q) ** 2
    assert compare(cur, ref)["js"].value == pytest.approx(expected, rel=1e-8)


def test_psi_matches_textbook_formula_and_bands():
    cur, ref, _, _ = _pair(2, shift=0.5, scale=1.0)
    p = (cur.hist.numpy() + SMOOTHING) / (cur.hist.numpy() + SMOOTHING).sum()
    q = (ref.hist.numpy() + SMOOTHING) / (ref.hist.numpy() + SMOOTHING).sum()
    # PSI = sum_i (p_i - q_i) ln(p_i / q_i) (population stability index, textbook definition)
    expected = float(np.sum((p - q) * np.log(p / q)))
    value = compare(cur, ref)["psi"].value
    assert value == pytest.approx(expected, rel=1e-10)
    # PSI is the symmetrised KL: KL(p||q) + KL(q||p)
    assert value == pytest.approx(scipy.stats.entropy(p, q) + scipy.stats.entropy(q, p), rel=1e-10)
    # bands 0.1 / 0.25: common practice, no source
    assert psi_band(0.05) == "stable" and psi_band(0.2) == "moderate" and psi_band(0.3) == "major"
    assert psi_band(value) == "major"  # a half-std mean shift gives PSI ~ 0.25+ (N(0,1) vs N(.5,1))


@pytest.mark.parametrize(("shift", "scale"), [(0.3, 1.2), (-1.0, 0.7), (0.0, 1.0), (2.0, 2.0)])
def test_w1_matches_scipy_within_one_bin(shift, scale):
    g = torch.Generator().manual_seed(3)
    a = torch.randn(3000, 2, generator=g) * scale + shift
    b = torch.randn(2500, 2, generator=g)
    edges = make_edges(-5.0, 5.0, 40)
    cur, ref = _summ(a, edges), _summ(b, edges)
    w1 = compare(cur, ref)["w1"].value * float(ref.std())  # back to raw units
    # scipy.stats.wasserstein_distance on the raw values (reference library)
    expected = scipy.stats.wasserstein_distance(a.numpy().ravel(), b.numpy().ravel())
    width = 10.0 / 40
    assert abs(w1 - expected) <= width


def test_gauss_kl_matches_closed_form_and_torch():
    rng = np.random.default_rng(4)
    for _ in range(50):
        m0, m1 = rng.normal(size=2) * 3
        s0, s1 = rng.uniform(0.1, 5, size=2)
        # closed form KL(N(m0,s0^2) || N(m1,s1^2)) = log(s1/s0) + (s0^2 + (m0-m1)^2)/(2 s1^2) - 1/2
        closed = math.log(s1 / s0) + (s0**2 + (m0 - m1) ** 2) / (2 * s1**2) - 0.5
        # torch.distributions.kl_divergence (reference library)
        ref = torch.distributions.kl_divergence(
            torch.distributions.Normal(m0, s0), torch.distributions.Normal(m1, s1)
        ).item()
        ours = float(gauss_kl(m0, s0**2, m1, s1**2))
        assert ours == pytest.approx(closed, rel=1e-12, abs=1e-14)
        assert ours == pytest.approx(ref, rel=1e-5, abs=1e-7)
    # and on summaries: compare() uses the summaries' population moments
    cur, ref_s, a, b = _pair(5)
    expected = gauss_kl(a.mean(), a.var(), b.mean(), b.var())
    assert compare(cur, ref_s)["gauss_kl"].value == pytest.approx(float(expected), rel=1e-6)


def test_hist_kl_of_large_gaussian_samples_converges_to_gaussian_kl():
    """Binned KL -> continuous KL as n grows and bins narrow.  Tolerance 3 %: with 400
    bins of width 0.04 the discretisation error is O(width^2) (< 0.1 %), the smoothing
    bias with n = 2e6 is ~ bins * alpha / n (< 0.1 %), the sampling noise ~1/sqrt(n * KL) is
    < 1 % and the truncation of the tails beyond 8 std is negligible."""
    g = torch.Generator().manual_seed(6)
    n = 2_000_000
    a = torch.randn(n, 1, generator=g, dtype=torch.float64) * 1.3 + 0.4
    b = torch.randn(n, 1, generator=g, dtype=torch.float64)
    edges = make_edges(-8.0, 8.0, 400)
    kl = compare(_summ(a, edges), _summ(b, edges))["hist_kl"].value
    closed = math.log(1 / 1.3) + (1.3**2 + 0.4**2) / 2 - 0.5
    assert kl == pytest.approx(closed, rel=0.03)


def test_mean_shift_and_log_std_ratio_definitions():
    cur, ref, a, b = _pair(7)
    out = compare(cur, ref)
    assert out["mean_shift"].value == pytest.approx(abs(a.mean() - b.mean()) / b.std(), rel=1e-6)
    assert out["log_std_ratio"].value == pytest.approx(abs(math.log(a.std() / b.std())), rel=1e-6)


# ------------------------------------------------------------------ noise floors
def _null_ratios(n, reps, rows_of=1, seed=0):
    g = torch.Generator().manual_seed(seed)
    out = {m: [] for m in METRICS}
    for _ in range(reps):
        a = torch.randn(n // rows_of, 1, rows_of, generator=g)
        b = torch.randn(n // rows_of, 1, rows_of, generator=g)
        for k, v in compare(_summ(a), _summ(b)).items():
            out[k].append(float(v.ratio))
    return {k: float(np.median(v)) for k, v in out.items()}


@pytest.mark.parametrize(
    ("n", "reps"), [(16, 300), (128, 200), (1024, 150), (8192, 80), (65536, 40)]
)
def test_noise_floor_is_calibrated_on_iid_data(n, reps):
    """Two iid samples of one distribution: value / noise has a median near 1 for every
    metric and sample size (criterion from the issue: median within [0.5, 2])."""
    med = _null_ratios(n, reps, seed=n)
    for metric, m in med.items():
        assert 0.5 <= m <= 2.0, (metric, n, m)


def test_noise_floor_accounts_for_correlated_values_in_a_sample():
    """Rows (samples) that share a random offset: the values are not independent, and a
    noise floor from the value count alone would be ~sqrt(64 / 2) times too small."""
    g = torch.Generator().manual_seed(8)
    ratios, naive = [], []
    for _ in range(150):
        a = torch.randn(16, 1, 64, generator=g) + torch.randn(16, 1, 1, generator=g)
        b = torch.randn(16, 1, 64, generator=g) + torch.randn(16, 1, 1, generator=g)
        sa, sb = _summ(a), _summ(b)
        score = compare(sa, sb, metrics=MOMENT_METRICS)["mean_shift"]
        ratios.append(float(score.ratio))
        # count-based standard error (what independence would give)
        se = math.sqrt(float(sa.var()) / float(sa.count) + float(sb.var()) / float(sb.count))
        naive.append(score.value / (math.sqrt(2 / math.pi) * se / float(sb.std())))
    assert 0.5 <= np.median(ratios) <= 2.0
    assert np.median(naive) > 3.0  # the naive floor would raise false alarms
    deff, dof = design_effect(_summ(a).table.numpy()[-1])
    assert deff > 5 and dof == 15


def test_half_std_mean_shift_at_4096_is_far_above_noise():
    g = torch.Generator().manual_seed(9)
    a = torch.randn(4096, 1, generator=g) + 0.5
    b = torch.randn(4096, 1, generator=g)
    out = compare(_summ(a), _summ(b))
    for metric in ("mean_shift", "gauss_kl", *HIST_METRICS):
        assert out[metric].ratio > 10, (metric, float(out[metric].ratio))
    assert out["log_std_ratio"].ratio < 5  # the spread did not change


def test_per_channel_view_names_the_shifted_channel():
    g = torch.Generator().manual_seed(10)
    a = torch.randn(64, 6, 8, 8, generator=g)
    b = torch.randn(64, 6, 8, 8, generator=g)
    a[:, 4] += 0.8
    scores = compare_channels(_summ(a), _summ(b))
    view = channel_view(scores["mean_shift"], top=2)
    assert view["worst"][0] == 4
    assert view["max"] == pytest.approx(float(scores["mean_shift"].value[4]))
    assert view["max_ratio"] > 10


# ------------------------------------------------------------------ properties
finite_floats = st.floats(-50, 50, allow_nan=False)


@settings(max_examples=40, deadline=None)
@given(
    n=st.integers(2, 400),
    loc=finite_floats,
    scale=st.floats(0.01, 20),
    a=st.floats(0.1, 10),
    b=finite_floats,
    seed=st.integers(0, 2**31 - 1),
)
def test_moment_metrics_are_affine_invariant(n, loc, scale, a, b, seed):
    """Standardised metrics do not change when both inputs get the same x -> a x + b."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(n, 2, generator=g, dtype=torch.float64) * scale + loc
    y = torch.randn(n, 2, generator=g, dtype=torch.float64) * scale
    plain = compare(summarize(x), summarize(y), metrics=MOMENT_METRICS)
    moved = compare(summarize(a * x + b), summarize(a * y + b), metrics=MOMENT_METRICS)
    for k in MOMENT_METRICS:
        assert moved[k].value == pytest.approx(plain[k].value, rel=1e-6, abs=1e-9)
        assert moved[k].noise == pytest.approx(plain[k].noise, rel=1e-6, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(
    n=st.integers(1, 300), m=st.integers(1, 300), shift=finite_floats, seed=st.integers(0, 2**31)
)
def test_divergences_are_nonnegative_zero_on_identity_and_js_bounded(n, m, shift, seed):
    g = torch.Generator().manual_seed(seed)
    x = _summ(torch.randn(n, 1, generator=g) + shift / 10)
    y = _summ(torch.randn(m, 1, generator=g))
    out = compare(x, y)
    for k, v in out.items():
        assert v.value >= 0 and v.noise >= 0 and math.isfinite(v.value), k
    assert out["js"].value <= math.log(2) + 1e-12
    back = compare(y, x)
    assert back["js"].value == pytest.approx(out["js"].value, rel=1e-9, abs=1e-15)
    assert back["psi"].value == pytest.approx(out["psi"].value, rel=1e-9, abs=1e-15)
    for k, v in compare(x, x).items():
        assert v.value == pytest.approx(0.0, abs=1e-12), k
