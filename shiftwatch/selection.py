"""Selection: which modules are watched, which tensor of a call is watched, and its
channel axis.

Selection (:func:`select_modules`)
    By default the *inputs* of convolution, linear and normalization layers (batch, group,
    layer, instance and RMS normalization) are watched.  ``layers`` / ``exclude`` take
    module-name globs (:mod:`fnmatch` syntax, matched against names as
    ``model.named_modules()`` gives them, e.g. ``"encoder.*.conv"``); ``types`` replaces
    the default module types (classes, or class names as strings).  A pattern that matches
    no module is a :class:`~shiftwatch.errors.ConfigError` that lists the nearest names.

Which tensor of a call is watched (the *documented rule* for tuple/dict inputs)
    The first floating-point tensor found by a depth-first walk over the positional
    arguments, in order (tuples and lists element by element, dicts in insertion order),
    then over the keyword arguments in the order given.  For outputs the same walk runs
    over the returned value.  One tensor per call; a module called several times in one
    step contributes every call, merged exactly.

Channel axis
    Dim 1 for convolutions and batch/group/instance normalization (``(N, C, ...)``), the
    last dim for linear, layer and RMS normalization (``(N, ..., F)``); for other module
    types dim 1 when the tensor has at least 4 dims, else the last dim.
"""

from __future__ import annotations

import difflib
import fnmatch
from collections.abc import Iterable, Sequence
from typing import Any

from torch import Tensor, nn
from torch.nn.modules.batchnorm import _BatchNorm
from torch.nn.modules.conv import _ConvNd
from torch.nn.modules.instancenorm import _InstanceNorm

from .errors import ConfigError

__all__ = [
    "DEFAULT_TYPES",
    "channel_dim_for",
    "known_channels",
    "near_names",
    "no_match_error",
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
