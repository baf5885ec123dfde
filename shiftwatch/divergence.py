"""Divergences between two summaries, each with its noise floor.

Every metric compares a *current* summary with a *reference* summary (the reference may
be the previous sample) and comes with a **noise floor**: the value the metric is expected
to take from sampling noise alone when both summaries are drawn from one distribution at
their sample sizes.  ``ratio = value / noise`` then reads as "how many times larger than
noise"; for two samples of one distribution its median is somewhat below 1 (the noise
floor is an expected value, and these metrics have right-skewed null distributions).

Metrics (all non-negative):

=================  =====================================================  ==============
name               formula                                                units
=================  =====================================================  ==============
``mean_shift``     ``|m_c - m_r| / s_r``                                  reference stds
``log_std_ratio``  ``|log(s_c / s_r)|``                                   nats
``gauss_kl``       ``KL(N(m_c, s_c^2) || N(m_r, s_r^2))`` =               nats
                   ``log(s_r/s_c) + (s_c^2 + (m_c-m_r)^2)/(2 s_r^2) - 1/2``
``hist_kl``        ``sum p log(p / q)``, p current, q reference           nats
``js``             ``(KL(p||m) + KL(q||m)) / 2``, ``m = (p + q) / 2``     nats (<= log 2)
``psi``            ``sum (p - q) log(p / q)`` (population stability)      nats
``w1``             ``integral |F_c(x) - F_r(x)| dx / s_r`` (Wasserstein-1) reference stds
=================  =====================================================  ==============

The moment metrics exist per channel and layer-wide; the histogram metrics are layer-wide.

Smoothing: ``hist_kl``, ``js`` and ``psi`` add ``alpha = 0.5`` pseudo-counts to every bin
(including the underflow and overflow bins) of both histograms before normalising, so an
empty bin never gives ``log 0``.  This shrinks the metrics at small counts; the noise floor
accounts for it.  ``w1`` uses unsmoothed proportions with mass spread uniformly inside each
bin (underflow mass between the overall minimum and the first edge, overflow mass between
the last edge and the overall maximum); it matches the Wasserstein-1 distance of the raw
values to within about one bin width.  Standard deviations and variances are floored at a
tiny positive value so a collapsed (constant) input gives large but finite values.

Noise floors come from the summaries themselves:

* The standard error of a mean is taken from the spread of the *row* (sample) means, which
  is right whatever the correlation between values of one sample.  It enters as a *design
  effect* ``deff = Var(row means) * L / Var(values)`` (1 for independent values, larger
  for correlated ones), pooled over the summaries given as ``pool`` weighted by their
  degrees of freedom (rows - 1), floored at 1; a current summary whose own design effect is
  significantly larger (99% one-sided, chi-square approximation) overrides the pooled one.
* The relative standard error of a variance combines the observed spread of within-row
  variances (rows of at least two values) with the Gaussian formula for the variance of
  the row means: ``SE(V)^2 / V^2 ~ (Var(v_row) / V^2 + 2 (Var(row means) / V)^2) / rows``;
  for rows of one value this is the Gaussian ``2 / n`` (no kurtosis correction).
* ``mean_shift``, ``log_std_ratio``, ``w1``: ``E|Z| = sqrt(2/pi)`` times the standard error
  of the difference (for ``w1`` the Brownian-bridge limit
  ``E W1 ~ sqrt(2/pi) sqrt(1/n_c + 1/n_r) integral sqrt(F(1-F)) dx``).
* ``gauss_kl``: second-order expansion ``E KL ~ SE(dm)^2 / (2 s^2) + SE(ds^2/s^2)^2 / 4``.
* ``hist_kl``/``js``/``psi``: second-order (chi-square) expansion with the smoothed pooled
  bin probabilities, effective counts ``n / deff`` and the bias smoothing adds when the two
  sample sizes differ: ``E KL ~ sum (Var p_i + Var q_i + (E p_i - E q_i)^2) / (2 q_i)``,
  ``JS ~ 1/4`` and ``PSI ~ 2`` times that.

These are approximations: they assume the rows (samples) are independent of each other and
that the two summaries are independent.  They are not p-values.

Host-side analysis runs in float64 numpy on arrays of any leading shape, so the monitor
evaluates all layers and channels of a step in one vectorised call (:func:`moment_scores`,
:func:`hist_scores`); the :class:`~shiftwatch.summary.Summary`-level functions below wrap
them for one layer.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .summary import FIELDS, Summary

__all__ = [
    "HIST_METRICS",
    "METRICS",
    "MOMENT_METRICS",
    "PSI_BANDS",
    "SMOOTHING",
    "Score",
    "channel_view",
    "compare",
    "compare_channels",
    "design_effect",
    "gauss_kl",
    "hist_scores",
    "moment_scores",
    "psi_band",
    "spread_terms",
]

MOMENT_METRICS: tuple[str, ...] = ("mean_shift", "log_std_ratio", "gauss_kl")
HIST_METRICS: tuple[str, ...] = ("hist_kl", "js", "psi", "w1")
METRICS: tuple[str, ...] = MOMENT_METRICS + HIST_METRICS
SMOOTHING = 0.5  # pseudo-count per bin (hist_kl, js, psi)
_E_ABS_Z = math.sqrt(2.0 / math.pi)  # E|Z| for a standard normal Z
_TINY = 1e-12
_Z99 = 2.326  # one-sided 99% normal quantile
_IX = {name: i for i, name in enumerate(FIELDS)}


@dataclass(frozen=True)
class Score:
    """A metric value and its noise floor (same shape; float64 numpy arrays or floats)."""

    value: np.ndarray
    noise: np.ndarray

    @property
    def ratio(self) -> np.ndarray:
        """``value / noise``; 0 where the value is 0, large where noise is 0."""
        return _ratio(self.value, self.noise)

    def __float__(self) -> float:
        return float(self.value)


def _ratio(value, noise):
    value, noise = np.asarray(value, float), np.asarray(noise, float)
    return np.where(value > 0, value / np.maximum(noise, _TINY), 0.0)


# ---------------------------------------------------------------- noise model
def _cols(table: np.ndarray):
    t = np.asarray(table, dtype=np.float64)
    return {k: t[..., i] for k, i in _IX.items()}


def design_effect(table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Design effect of the mean and its degrees of freedom, per table row.

    ``deff = (Var(row means) / rows) / (Var(values) / n)``: how much larger the squared
    standard error of the mean is than independence would give.  Returns ``(deff, dof)``;
    ``dof = rows - 1`` (0 where it cannot be estimated, and then ``deff = 1``).
    """
    t = spread_terms(np.asarray(table, dtype=np.float64))
    return t["deff"], t["dof"]


