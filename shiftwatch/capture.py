"""Capture: which modules are watched, and the hooks that summarise their inputs.

Selection (:func:`select_modules`)
    By default the *inputs* of convolution, linear and normalization layers (batch, group,
    layer, instance and RMS normalization) are watched.  ``layers`` / ``exclude`` take
    module-name globs (:mod:`fnmatch` syntax, matched against names as
    ``model.named_modules()`` gives them, e.g. ``"encoder.*.conv"``); ``types`` replaces
    the default module types (classes, or class names as strings).  A pattern that matches
    no module is a :class:`~shiftwatch.errors.ConfigError` that lists the nearest names.

Hooks (:class:`Capture`)
    One forward pre-hook per watched module (and one forward hook when outputs are watched
    too) is registered once and gated by a flag: while the capture is *disarmed* a hook
    returns after one attribute check, so unsampled steps cost nothing else.  While armed,
    a hook turns the tensor into a :class:`~shiftwatch.summary.Summary` on the tensor's own
    device right away (no host synchronisation, no activation kept, input detached).

Which tensor of a call is watched (the *documented rule* for tuple/dict inputs)
    The first floating-point tensor found by a depth-first walk over the positional
    arguments, in order (tuples and lists element by element, dicts in insertion order),
    then over the keyword arguments in the order given.  For outputs the same walk runs
    over the returned value.  One tensor per call; a module called several times in one
    step contributes every call, merged exactly.

Phases
    Forwards of modules in training mode are labelled ``"train"``, eval-mode forwards
    ``"val"``; the two are kept in separate buckets and never merged.  :meth:`Capture.arm`
    can force a label instead (for a validation loop run in training mode, say).

Skipped inputs
    Integer, boolean and complex tensors, empty tensors and calls without any tensor are
    skipped with one :class:`~shiftwatch.errors.ShiftWatchWarning` per module and reason.

Channel axis
    Dim 1 for convolutions and batch/group/instance normalization (``(N, C, ...)``), the
    last dim for linear, layer and RMS normalization (``(N, ..., F)``); for other module
    types dim 1 when the tensor has at least 4 dims, else the last dim.
"""

from __future__ import annotations

import difflib
import fnmatch
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor, nn
from torch.nn.modules.batchnorm import _BatchNorm
from torch.nn.modules.conv import _ConvNd
from torch.nn.modules.instancenorm import _InstanceNorm

from .errors import ConfigError, ShiftWatchWarning, UnsupportedInputError
from .summary import Summary, summarize_staged

__all__ = [
    "DEFAULT_TYPES",
    "Capture",
    "Tap",
    "channel_dim_for",
    "known_channels",
    "pick_tensor",
    "select_modules",
]

_RMSNORM = (nn.RMSNorm,) if hasattr(nn, "RMSNorm") else ()
#: Module types watched by default.
DEFAULT_TYPES: tuple[type, ...] = (
    _ConvNd, nn.Linear, _BatchNorm, nn.GroupNorm, nn.LayerNorm, _InstanceNorm, *_RMSNORM
)
_CHANNEL_FIRST = (_ConvNd, _BatchNorm, nn.GroupNorm, _InstanceNorm)
_CHANNEL_LAST = (nn.Linear, nn.LayerNorm, nn.Bilinear, *_RMSNORM)
PHASES = ("train", "val")


# ---------------------------------------------------------------------------- selection
def _type_matches(module: nn.Module, types: Sequence[type | str]) -> bool:
    for t in types:
        if isinstance(t, str):
            if type(module).__name__ == t:
                return True
        elif isinstance(module, t):
            return True
    return False


def _patterns(value: str | Iterable[str] | None, name: str) -> tuple[str, ...] | None:
    if value is None:
        return None
    items = (value,) if isinstance(value, str) else tuple(value)
    if not items or not all(isinstance(p, str) and p for p in items):
        raise ConfigError(
            f"'{name}' must be a glob string or a list of non-empty glob strings "
            f"(got {value!r}); e.g. {name}=['conv*', 'blocks.*.norm']"
        )
    return items


