"""On-the-fly aggregation of event-log records into fixed-size arrays.

Memory is O(layers x metrics x step bins), independent of the number of records: every
``step`` record is folded into

* exact per-(layer, comparison, metric) extremes: the peak ratio to noise with the step,
  value and noise where it happened, and the peak raw value likewise;
* a log-spaced histogram of the value, the noise and the ratio (for medians, see
  :func:`quantile`): 16 bins per decade from 1e-8 to 1e8 plus an underflow bin (which
  holds zeros) and an overflow bin;
* a step grid of at most a few hundred bins (:class:`Grid`) holding the *maximum* ratio
  and value per bin (the minimum for a layer's standard deviation, where small is bad), so
  a short spike is never averaged away in the heatmap or curves.

Metric values are taken as magnitudes (``abs``): all schema-1 metrics are non-negative,
and a signed value from a future writer would still rank by size.

Accumulators built over disjoint parts of one log merge exactly (:meth:`PhaseAcc.merge`,
earlier part first), which is how several processes read one large log; the other record
kinds are gathered by :mod:`shiftwatch.cli.runacc`.  Every array is
declared once in :data:`_FIELDS` with its reduction, so the merge has no per-field code.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import chain, repeat
from operator import itemgetter
from typing import Any

import numpy as np

__all__ = ["AGAINST", "CHANNEL_METRICS", "METRICS", "PHASES", "Grid", "PhaseAcc", "quantile"]

#: Layer-wide metric names of schema 1, in the order used by every array.
METRICS: tuple[str, ...] = ("mean_shift", "log_std_ratio", "gauss_kl", "hist_kl", "js", "psi", "w1")
#: Metrics that also have a per-channel view.
CHANNEL_METRICS: tuple[str, ...] = ("mean_shift", "log_std_ratio", "gauss_kl")
#: Comparisons: against the previous sample, the reference, and (val records only) the
#: latest training sample.
AGAINST: tuple[str, ...] = ("previous", "reference", "train")
PHASES: tuple[str, ...] = ("train", "val")
_MIDX = {m: i for i, m in enumerate(METRICS)}
_CIDX = {m: i for i, m in enumerate(CHANNEL_METRICS)}
_M, _C, _A = len(METRICS), len(CHANNEL_METRICS), len(AGAINST)

# Quantile histogram: bin 0 holds x < 1e-8 (zeros too), bins 1..256 are 1/16 decade wide,
# bin 257 holds x >= 1e8.
_Q_LO, _Q_PER_DECADE, _Q_DECADES = -8.0, 16, 16
_NQ = _Q_PER_DECADE * _Q_DECADES + 2
_QUANTITIES = ("value", "noise", "ratio")


@dataclass(frozen=True)
class Grid:
    """Step bins: bin ``k`` covers steps ``[lo + k * width, lo + (k + 1) * width)``."""

    lo: int
    width: int
    nbins: int

    @classmethod
    def spanning(cls, first: int, last: int, *, bins: int, stride: int = 1) -> Grid:
        """Fewest bins of a multiple of ``stride`` steps, at most ``bins``, covering the range."""
        span = max(1, last - first + 1)
        stride = max(1, int(stride))
        width = stride * math.ceil(math.ceil(span / max(1, bins)) / stride)
        return cls(first, width, max(1, math.ceil(span / width)))

    def index(self, step: int) -> tuple[int, bool]:
        """Bin of ``step`` and whether it fell outside the grid (then clipped to an edge)."""
        k = (step - self.lo) // self.width
        if 0 <= k < self.nbins:
            return k, False
        return (0 if k < 0 else self.nbins - 1), True

    def edges(self) -> np.ndarray:
        """Bin edges in steps, shape ``(nbins + 1,)``."""
        return self.lo + self.width * np.arange(self.nbins + 1, dtype=np.float64)


def _qbin(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        k = np.floor((np.log10(np.maximum(x, 1e-300)) - _Q_LO) * _Q_PER_DECADE) + 1
    return np.clip(k, 0, _NQ - 1).astype(np.intp)


def quantile(hist: np.ndarray, q: float) -> np.ndarray:
    """The ``q`` quantile from log-histogram counts ``hist[..., _NQ]`` (NaN where empty).

    Interpolates geometrically inside the bin, so the relative error is below one bin
    width (10**(1/16) - 1 = 15%) and typically a few percent; values below 1e-8 read as 0.
    """
    hist = np.asarray(hist, dtype=np.float64)
    total = hist.sum(axis=-1)
    cum = np.cumsum(hist, axis=-1)
    target = q * total
    k = np.minimum((cum < target[..., None]).sum(axis=-1), _NQ - 1)
    below = np.take_along_axis(cum, k[..., None], axis=-1)[..., 0] - np.take_along_axis(
        hist, k[..., None], axis=-1
    )[..., 0]
    inbin = np.take_along_axis(hist, k[..., None], axis=-1)[..., 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.clip((target - below) / inbin, 0.0, 1.0)
    lo_exp = _Q_LO + (np.clip(k, 1, _NQ - 2) - 1) / _Q_PER_DECADE
    out = 10.0 ** (lo_exp + frac / _Q_PER_DECADE)
    out = np.where(k == 0, 0.0, out)
    out = np.where(k == _NQ - 1, 10.0 ** (_Q_LO + _Q_DECADES), out)
    return np.where(total > 0, out, np.nan)


# name: (shape, dtype, fill, reduction). Shapes: F = layers*against*metrics (layer view),
# G = layers*against*channel-metrics, L = layers, B = step bins (leading axis).
# Reductions: sum, fmax, fmin, or "<group>" / "<group>:max|min" for a peak group: the
# field marked :max/:min decides, the others follow the winner (ties keep the earlier part).
_FIELDS: dict[str, tuple[str, Any, float, str]] = {
    "samples": ("F", np.int64, 0, "sum"),
    "peak_ratio": ("F", np.float64, math.nan, "peak:max"),
    "peak_step": ("F", np.int64, -1, "peak"),
    "peak_value": ("F", np.float64, math.nan, "peak"),
    "peak_noise": ("F", np.float64, math.nan, "peak"),
    "vpeak_value": ("F", np.float64, math.nan, "vpeak:max"),
    "vpeak_step": ("F", np.int64, -1, "vpeak"),
    "vpeak_noise": ("F", np.float64, math.nan, "vpeak"),
    "qhist": ("FQ", np.uint32, 0, "sum"),
    "bin_ratio": ("BF", np.float32, math.nan, "fmax"),
    "bin_value": ("BF", np.float32, math.nan, "fmax"),
    "ch_samples": ("G", np.int64, 0, "sum"),
    "ch_peak_ratio": ("G", np.float64, math.nan, "chpeak:max"),
    "ch_peak_step": ("G", np.int64, -1, "chpeak"),
    "ch_peak_max": ("G", np.float64, math.nan, "chpeak"),
    "ch_peak_worst": ("G", np.int64, -1, "chpeak"),
    "ch_bin_ratio": ("BG", np.float32, math.nan, "fmax"),
    "layer_samples": ("L", np.int64, 0, "sum"),
    "nonfinite_total": ("L", np.int64, 0, "sum"),
    "std_min": ("L", np.float64, math.nan, "stdmin:min"),
    "std_min_step": ("L", np.int64, -1, "stdmin"),
    "bin_std_min": ("BL", np.float32, math.nan, "fmin"),
    "bin_std_max": ("BL", np.float32, math.nan, "fmax"),
    "bin_nonfinite": ("BL", np.float32, math.nan, "fmax"),
    "bin_records": ("B", np.int64, 0, "sum"),
}


_AK = ((0, "vs_previous"), (1, "vs_reference"), (2, "vs_train"))
_K_METRIC = ("value", "noise", "ratio")
_K_CHANNEL = ("max_ratio", "max")
_IG_METRIC, _IG_CHANNEL = itemgetter(*_K_METRIC), itemgetter(*_K_CHANNEL)
_IG_LAYER = itemgetter("std", "nonfinite")
_IG_BLOCK, _IG_CBLOCK = itemgetter(*METRICS), itemgetter(*CHANNEL_METRICS)
_AR_Q = np.arange(3, dtype=np.intp)
_AR_M, _AR_C = np.arange(len(METRICS), dtype=np.intp), np.arange(len(CHANNEL_METRICS),
                                                                   dtype=np.intp)


def _nums(rows: list[tuple[Any, ...]], what: str) -> np.ndarray:
    """Rows of numbers/None as a float64 array (None -> NaN); ValueError names ``what``."""
    width = len(rows[0])
    try:  # fast path: no nulls, all rows complete
        return np.fromiter(chain.from_iterable(rows), dtype=np.float64,
                           count=len(rows) * width).reshape(-1, width)
    except (TypeError, ValueError):
        pass
    try:
        out = np.array(rows, dtype=np.float64)
    except (TypeError, ValueError):
        bad = next((v for row in rows for v in row
                    if v is not None and not isinstance(v, (int, float))), None)
        raise ValueError(f"{what} must be numbers or null (got {bad!r:.40})") from None
    if out.ndim != 2:
        raise ValueError(f"{what} must be numbers or null")
    return out


def _gather(d: Any, base: int, layouts: dict[Any, tuple[tuple[int, ...], bool]],
            index: dict[str, int], getter: itemgetter, names: tuple[str, ...], pos: list[int],
            rows: list[tuple[Any, ...]], ents: list[Any] | None, unknown: set[str] | None,
            where: str) -> None:
    """Append the flat positions and the ``getter`` tuples of one metric block ``d``.

    Fast path: the block's key layout (cached) names only known metrics and every entry is
    a complete object; otherwise entries are taken one by one (nulls skipped, missing keys
    read as null, unknown metric names noted).
    """
    if type(d) is not dict:
        raise ValueError(f"'{where}' must be an object or null (got {d!r:.40})")
    keys = tuple(d)
    layout = layouts.get(keys)
    if layout is None:
        offs = tuple(index.get(k, -1) for k in keys)
        layout = layouts[keys] = (offs, -1 not in offs)
        if unknown is not None and len(unknown) < 1000:
            unknown.update(f"metric {k!r}" for k, o in zip(keys, offs, strict=True) if o < 0)
    offs, clean = layout
    if clean:
        try:
            got = list(map(getter, d.values()))
        except (KeyError, TypeError):
            pass
        else:
            pos.extend([base + o for o in offs])
            rows.extend(got)
            if ents is not None:
                ents.extend(d.values())
            return
    for o, e in zip(offs, d.values(), strict=True):
        if o < 0 or e is None:
            continue
        if type(e) is not dict:
            raise ValueError(f"entries of '{where}' must be objects or null (got {e!r:.40})")
        pos.append(base + o)
        rows.append(tuple(e.get(k) for k in names))
        if ents is not None:
            ents.append(e)


_GET = dict.get


class _Irregular(Exception):
    """A record the whole-record path does not take (the per-layer path reads it)."""


def _column(blocks: list[Any], lay_pos: np.ndarray, ai: int, width: int,
            index: dict[str, int], layouts: dict[tuple[str, ...], Any],
            ) -> tuple[np.ndarray, list[Any]] | None:
    """Flat positions and entries of one comparison over all layers of a record.

    ``blocks`` holds one metric block per layer (``layers.<name>.vs_<against>``, or the
    same inside ``channels``).  None when every block is absent; raises
    :class:`_Irregular` (or KeyError/TypeError) unless every block is an object with the
    same known metric names: the per-layer path then decides.
    """
    n_none = blocks.count(None)
    if n_none == len(blocks):
        return None
    first = blocks[0]
    if n_none or type(first) is not dict:
        raise _Irregular
    names = tuple(first)
    layout = layouts.get(names)
    if layout is None:
        offs = [index.get(k, -1) for k in names]
        if not offs or -1 in offs:
            raise _Irregular  # unknown metric names are noted by the per-layer path
        layout = layouts[names] = (np.array(offs, dtype=np.intp), itemgetter(*names),
                                   len(names))
    offs, getter, k = layout
    if set(map(len, blocks)) != {k}:
        raise _Irregular
    ents = list(chain.from_iterable(map(getter, blocks))) if k > 1 else \
        list(map(getter, blocks))
    return (((lay_pos * _A + ai) * width)[:, None] + offs).ravel(), ents


def _fields(ents: list[Any], getter: itemgetter, width: int, what: str) -> np.ndarray:
    """The ``getter`` fields of every entry as float64 rows (null -> NaN).

    Raises KeyError/TypeError when an entry is not an object with all the fields (the
    caller then leaves the record to the per-layer path), ValueError for a field that is
    not a number or null.
    """
    try:  # one C-level pass when every field is a number
        return np.fromiter(chain.from_iterable(map(getter, ents)), dtype=np.float64,
                           count=len(ents) * width).reshape(-1, width)
    except (TypeError, ValueError, KeyError):
        rows = list(map(getter, ents))  # re-raises KeyError/TypeError for a bad entry
    return _nums(rows, what)


class PhaseAcc:
    """Aggregates of the ``step`` records of one phase (``train`` or ``val``)."""

    def __init__(self, n_layers: int, grid: Grid) -> None:
        self.n_layers, self.grid = n_layers, grid
        dims = {"F": n_layers * _A * _M, "G": n_layers * _A * _C, "L": n_layers}
        self.arrays: dict[str, np.ndarray] = {}
        for name, (shape, dtype, fill, _red) in _FIELDS.items():
            size = [grid.nbins] if shape.startswith("B") else []
            size += [dims[c] for c in shape.lstrip("B").rstrip("Q")]
            size += [3, _NQ] if shape.endswith("Q") else []
            self.arrays[name] = np.full(size, fill, dtype=dtype)
        self.records = 0
        self.first_step: int | None = None
        self.last_step: int | None = None
        self.outside = 0  # records whose step fell outside the grid (clipped into edge bins)
        self._layouts_m: dict[Any, tuple[tuple[int, ...], bool]] = {}  # key order -> positions
        self._layouts_c: dict[Any, tuple[tuple[int, ...], bool]] = {}
        # whole-record path: layer-name order -> layer indices; metric names -> offsets
        self._lay_pos: dict[tuple[str, ...], np.ndarray] = {}
        self._cols_m: dict[tuple[str, ...], Any] = {}
        self._cols_c: dict[tuple[str, ...], Any] = {}

    def __getattr__(self, name: str) -> np.ndarray:
        try:
            return self.__dict__["arrays"][name]
        except KeyError:
            raise AttributeError(name) from None

    def add(self, step: int, layers: dict[str, Any], lidx: dict[str, int],
            unknown: set[str]) -> None:
        """Fold one step record's ``layers`` object in. Raises ValueError on bad content."""
        b, out = self.grid.index(step)
        self.outside += out
        self.records += 1
        if self.first_step is None or step < self.first_step:
            self.first_step = step
        if self.last_step is None or step > self.last_step:
            self.last_step = step
        self.arrays["bin_records"][b] += 1
        if self._add_whole(b, step, layers, lidx):
            return
        # a record the whole-record path does not take is read layer by layer.
        # fast path: a block holding exactly the known metrics, each a complete object, is
        # taken whole by C-level itemgetters (positions base + 0..M-1); anything else goes
        # entry by entry through _gather
        fbase: list[int] = []
        pos: list[int] = []
        trip: list[tuple[Any, ...]] = []
        cfbase: list[int] = []
        cpos: list[int] = []
        cpair: list[tuple[Any, ...]] = []
        cents: list[Any] = []
        lpos: list[int] = []
        lstats: list[tuple[Any, ...]] = []
        slow_trip: list[tuple[Any, ...]] = []
        slow_pair: list[tuple[Any, ...]] = []
        slow_cents: list[Any] = []
        for name, lay in layers.items():
            li = lidx.get(name)
            if li is None:
                if len(unknown) < 1000:
                    unknown.add(f"layer {name!r}")
                continue
            if type(lay) is not dict:
                raise ValueError(f"'layers.{name}' must be an object (got {lay!r:.40})")
            lpos.append(li)
            try:
                lstats.append(_IG_LAYER(lay))
            except KeyError:
                lstats.append((lay.get("std"), lay.get("nonfinite")))
            for ai, key in _AK:
                d = lay.get(key)
                if d:
                    base = (li * _A + ai) * _M
                    try:
                        if len(d) != _M:
                            raise KeyError
                        got = list(map(_IG_METRIC, _IG_BLOCK(d)))
                    except (KeyError, TypeError):
                        _gather(d, base, self._layouts_m, _MIDX, _IG_METRIC, _K_METRIC, pos,
                                slow_trip, None, unknown, f"layers.{name}.{key}")
                    else:
                        fbase.append(base)
                        trip.extend(got)
            ch = lay.get("channels")
            if ch:
                if type(ch) is not dict:
                    raise ValueError(f"'layers.{name}.channels' must be an object")
                for ai, key in _AK:
                    d = ch.get(key)
                    if d:
                        base = (li * _A + ai) * _C
                        try:
                            if len(d) != _C:
                                raise KeyError
                            ents = _IG_CBLOCK(d)
                            got = list(map(_IG_CHANNEL, ents))
                        except (KeyError, TypeError):
                            _gather(d, base, self._layouts_c, _CIDX, _IG_CHANNEL, _K_CHANNEL,
                                    cpos, slow_pair, slow_cents, None,
                                    f"layers.{name}.channels.{key}")
                        else:
                            cfbase.append(base)
                            cpair.extend(got)
                            cents.extend(ents)
        if fbase or pos:
            p = np.concatenate([(np.array(fbase, dtype=np.intp)[:, None] + _AR_M).ravel(),
                                np.array(pos, dtype=np.intp)])
            self._add_metrics(b, step, p, _nums(trip + slow_trip,
                                                "metric 'value'/'noise'/'ratio'"))
        if cfbase or cpos:
            p = np.concatenate([(np.array(cfbase, dtype=np.intp)[:, None] + _AR_C).ravel(),
                                np.array(cpos, dtype=np.intp)])
            self._add_channels(b, step, p, _nums(cpair + slow_pair, "channel 'max_ratio'/'max'"),
                               cents + slow_cents)
        if lpos:
            self._add_layer_stats(b, step, np.array(lpos, dtype=np.intp),
                                  _nums(lstats, "layer 'std'/'nonfinite'"))

    def _add_whole(self, b: int, step: int, layers: dict[str, Any],
                   lidx: dict[str, int]) -> bool:
        """Fold a regular record in with C-level iteration only; False leaves it untouched.

        Regular: every layer is known and an object with ``std`` and ``nonfinite``; for each
        comparison the metric blocks are absent (null or missing) in every layer or present
        in every layer with the same known metric names, each entry an object with all its
        fields (the monitor writes every sample this way).  Anything else returns False
        before any array is touched, and :meth:`add` reads the record layer by layer, which
        notes unknown names and skips nulls.  Both paths give the same arrays: every
        (layer, comparison, metric) position occurs once per record, so the order in which
        positions are folded does not matter.
        """
        names = tuple(layers)
        lay_pos = self._lay_pos.get(names)
        if lay_pos is None:
            if not names or not all(map(lidx.__contains__, names)):
                return False
            lay_pos = np.array([lidx[n] for n in names], dtype=np.intp)
            if len(self._lay_pos) < 16:
                self._lay_pos[names] = lay_pos
        vals = list(layers.values())
        try:
            mcols = [_column(list(map(_GET, vals, repeat(key))), lay_pos, ai, _M, _MIDX,
                             self._cols_m) for ai, key in _AK]
            chs = list(map(_GET, vals, repeat("channels")))
            ccols = []
            if chs.count(None) != len(chs):
                ccols = [_column(list(map(_GET, chs, repeat(key))), lay_pos, ai, _C, _CIDX,
                                 self._cols_c) for ai, key in _AK]
            mcols = [c for c in mcols if c is not None]
            ccols = [c for c in ccols if c is not None]
            stats = _fields(vals, _IG_LAYER, 2, "layer 'std'/'nonfinite'")
            ments = list(chain.from_iterable(c[1] for c in mcols))
            x = _fields(ments, _IG_METRIC, 3, "metric 'value'/'noise'/'ratio'") if mcols \
                else None
            cents = list(chain.from_iterable(c[1] for c in ccols))
            cx = _fields(cents, _IG_CHANNEL, 2, "channel 'max_ratio'/'max'") if ccols \
                else None
        except (_Irregular, KeyError, TypeError):
            return False
        if x is not None:
            self._add_metrics(b, step, np.concatenate([c[0] for c in mcols]), x)
        if cx is not None:
            self._add_channels(b, step, np.concatenate([c[0] for c in ccols]), cx, cents)
        self._add_layer_stats(b, step, lay_pos, stats)
        return True

    def _add_metrics(self, b: int, step: int, p: np.ndarray, x: np.ndarray) -> None:
        a = self.arrays
        v, n, r = np.abs(x[:, 0]), x[:, 1], np.abs(x[:, 2])
        ok = np.isfinite(r)
        a["samples"][p[ok]] += 1
        cur = a["peak_ratio"][p]
        win = (r > cur) | (np.isnan(cur) & ok)
        q = p[win]
        a["peak_ratio"][q], a["peak_step"][q] = r[win], step
        a["peak_value"][q], a["peak_noise"][q] = v[win], n[win]
        cur = a["vpeak_value"][p]
        win = (v > cur) | (np.isnan(cur) & np.isfinite(v))
        q = p[win]
        a["vpeak_value"][q], a["vpeak_step"][q], a["vpeak_noise"][q] = v[win], step, n[win]
        y = np.abs(x)  # columns value, noise, ratio: one pass for the three histograms
        fin = np.isfinite(y)
        idx = (p[:, None] * 3 + _AR_Q) * _NQ + _qbin(np.where(fin, y, 1.0))
        a["qhist"].reshape(-1)[idx[fin]] += 1  # indices are unique within one record
        for name, y in (("bin_ratio", r), ("bin_value", v)):
            row = a[name][b]
            row[p] = np.fmax(row[p], y)

    def _add_channels(self, b: int, step: int, p: np.ndarray, x: np.ndarray,
                      ents: list[Any]) -> None:
        a = self.arrays
        r, mx = np.abs(x[:, 0]), np.abs(x[:, 1])
        ok = np.isfinite(r)
        a["ch_samples"][p[ok]] += 1
        cur = a["ch_peak_ratio"][p]
        win = (r > cur) | (np.isnan(cur) & ok)
        q = p[win]
        a["ch_peak_ratio"][q], a["ch_peak_step"][q], a["ch_peak_max"][q] = r[win], step, mx[win]
        worst = []
        for i in np.flatnonzero(win):
            w = ents[i].get("worst")
            worst.append(w[0] if isinstance(w, list) and w and type(w[0]) is int else -1)
        a["ch_peak_worst"][q] = worst
        row = a["ch_bin_ratio"][b]
        row[p] = np.fmax(row[p], r)

    def _add_layer_stats(self, b: int, step: int, p: np.ndarray, x: np.ndarray) -> None:
        a = self.arrays
        std, nf = np.abs(x[:, 0]), x[:, 1]
        a["layer_samples"][p] += 1
        a["nonfinite_total"][p] += np.nan_to_num(nf).astype(np.int64)
        cur = a["std_min"][p]
        win = (std < cur) | (np.isnan(cur) & np.isfinite(std))
        a["std_min"][p[win]], a["std_min_step"][p[win]] = std[win], step
        for name, x, fn in (("bin_std_min", std, np.fmin), ("bin_std_max", std, np.fmax),
                            ("bin_nonfinite", nf, np.fmax)):
            row = a[name][b]
            row[p] = fn(row[p], x)

    def merge(self, other: PhaseAcc) -> None:
        """Fold in ``other``, an accumulator over a *later* part of the same log."""
        if other.grid != self.grid or other.n_layers != self.n_layers:
            raise ValueError("cannot merge accumulators over different grids or layer lists")
        a, o = self.arrays, other.arrays
        groups: dict[str, tuple[str, str]] = {}
        for name, (_s, _d, _f, red) in _FIELDS.items():
            if red == "sum":
                a[name] += o[name]
            elif red in ("fmax", "fmin"):
                np.copyto(a[name], getattr(np, red)(a[name], o[name]))
            elif ":" in red:
                group, sense = red.split(":")
                groups[group] = (name, sense)
        for group, (key, sense) in groups.items():
            mine, theirs = a[key], o[key]
            better = theirs > mine if sense == "max" else theirs < mine
            win = better | (np.isnan(mine) & ~np.isnan(theirs))
            for name, (_s, _d, _f, red) in _FIELDS.items():
                if red.split(":")[0] == group:
                    a[name][win] = o[name][win]
        self.records += other.records
        self.outside += other.outside
        steps = [s for s in (self.first_step, other.first_step) if s is not None]
        self.first_step = min(steps) if steps else None
        steps = [s for s in (self.last_step, other.last_step) if s is not None]
        self.last_step = max(steps) if steps else None