def spread_terms(t: np.ndarray) -> dict[str, np.ndarray]:
    """Per table row (any leading shape): the design effect of the mean ``deff``, and
    the ingredients of the variance's standard error relative to the variance V,
    ``phi = Var(within-row variances) / V^2`` and ``beta = Var(row means) / V``, all with
    one dof (rows - 1; 0 where undefined, and then ``deff = 1``, ``phi = 0``,
    ``beta = 1``).  For a summary of R rows, ``SE(V)^2 / V^2 ~ (phi + 2 beta^2) / R``: the
    within-row part from the observed spread (includes correlation and heavy tails), the
    between-row part from the Gaussian formula for a variance of R means.  Rows of one
    value give phi = 0, beta = 1, i.e. the Gaussian ``2 / n``."""
    n, rows, m2 = t[..., _IX["n"]], t[..., _IX["rows"]], t[..., _IX["m2"]]
    mean = t[..., _IX["mean"]]
    dof = np.maximum(rows - 1, 0)
    var = np.where(n > 0, np.maximum(m2, 0) / np.maximum(n, 1), 0.0)
    ok = (dof > 0) & (var > _TINY * np.maximum(1.0, mean * mean))
    safe_var = np.where(ok, var, 1.0)
    safe_rows = np.maximum(rows, 1)
    rm_m2 = t[..., _IX["row_mean_m2"]]
    var_rm = rm_m2 / np.maximum(dof, 1)
    multi = n >= 1.5 * rows  # rows hold several values: within-row spread is meaningful
    return {
        "deff": np.where(ok, var_rm * n / safe_rows / safe_var, 1.0),
        "phi": np.where(ok & multi, t[..., _IX["row_var_m2"]] / np.maximum(dof, 1)
                        / (safe_var * safe_var), 0.0),
        "beta": np.where(ok, rm_m2 / safe_rows / safe_var, 1.0),
        "dof": np.where(ok, dof, 0.0),
    }