def near_names(pattern: str, names: Sequence[str], n: int = 5) -> list[str]:
    """Names closest to ``pattern`` (wildcards removed), for "did you mean" messages."""
    plain = pattern.replace("*", "").replace("?", "").replace("[", "").replace("]", "")
    close = difflib.get_close_matches(plain, names, n=n, cutoff=0.4)
    if not close:
        close = [m for m in names if plain and (plain in m or m in plain)][:n]
    return close or list(names[:n])


def no_match_error(
    pattern: str, field_name: str, names: Sequence[str], what: str, *, where: str = ""
) -> ConfigError:
    """The error for a name pattern that matches nothing, listing near names."""
    near = near_names(pattern, names)
    return ConfigError(
        f"{where}'{field_name}' pattern {pattern!r} matches no {what}; nearest names: "
        f"{', '.join(repr(x) for x in near) or '(none)'}. Fix the pattern (globs use "
        "'*' and '?'; names are as model.named_modules() gives them)"
    )


def select_modules(
    model: nn.Module,
    *,
    layers: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    types: Sequence[type | str] | None = None,
) -> list[tuple[str, nn.Module]]:
    """The ``(name, module)`` pairs to watch, in ``named_modules()`` order.

    Args:
        model: the model; its root module (name ``""``) is never watched.
        layers: name globs to include (default: every module of the selected types).
        exclude: name globs to leave out (applied after ``layers``).
        types: module classes (or class names) to watch; default :data:`DEFAULT_TYPES`.
            A module named by ``layers`` must also be of one of these types.

    Raises:
        ConfigError: a pattern matches no module name, a ``layers`` pattern only matches
            modules of other types, or nothing is left to watch.
    """
    if not isinstance(model, nn.Module):
        raise ConfigError(
            f"'model' must be a torch.nn.Module (got {type(model).__name__}); pass the model "
            "whose layers should be watched"
        )
    inc, exc = _patterns(layers, "layers"), _patterns(exclude, "exclude")
    if types is None:
        types = DEFAULT_TYPES
    else:
        types = (types,) if isinstance(types, (type, str)) else tuple(types)
        if not types or not all(isinstance(t, (type, str)) for t in types):
            raise ConfigError(
                f"'types' must be module classes or class names (got {types!r}); "
                "e.g. types=[torch.nn.Conv2d, 'LayerNorm']"
            )
    named = [(n, m) for n, m in model.named_modules() if n]
    names = [n for n, _ in named]
    for pattern in (inc or ()) + (exc or ()):
        if not any(fnmatch.fnmatchcase(n, pattern) for n in names):
            field_name = "layers" if inc and pattern in inc else "exclude"
            raise no_match_error(pattern, field_name, names, "module of the model")
    picked = []
    for name, module in named:
        if inc is not None and not any(fnmatch.fnmatchcase(name, p) for p in inc):
            continue
        if exc is not None and any(fnmatch.fnmatchcase(name, p) for p in exc):
            continue
        if _type_matches(module, types):
            picked.append((name, module))
    if inc is not None:
        for pattern in inc:
            hits = [(n, m) for n, m in named if fnmatch.fnmatchcase(n, pattern)]
            if not any(_type_matches(m, types) for _, m in hits):
                kinds = sorted({type(m).__name__ for _, m in hits})
                raise ConfigError(
                    f"'layers' pattern {pattern!r} matches only modules of type "
                    f"{', '.join(kinds)}, which 'types' leaves out; add them to 'types' "
                    f"(e.g. types=[{kinds[0]!r}]) or change the pattern"
                )
    if not picked:
        raise ConfigError(
            "no module to watch: the model has no module of the selected 'types' left "
            "after 'layers'/'exclude'; pass types=[...] naming the layer classes to watch"
        )
    return picked


def channel_dim_for(module: nn.Module, ndim: int) -> int:
    """The channel axis of a tensor of ``ndim`` dims entering (or leaving) ``module``."""
    if isinstance(module, _CHANNEL_FIRST):
        return 1
    if isinstance(module, _CHANNEL_LAST):
        return -1
    return 1 if ndim >= 4 else -1


