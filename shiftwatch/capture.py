"""Capture: the hooks that summarise the watched tensors (which ones:
:mod:`shiftwatch.selection`).

Hooks (:class:`Capture`)
    One forward pre-hook per watched module (and one forward hook when outputs are watched
    too) is registered once and gated by a flag: while the capture is *disarmed* a hook
    returns after one attribute check, so unsampled steps cost nothing else.  While armed,
    a hook runs every pass over the tensor right away, on the tensor's own device (no host
    synchronisation, no activation kept, input detached), and keeps small per-channel
    results; :meth:`Capture.take` turns them into :class:`~shiftwatch.summary.Summary`
    objects (the float64 tails of all layers together, see
    :func:`~shiftwatch.summary.summarize_staged`).

Phases
    Forwards of modules in training mode are labelled ``"train"``, eval-mode forwards
    ``"val"``; the two are kept in separate buckets and never merged.  :meth:`Capture.arm`
    can force a label instead (for a validation loop run in training mode, say).

Skipped inputs
    Integer, boolean and complex tensors, empty tensors and calls without any tensor are
    skipped with one :class:`~shiftwatch.errors.ShiftWatchWarning` per module and reason.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor, nn

from .errors import ConfigError, ShiftWatchWarning, UnsupportedInputError
from .selection import (
    DEFAULT_TYPES,
    channel_dim_for,
    known_channels,
    no_match_error,
    pick_tensor,
    select_modules,
)
from .summary import Summary, finish_staged_many, summarize_staged

__all__ = [
    "DEFAULT_TYPES",
    "PHASES",
    "Capture",
    "Tap",
    "channel_dim_for",
    "known_channels",
    "no_match_error",
    "pick_tensor",
    "select_modules",
]

PHASES = ("train", "val")


# ---------------------------------------------------------------------------- hooks
@dataclass
class _Gate:
    """State every hook reads; holds no reference to the model or the capture."""

    armed: bool = False
    phase: str | None = None  # forced label, or None: by module.training
    check_finite: bool = False
    max_hist_values: int | None = 16384
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
        max_hist_values: int | None = 16384,
    ) -> None:
        if not isinstance(outputs, bool):
            raise ConfigError(f"'outputs' must be True or False (got {outputs!r})")
        if max_hist_values is not None and (
            isinstance(max_hist_values, bool) or not isinstance(max_hist_values, int)
            or max_hist_values < 1
        ):
            raise ConfigError(
                f"'max_hist_values' must be a positive int or None (got {max_hist_values!r}); "
                "e.g. 16384"
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
        """Per tap, the merged summary of ``phase`` since the last take (or ``None``).
        The staged tails of all taps run together (:func:`finish_staged_many`)."""
        pending = [t.buckets.pop(phase, None) or [] for t in self.taps]
        done = iter(finish_staged_many([p for ps in pending for p in ps]))
        out: list[Summary | None] = []
        for ps in pending:
            items = [next(done) for _ in ps]
            out.append(None if not items else items[0] if len(items) == 1
                       else Summary.merge_all(items))
        return out

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