def _chi2_upper(dof: np.ndarray, z: float = _Z99) -> np.ndarray:
    """Upper quantile of chi-square(dof) / dof (Wilson-Hilferty approximation)."""
    k = np.maximum(dof, 1.0)
    return (1 - 2 / (9 * k) + z * np.sqrt(2 / (9 * k))) ** 3


class _Noise:
    """Standard errors of mean and variance for both sides of a comparison.

    Each spread term is pooled over the tables (current, other side, pool) by degrees of
    freedom; the current sample's own estimate overrides when significantly larger
    (99% chi-square upper bound).  The tables may have different but broadcastable row
    shapes (one current sample against several others); each table's terms are
    computed on its own rows (or passed in) and only the pooled sums broadcast."""

    def __init__(self, cur: np.ndarray, ref: np.ndarray, pool: Sequence[np.ndarray],
                 spread: Sequence[Mapping[str, np.ndarray]] | None = None):
        if spread is None:
            spread = [spread_terms(t) for t in (cur, ref, *pool)]
        dofs = [s["dof"] for s in spread]
        den = sum(dofs[1:], dofs[0])
        cur_dof = dofs[0]
        upper = _chi2_upper(cur_dof)
        pooled = {}
        for name, fallback in (("deff", 1.0), ("phi", 0.0), ("beta", 1.0)):
            v0 = spread[0][name]
            num = sum((s[name] * d for s, d in zip(spread[1:], dofs[1:], strict=True)),
                      v0 * cur_dof)
            p = np.where(den > 0, num / np.maximum(den, 1e-300), np.nan)
            big = (cur_dof > 0) & np.isfinite(p) & (v0 > p * upper)
            p = np.where(big, v0, p)
            pooled[name] = np.where(np.isfinite(p), p, fallback)
        self.deff = np.maximum(pooled["deff"], 1.0)
        self.phi, self.beta = pooled["phi"], pooled["beta"]

    def se2_mean(self, c) -> np.ndarray:
        return self.deff * c["var"] / np.maximum(c["n"], 1)

    def rel_se2_var(self, c) -> np.ndarray:
        rows = np.maximum(c["rows"], 1)
        return (self.phi + 2 * self.beta**2) / rows


def _stats(table: np.ndarray):
    c = _cols(table)
    c["var"] = np.where(c["n"] > 0, np.maximum(c["m2"], 0) / np.maximum(c["n"], 1), 0.0)
    floor = (_TINY * np.maximum(1.0, np.abs(c["mean"]))) ** 2
    c["var_safe"] = np.maximum(c["var"], floor)
    return c