def known_channels(module: nn.Module, *, output: bool = False) -> int | None:
    """The channel count implied by a module's configuration, or ``None`` if unknown
    (other module types, lazy modules not yet initialised)."""
    if isinstance(module, _ConvNd):
        c = module.out_channels if output else module.in_channels
    elif isinstance(module, nn.Linear):
        c = module.out_features if output else module.in_features
    elif isinstance(module, (_BatchNorm, _InstanceNorm)):
        c = module.num_features
    elif isinstance(module, nn.GroupNorm):
        c = module.num_channels
    elif isinstance(module, (nn.LayerNorm, *_RMSNORM)):
        shape = module.normalized_shape
        c = shape[-1] if shape else None
    else:
        return None
    return int(c) if isinstance(c, int) and c > 0 else None


# ---------------------------------------------------------------------------- tensors
def pick_tensor(args: Any, kwargs: dict | None = None) -> tuple[Tensor | None, Tensor | None]:
    """Apply the documented rule: ``(first floating-point tensor, first tensor seen)``.

    Walks ``args`` depth-first (tuples/lists in order, dicts in insertion order), then the
    values of ``kwargs``.  The second item (``None`` when no tensor is present at all) lets
    the caller say why nothing was watched.
    """
    first: list[Tensor | None] = [None]

    def walk(obj: Any) -> Tensor | None:
        if isinstance(obj, Tensor):
            if first[0] is None:
                first[0] = obj
            return obj if obj.is_floating_point() else None
        if isinstance(obj, (tuple, list)):
            items: Iterable[Any] = obj
        elif isinstance(obj, dict):
            items = obj.values()
        else:
            return None
        for item in items:
            hit = walk(item)
            if hit is not None:
                return hit
        return None

    hit = walk(args)
    if hit is None and kwargs:
        hit = walk(kwargs)
    return hit, first[0]


# ---------------------------------------------------------------------------- hooks
@dataclass
class _Gate:
    """State every hook reads; holds no reference to the model or the capture."""

    armed: bool = False
    phase: str | None = None  # forced label, or None: by module.training
    check_finite: bool = False
    max_hist_values: int | None = 65536
    forward_id: int = 0  # bumped by the root pre-hook: one per model forward
    first_fired: int = -1  # forward_id in which a tap last ran first
    input_ptrs: frozenset = frozenset()

    @property
    def active(self) -> bool:
        return self.armed or self.check_finite


