"""Run a model over the given batches and record the moments of its normalization inputs.

The model runs in evaluation mode under ``torch.no_grad``: BatchNorm then normalizes with
its running statistics and does not update them, dropout is off, and no autograd graph is
built.  Every layer downstream of a BatchNorm therefore sees the inputs it sees at
inference.  Forward pre-hooks turn each layer input into a :class:`SampleMoments` table
right away, so no activation is kept.  Hooks are removed and every module's training flag
is restored afterwards, also when the forward raises: nothing in the model changes.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any, TextIO

import torch
from torch import Tensor, nn

from ..errors import ConfigError, UnsupportedInputError
from .moments import SampleMoments, input_moments, norm_kind

__all__ = ["Capture", "as_batches", "capture_inputs", "find_norm_layers", "reiterable"]

#: A forward function: called as ``forward(model, batch)``.
Forward = Callable[[nn.Module, Any], Any]

_KNOWN = "BatchNorm1d/2d/3d, SyncBatchNorm, GroupNorm, LayerNorm, InstanceNorm1d/2d/3d"


def find_norm_layers(model: nn.Module) -> list[tuple[str, nn.Module]]:
    """``(qualified name, module)`` of every normalization layer, in registration order.

    Raises:
        ConfigError: ``model`` is not a module, or it has no normalization layer.
    """
    if not isinstance(model, nn.Module):
        raise ConfigError(f"'model' must be a torch.nn.Module (got {type(model).__name__})")
    layers = [(name or "<model>", m) for name, m in model.named_modules() if norm_kind(m)]
    if not layers:
        raise ConfigError(
            f"'model' ({type(model).__name__}) has no normalization layers ({_KNOWN}); the "
            "probe measures those layers only: pass a model that contains one"
        )
    return layers


def as_batches(batches: Any) -> Iterable[Any]:
    """``batches`` checked to be an iterable of batches; a single tensor is one batch."""
    if isinstance(batches, Tensor):
        return [batches]
    if not isinstance(batches, Iterable):
        raise UnsupportedInputError(
            f"'batches' must be an iterable of input batches, e.g. a list of tensors or a "
            f"DataLoader (got {type(batches).__name__})"
        )
    return batches


def reiterable(batches: Any) -> Iterable[Any]:
    """:func:`as_batches`, made safe to iterate more than once: a one-shot iterator (a
    generator) is read into a list, which holds all its batches in memory.  Lists, tuples
    and DataLoaders pass through."""
    batches = as_batches(batches)
    return list(batches) if isinstance(batches, Iterator) else batches


@dataclass
class Capture:
    """What one pass recorded.

    Attributes:
        moments: per layer name, the moments of all its inputs (rows of all calls).
        order: layer names in the order of their first call.
        calls: per layer name, number of calls (over all batches).
        sample_shape: per layer name, the input shape without the batch axis (first call).
        samples: number of input samples (dim 0 of the first tensor of each batch).
        batches: number of batches run.
    """

    moments: dict[str, SampleMoments] = field(default_factory=dict)
    order: list[str] = field(default_factory=list)
    calls: dict[str, int] = field(default_factory=dict)
    sample_shape: dict[str, tuple[int, ...]] = field(default_factory=dict)
    samples: int = 0
    batches: int = 0


class _StopForward(Exception):
    """Raised by a hook to end a forward early once the wanted input is recorded."""


class _Progress:
    """Progress lines on a stream: one self-overwriting line on a terminal, a line every
    few seconds otherwise."""

    def __init__(self, enabled: bool | None, label: str, total: int | None,
                 stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = tty if enabled is None else bool(enabled)
        self.tty, self.label, self.total = tty, label, total
        self.last = 0.0

    def update(self, done: int, samples: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if not self.tty and now - self.last < 2.0:
            return
        self.last = now
        of = f"/{self.total}" if self.total is not None else ""
        text = f"shiftwatch probe: {self.label}: batch {done}{of}, {samples} samples"
        self.stream.write(f"\r{text}\x1b[K" if self.tty else text + "\n")
        self.stream.flush()

    def close(self) -> None:
        if self.enabled and self.tty:
            self.stream.write("\n")
            self.stream.flush()


def _first_tensor(batch: Any) -> Tensor | None:
    if isinstance(batch, Tensor):
        return batch
    if isinstance(batch, (list, tuple)):
        for item in batch:
            t = _first_tensor(item)
            if t is not None:
                return t
    if isinstance(batch, dict):
        for item in batch.values():
            t = _first_tensor(item)
            if t is not None:
                return t
    return None


def _to_device(batch: Any, device: torch.device | None) -> Any:
    if device is None:
        return batch
    if isinstance(batch, Tensor):
        return batch.to(device)
    if isinstance(batch, (list, tuple)):
        return type(batch)(_to_device(b, device) for b in batch)
    if isinstance(batch, dict):
        return {k: _to_device(v, device) for k, v in batch.items()}
    return batch


def default_forward(model: nn.Module, batch: Any) -> Any:
    """``model(batch)`` for a tensor; ``model(batch[0])`` for a tuple or list (the usual
    ``(inputs, targets)`` of a DataLoader)."""
    if isinstance(batch, Tensor):
        return model(batch)
    if isinstance(batch, (list, tuple)) and batch and isinstance(batch[0], Tensor):
        return model(batch[0])
    raise UnsupportedInputError(
        f"a batch must be a tensor or a tuple/list whose first item is the input tensor "
        f"(got {type(batch).__name__}); pass forward=lambda model, batch: ... to feed "
        "other batch types"
    )


def _model_device(model: nn.Module) -> torch.device | None:
    for t in model.parameters():
        return t.device
    for t in model.buffers():
        return t.device
    return None


def capture_inputs(
    model: nn.Module,
    batches: Iterable[Any],
    layers: list[tuple[str, nn.Module]],
    *,
    forward: Forward | None = None,
    max_samples: int | None = None,
    progress: bool | None = None,
    label: str = "capture",
    stop_after: str | None = None,
) -> Capture:
    """Run ``model`` over ``batches`` (eval mode, no grad) and record the inputs of ``layers``.

    Args:
        stop_after: a layer name: end each forward right after recording its input (only
            valid when it is called once per forward; the rest of the model is not run).

    Raises:
        ConfigError: the model raised on a batch (the message names the batch and the
            model's own error), or no batch was given.
        UnsupportedInputError: a batch or a layer input has an unusable type.
    """
    forward = forward or default_forward
    device = _model_device(model)
    cap = Capture()
    parts: dict[str, list[SampleMoments]] = {name: [] for name, _ in layers}
    problems: dict[str, Exception] = {}

    def make_hook(name: str):
        def hook(module: nn.Module, args: tuple, kwargs: dict) -> None:
            x = args[0] if args else next(iter(kwargs.values()), None)
            if name not in cap.calls:
                cap.order.append(name)
                cap.calls[name] = 0
                if isinstance(x, Tensor):
                    cap.sample_shape[name] = tuple(x.shape[1:])
            cap.calls[name] += 1
            try:
                parts[name].append(input_moments(module, x))
            except (ConfigError, UnsupportedInputError) as exc:
                problems.setdefault(name, exc)  # the layer itself may reject it better
            if name == stop_after:
                raise _StopForward

        return hook

    flags = [(m, m.training) for m in model.modules()]
    handles = [m.register_forward_pre_hook(make_hook(n), with_kwargs=True) for n, m in layers]
    try:
        total: int | None = len(batches)  # type: ignore[arg-type]
    except TypeError:  # generators, iterable-style datasets
        total = None
    bar = _Progress(progress, label, total)
    try:
        model.eval()
        with torch.no_grad():
            for i, batch in enumerate(batches):
                if max_samples is not None and cap.samples >= max_samples:
                    break
                batch = _to_device(batch, device)
                first = _first_tensor(batch)
                try:
                    forward(model, batch)
                except _StopForward:
                    pass
                except (ConfigError, UnsupportedInputError):
                    raise
                except Exception as exc:
                    shape = "" if first is None else f" of shape {tuple(first.shape)}"
                    raise ConfigError(
                        f"the model rejected batch {i}{shape}: {type(exc).__name__}: {exc}; "
                        "check that the data yields what the model expects (a tensor, or a "
                        "tuple whose first item is the input)"
                    ) from exc
                cap.batches += 1
                cap.samples += 0 if first is None or first.ndim == 0 else first.shape[0]
                bar.update(cap.batches, cap.samples)
    finally:
        for h in handles:
            h.remove()
        for m, mode in flags:
            m.training = mode
        bar.close()
    if cap.batches == 0:
        raise ConfigError("'batches' must hold at least one batch (got none)")
    for name, exc in problems.items():
        raise UnsupportedInputError(f"layer '{name}': {exc}") from exc
    for name, _ in layers:
        if parts[name]:
            cap.moments[name] = SampleMoments.cat(parts[name])
    return cap