# ---------------------------------------------------------------- moment metrics
def moment_scores(
    cur: np.ndarray,
    ref: np.ndarray,
    *,
    pool: Sequence[np.ndarray] = (),
    metrics: Sequence[str] = MOMENT_METRICS,
    spread: Sequence[Mapping[str, np.ndarray]] | None = None,
) -> dict[str, Score]:
    """Moment metrics for every row of two summary tables (numpy, shape ``(..., F)``).

    ``pool`` lists further tables (e.g. a long reference) whose rows feed the pooled
    noise model.  ``cur``, ``ref`` and the pool tables must broadcast against each other
    (e.g. one ``(R, F)`` current table against a ``(K, R, F)`` stack of others; the
    scores then have shape ``(K, R)``).  Rows where either side has no finite
    value score 0 with noise 0.  ``spread``: optionally the :func:`spread_terms` of
    ``cur``, ``ref`` and each ``pool`` table, in that order (broadcastable to their row
    shape), when the caller already has them: a table's terms depend on it alone, so a
    monitor computes them once per sample rather than once per comparison.
    """
    c, r = _stats(cur), _stats(ref)
    noise = _Noise(np.asarray(cur), np.asarray(ref), [np.asarray(p) for p in pool], spread)
    se2 = noise.se2_mean(c) + noise.se2_mean(r)
    rel2 = noise.rel_se2_var(c) + noise.rel_se2_var(r)
    empty = (c["n"] <= 0) | (r["n"] <= 0)
    sd_r = np.sqrt(r["var_safe"])
    delta = c["mean"] - r["mean"]
    out: dict[str, Score] = {}
    for name in metrics:
        if name == "mean_shift":
            value = np.abs(delta) / sd_r
            nz = _E_ABS_Z * np.sqrt(se2) / sd_r
        elif name == "log_std_ratio":
            value = 0.5 * np.abs(np.log(c["var_safe"] / r["var_safe"]))
            nz = _E_ABS_Z * 0.5 * np.sqrt(rel2)
        elif name == "gauss_kl":
            value = gauss_kl(c["mean"], c["var_safe"], r["mean"], r["var_safe"])
            nz = se2 / (2 * r["var_safe"]) + rel2 / 4
        else:
            raise KeyError(f"unknown moment metric {name!r}; choose from {MOMENT_METRICS}")
        out[name] = Score(np.where(empty, 0.0, value), np.where(empty, 0.0, nz))
    return out


def gauss_kl(m0, v0, m1, v1):
    """Closed-form ``KL(N(m0, v0) || N(m1, v1))`` in nats (``v`` are variances)."""
    m0, v0, m1, v1 = (np.asarray(a, dtype=np.float64) for a in (m0, v0, m1, v1))
    kl = 0.5 * np.log(v1 / v0) + (v0 + (m0 - m1) ** 2) / (2 * v1) - 0.5
    return np.maximum(kl, 0.0)  # rounding can give -1e-17


# ---------------------------------------------------------------- histogram metrics
def hist_scores(
    cur: np.ndarray,
    ref: np.ndarray,
    edges: np.ndarray,
    *,
    cur_extrema: np.ndarray,
    ref_extrema: np.ndarray,
    ref_std: np.ndarray,
    deff: np.ndarray | float = 1.0,
    metrics: Sequence[str] = HIST_METRICS,
    alpha: float = SMOOTHING,
) -> dict[str, Score]:
    """Histogram metrics for stacked histograms ``(..., B + 2)`` on shared ``edges``.

    ``deff`` is the design effect of the histogram counts (variance inflation of a bin
    count over the multinomial one), broadcast over the leading shape; ``ref_std`` scales
    ``w1`` to reference-std units.
    """
    p_c, p_r = np.asarray(cur, np.float64), np.asarray(ref, np.float64)
    n_c, n_r = p_c.sum(-1), p_r.sum(-1)
    k = p_c.shape[-1]
    deff = np.asarray(deff, np.float64)[..., None] if np.ndim(deff) else float(deff)
    pooled = (p_c + p_r + alpha) / (n_c + n_r + k * alpha)[..., None]
    den_c, den_r = (n_c + k * alpha)[..., None], (n_r + k * alpha)[..., None]
    sp_c, sp_r = (p_c + alpha) / den_c, (p_r + alpha) / den_r
    # expectations of the smoothed proportions under "same distribution"
    e_c = (n_c[..., None] * pooled + alpha) / den_c
    e_r = (n_r[..., None] * pooled + alpha) / den_r
    var_c = deff * n_c[..., None] * pooled * (1 - pooled) / den_c**2
    var_r = deff * n_r[..., None] * pooled * (1 - pooled) / den_r**2
    spread = var_c + var_r + (e_c - e_r) ** 2
    empty = (n_c <= 0) | (n_r <= 0)
    out: dict[str, Score] = {}
    for name in metrics:
        if name == "hist_kl":
            value = (sp_c * np.log(sp_c / sp_r)).sum(-1)
            nz = (spread / (2 * e_r)).sum(-1)
        elif name == "js":
            m = 0.5 * (sp_c + sp_r)
            value = 0.5 * ((sp_c * np.log(sp_c / m)).sum(-1) + (sp_r * np.log(sp_r / m)).sum(-1))
            nz = (spread / (8 * 0.5 * (e_c + e_r))).sum(-1)
        elif name == "psi":
            value = ((sp_c - sp_r) * np.log(sp_c / sp_r)).sum(-1)
            nz = (spread / (0.5 * (e_c + e_r))).sum(-1)
        elif name == "w1":
            value, nz = _w1(p_c, p_r, edges, cur_extrema, ref_extrema, deff)
            sd = np.maximum(np.asarray(ref_std, np.float64), _TINY)
            value, nz = value / sd, nz / sd
        else:
            raise KeyError(f"unknown histogram metric {name!r}; choose from {HIST_METRICS}")
        out[name] = Score(np.where(empty, 0.0, np.maximum(value, 0.0)), np.where(empty, 0.0, nz))
    return out