@dataclass(eq=False)
class Tap:
    """One watched tensor stream: a module's input (or output).

    Attributes:
        name: module name (``":out"`` appended for outputs).
        kind: ``"input"`` or ``"output"``.
        channels: channel count (``None`` until known).
        edges: float64 histogram edges on the data's device once fixed, else ``None``.
        input_match: while entry detection is on, set when the tap's tensor shares
            storage with a tensor passed to the model's forward.
        fired_first: set when the tap was the first watched input to run in a forward.
    """

    name: str
    kind: str
    channels: int | None
    gate: _Gate = field(repr=False)
    edges: Tensor | None = None
    input_match: bool = False
    fired_first: bool = False
    buckets: dict = field(default_factory=dict, repr=False)
    finite: list = field(default_factory=list, repr=False)
    detect_entry: bool = True
    _warned: set = field(default_factory=set, repr=False)
    _channel_dim: int | None = None
    _module_type: str = ""

    # hook bodies -------------------------------------------------------------
    def pre_hook(self, module: nn.Module, args: tuple, kwargs: dict) -> None:
        if not self.gate.active:
            return
        x = args[0] if args and type(args[0]) is Tensor and args[0].is_floating_point() else None
        first = x
        if x is None:
            x, first = pick_tensor(args, kwargs)
        self._observe(module, x, first)

    def post_hook(self, module: nn.Module, args: tuple, output: Any) -> None:
        if not self.gate.active:
            return
        x, first = pick_tensor(output)
        self._observe(module, x, first)

    def _observe(self, module: nn.Module, x: Tensor | None, first: Tensor | None) -> None:
        gate = self.gate
        if x is None:
            why = "no tensor" if first is None else f"a {first.dtype} tensor"
            self._warn_once(why, f"it received {why}; only floating-point tensors are watched")
            return
        if x.numel() == 0:
            self._warn_once("empty", "it received an empty tensor")
            return
        if not gate.armed:  # every-step non-finite check only (cheap: one pass)
            self.finite.append(torch.isfinite(x.detach()).logical_not().sum())
            return
        phase = gate.phase or ("train" if module.training else "val")
        if self.detect_entry and phase == "train" and self.kind == "input":
            if x.data_ptr() in gate.input_ptrs:
                self.input_match = True
            if gate.first_fired != gate.forward_id:
                gate.first_fired = gate.forward_id
                self.fired_first = True
        if self._channel_dim is None:
            self._channel_dim = channel_dim_for(module, x.ndim)
        if self.edges is not None and self.edges.device != x.device:
            self.edges = self.edges.to(x.device)  # once, not a copy per call
        channels = x.shape[self._channel_dim] if x.ndim > 1 else x.numel()
        if self.channels is None:
            self.channels = channels
        elif channels != self.channels:
            self._warn_once(
                "channels", f"it has {channels} channels where {self.channels} were expected"
            )
            return
        try:
            # stage one (every pass over x) now; the small float64 tails of all layers
            # run together in take(), at step(), where that code is warm
            pending = summarize_staged(
                x, channel_dim=self._channel_dim, edges=self.edges,
                max_hist_values=gate.max_hist_values,
            )
        except (ConfigError, UnsupportedInputError) as exc:
            self._warn_once("summarize", f"it could not be summarised ({exc})")
            return
        self.buckets.setdefault(phase, []).append(pending)

    def _warn_once(self, key: str, why: str) -> None:
        if key in self._warned:
            return
        self._warned.add(key)
        warnings.warn(
            f"shiftwatch skips the {self.kind} of layer '{self.name}' ({self._module_type}): "
            f"{why}. Leave the layer out with exclude=[{self.name.split(':')[0]!r}] to "
            "silence this (shown once per layer)",
            ShiftWatchWarning,
            stacklevel=4,
        )

    # collection -------------------------------------------------------------
    def take(self, phase: str) -> Summary | None:
        """The exact merge of this step's summaries of ``phase`` (``None`` if none)."""
        pending = self.buckets.pop(phase, None)
        if not pending:
            return None
        items = [finish() for finish in pending]
        return items[0] if len(items) == 1 else Summary.merge_all(items)