def _w1(p_c, p_r, edges, ext_c, ext_r, deff):
    """Wasserstein-1 between piecewise-uniform densities, and its noise floor."""
    edges = np.asarray(edges, np.float64)
    ext_c, ext_r = np.asarray(ext_c, np.float64), np.asarray(ext_r, np.float64)
    lo = np.minimum(np.minimum(ext_c[..., 0], ext_r[..., 0]), edges[0])
    hi = np.maximum(np.maximum(ext_c[..., 1], ext_r[..., 1]), edges[-1])
    lo = np.where(np.isfinite(lo), lo, edges[0])
    hi = np.where(np.isfinite(hi), hi, edges[-1])
    shape = p_c.shape[:-1]
    bounds = np.concatenate(
        [lo[..., None], np.broadcast_to(edges, (*shape, edges.size)), hi[..., None]], -1
    )
    width = np.diff(bounds, axis=-1)  # (..., B + 2), one interval per count
    n_c = np.maximum(p_c.sum(-1, keepdims=True), 1)
    n_r = np.maximum(p_r.sum(-1, keepdims=True), 1)
    zero = np.zeros((*shape, 1))
    f_c = np.concatenate([zero, np.cumsum(p_c / n_c, -1)], -1)
    f_r = np.concatenate([zero, np.cumsum(p_r / n_r, -1)], -1)
    a, b = (f_c - f_r)[..., :-1], (f_c - f_r)[..., 1:]
    same = a * b >= 0
    tot = np.abs(a) + np.abs(b)
    area = np.where(same, 0.5 * tot, (a * a + b * b) / (2 * np.maximum(tot, 1e-300)))
    value = (width * area).sum(-1)
    f_p = (f_c * n_c + f_r * n_r) / (n_c + n_r)
    mid = 0.5 * (f_p[..., :-1] + f_p[..., 1:])
    bridge = (width * np.sqrt(np.clip(mid * (1 - mid), 0, None))).sum(-1)
    eff = np.asarray(deff, np.float64)
    eff = eff[..., 0] if eff.ndim else eff
    noise = _E_ABS_Z * bridge * np.sqrt(eff * (1 / n_c[..., 0] + 1 / n_r[..., 0]))
    return value, noise


#: PSI bands used in credit-risk model monitoring: below 0.1 "stable", 0.1-0.25 "moderate",
#: above 0.25 "major" shift.  Common practice, no source; they ignore sample size, so read
#: PSI together with its noise floor.
PSI_BANDS: tuple[float, float] = (0.1, 0.25)