class Capture:
    """Owns the hooks on the watched modules and the summaries they produce.

    Args:
        model: the model to watch.
        layers, exclude, types: module selection, see :func:`select_modules`.
        outputs: also watch each selected module's output (tap name ``"<name>:out"``).
        max_hist_values: cap on the values per call that go into a histogram (a strided
            subsample taken on the device); ``None`` for all.

    The capture starts disarmed.  :meth:`close` removes every hook; it is safe to call
    twice, and the capture is a context manager that closes on exit.
    """

    def __init__(
        self,
        model: nn.Module,
        *,
        layers: str | Iterable[str] | None = None,
        exclude: str | Iterable[str] | None = None,
        types: Sequence[type | str] | None = None,
        outputs: bool = False,
        max_hist_values: int | None = 65536,
    ) -> None:
        if not isinstance(outputs, bool):
            raise ConfigError(f"'outputs' must be True or False (got {outputs!r})")
        if max_hist_values is not None and (
            isinstance(max_hist_values, bool) or not isinstance(max_hist_values, int)
            or max_hist_values < 1
        ):
            raise ConfigError(
                f"'max_hist_values' must be a positive int or None (got {max_hist_values!r}); "
                "e.g. 65536"
            )
        picked = select_modules(model, layers=layers, exclude=exclude, types=types)
        self.gate = _Gate(max_hist_values=max_hist_values)
        self.taps: list[Tap] = []
        self._handles: list[Any] = []
        for name, module in picked:
            kinds = ("input", "output") if outputs else ("input",)
            for kind in kinds:
                tap = Tap(
                    name=name if kind == "input" else f"{name}:out",
                    kind=kind,
                    channels=known_channels(module, output=kind == "output"),
                    gate=self.gate,
                    _module_type=type(module).__name__,
                )
                if kind == "input":
                    h = module.register_forward_pre_hook(tap.pre_hook, with_kwargs=True)
                else:
                    h = module.register_forward_hook(tap.post_hook)
                self._handles.append(h)
                self.taps.append(tap)
        self._root = model.register_forward_pre_hook(self._root_hook, with_kwargs=True)
        self._closed = False

    # ------------------------------------------------------------------ gate
    def _root_hook(self, module: nn.Module, args: tuple, kwargs: dict) -> None:
        gate = self.gate
        if not gate.armed:
            return
        gate.forward_id += 1
        if any(t.detect_entry for t in self.taps):
            ptrs = set()
            stack: list[Any] = [args, kwargs]
            while stack:
                obj = stack.pop()
                if isinstance(obj, Tensor):
                    ptrs.add(obj.data_ptr())
                elif isinstance(obj, (tuple, list)):
                    stack.extend(obj)
                elif isinstance(obj, dict):
                    stack.extend(obj.values())
            gate.input_ptrs = frozenset(ptrs)

    def arm(self, phase: str | None = None) -> None:
        """Summarise the watched tensors of the coming forwards.

        Args:
            phase: label every capture ``"train"`` or ``"val"``; ``None`` labels each
                forward by its module's mode (``module.training``).
        """
        if phase is not None and phase not in PHASES:
            raise ConfigError(f"'phase' must be one of {PHASES} or None (got {phase!r})")
        self.gate.phase = phase
        self.gate.armed = True

    def disarm(self) -> None:
        """Stop summarising (hooks stay registered and cost one flag check)."""
        self.gate.armed = False
        self.gate.phase = None

    @property
    def armed(self) -> bool:
        return self.gate.armed

    @property
    def check_finite(self) -> bool:
        """Count non-finite values on every (unarmed) forward as well."""
        return self.gate.check_finite

    @check_finite.setter
    def check_finite(self, on: bool) -> None:
        self.gate.check_finite = bool(on)

    def stop_entry_detection(self) -> None:
        """Freeze which taps count as entry layers (after the first sampled forward)."""
        for tap in self.taps:
            tap.detect_entry = False

    def entry_names(self) -> list[str]:
        """*Entry layers*: the watched inputs that receive a tensor passed to the model's
        forward (same storage); when none does, the first watched input(s) to run in a
        training forward.  These are the data-facing layers the default failing rules
        watch."""
        hits = [t.name for t in self.taps if t.input_match]
        return hits or [t.name for t in self.taps if t.fired_first]

    # ------------------------------------------------------------------ data
    def phases(self) -> list[str]:
        """Phases with at least one summary waiting, in :data:`PHASES` order."""
        return [p for p in PHASES if any(t.buckets.get(p) for t in self.taps)]

    def take(self, phase: str) -> list[Summary | None]:
        """Per tap, the merged summary of ``phase`` since the last take (or ``None``)."""
        return [t.take(phase) for t in self.taps]

    def take_finite(self) -> list[Tensor | None]:
        """Per tap, the non-finite count of the every-step check since the last call."""
        out = []
        for t in self.taps:
            items, t.finite = t.finite, []
            out.append(None if not items else (items[0] if len(items) == 1 else sum(items)))
        return out

    def clear(self) -> None:
        for t in self.taps:
            t.buckets.clear()
            t.finite = []

    def drop(self, names: Iterable[str]) -> None:
        """Stop watching the named taps (their hooks are removed)."""
        names = set(names)
        keep_t, keep_h = [], []
        for tap, h in zip(self.taps, self._handles, strict=True):
            if tap.name in names:
                h.remove()
            else:
                keep_t.append(tap)
                keep_h.append(h)
        self.taps, self._handles = keep_t, keep_h

    # ------------------------------------------------------------------ lifecycle
    @property
    def closed(self) -> bool:
        return self._closed

    def close(self) -> None:
        """Remove every hook and drop pending summaries.  Safe to call more than once."""
        self.gate.armed = False
        self.gate.check_finite = False
        self._closed = True
        handles, self._handles = self._handles, []
        for h in handles:
            h.remove()
        self._root.remove()  # RemovableHandle.remove() is itself safe twice
        self.clear()

    def __enter__(self) -> Capture:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.closed else ("armed" if self.armed else "disarmed")
        return f"Capture({len(self.taps)} taps, {state})"