def psi_band(value: float) -> str:
    """Label a PSI value with the common-practice bands (see :data:`PSI_BANDS`)."""
    lo, hi = PSI_BANDS
    return "stable" if value < lo else "moderate" if value < hi else "major"


# ---------------------------------------------------------------- Summary-level API
def _table(s: Summary) -> np.ndarray:
    return s.table.detach().cpu().numpy()


def _hist_deff(s_cur: Summary, moment_deff: float) -> float:
    """Design effect for histogram counts: the mean's design effect, scaled toward 1 by
    the histogram subsampling fraction (a strided subsample is less correlated)."""
    n, n_h = float(s_cur.count), float(s_cur.hist.sum())
    frac = n_h / n if n > 0 else 1.0
    return max(1.0, 1.0 + (moment_deff - 1.0) * frac)


def compare(
    cur: Summary,
    ref: Summary,
    *,
    pool: Sequence[Summary] = (),
    metrics: Sequence[str] = METRICS,
) -> dict[str, Score]:
    """Layer-wide metrics of ``cur`` against ``ref`` (floats inside each :class:`Score`).

    Histogram metrics need both summaries to carry histograms on identical edges; they
    are omitted otherwise.  ``pool`` adds summaries (e.g. a long reference) to the noise
    model.
    """
    unknown = [m for m in metrics if m not in METRICS]
    if unknown:
        raise KeyError(f"unknown metrics {unknown}; choose from {METRICS}")
    tc, tr = _table(cur)[-1], _table(ref)[-1]
    tp = [_table(p)[-1] for p in pool]
    moment_m = [m for m in metrics if m in MOMENT_METRICS]
    scores = moment_scores(tc, tr, pool=tp, metrics=moment_m)
    out = {k: Score(float(v.value), float(v.noise)) for k, v in scores.items()}
    hist_m = [m for m in metrics if m in HIST_METRICS]
    if hist_m and cur.hist is not None and ref.hist is not None:
        if not np.array_equal(cur.edges.cpu().numpy(), ref.edges.cpu().numpy()):
            raise ValueError("histogram metrics need identical edges on both summaries")
        deff = float(_Noise(tc, tr, tp).deff)
        scores = hist_scores(
            cur.hist.cpu().numpy(),
            ref.hist.cpu().numpy(),
            cur.edges.cpu().numpy(),
            cur_extrema=cur.extrema.cpu().numpy(),
            ref_extrema=ref.extrema.cpu().numpy(),
            ref_std=float(ref.std()),
            deff=_hist_deff(cur, deff),
            metrics=hist_m,
        )
        out.update({k: Score(float(v.value), float(v.noise)) for k, v in scores.items()})
    return out


def compare_channels(
    cur: Summary,
    ref: Summary,
    *,
    pool: Sequence[Summary] = (),
    metrics: Sequence[str] = MOMENT_METRICS,
) -> dict[str, Score]:
    """Per-channel moment metrics (arrays of shape ``(C,)``)."""
    if cur.channels != ref.channels:
        raise ValueError(f"channel counts differ ({cur.channels} vs {ref.channels})")
    scores = moment_scores(
        _table(cur)[:-1], _table(ref)[:-1], pool=[_table(p)[:-1] for p in pool], metrics=metrics
    )
    return scores


def channel_view(score: Score, *, top: int = 3) -> dict[str, object]:
    """Aggregate a per-channel score: mean and max value, max ratio and the ``top``
    channels with the largest ratio (worst first)."""
    value, ratio = np.asarray(score.value, float), np.asarray(score.ratio, float)
    if value.size == 0:
        return {"mean": 0.0, "max": 0.0, "max_ratio": 0.0, "worst": []}
    worst = np.argsort(-ratio, kind="stable")[:top]
    return {
        "mean": float(value.mean()),
        "max": float(value.max()),
        "max_ratio": float(ratio.max()),
        "worst": [int(i) for i in worst],
    }
