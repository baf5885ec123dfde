"""``shiftwatch probe``: run the normalization probe on a model and data from factories.

``--model`` and ``--data`` name zero-argument callables as ``MODULE:FACTORY``: ``MODULE``
is a dotted module name importable from the current directory, or a path to a ``.py``
file.  The model factory returns an ``nn.Module``; the data factory an iterable of input
batches (a list of tensors, a DataLoader of ``(input, target)`` pairs, ...).

Prints the probe's tables to stdout; ``--json`` writes the result (format in
README.md), ``--plot`` a PNG (needs matplotlib).  Existing files are not overwritten
unless ``--overwrite`` is given.  Exit codes: 0 done, 2 unusable input (every such case
prints one ``error:`` line naming the option and the fix).
"""

from __future__ import annotations

import argparse
import hashlib
import importlib
import importlib.util
import json
import os
import sys
from collections.abc import Callable
from pathlib import Path
from types import ModuleType
from typing import Any

from ..errors import ConfigError, UnsupportedInputError

__all__ = ["load_factory", "register", "run"]

_PROG = "shiftwatch probe"


class _UsageError(Exception):
    """Unusable input: message printed as ``error: ...``, exit code 2."""


def register(subparsers: Any) -> None:
    """Add the ``probe`` sub-parser."""
    p = subparsers.add_parser(
        "probe",
        help="measure normalization layers: batch-size sensitivity, alternatives, running stats",
        description="Probe every normalization layer of a model on given data: how far "
        "BatchNorm's batch statistics are from the population statistics at each batch size, "
        "how much per-sample (layer/instance/group) statistics vary, and whether running "
        "statistics match the data.  The model runs in eval mode under no_grad and is not "
        "changed.",
    )
    p.add_argument("--model", required=True, metavar="MODULE:FACTORY",
                   help="zero-argument callable returning the nn.Module; MODULE is a dotted "
                   "module name or a path to a .py file")
    p.add_argument("--data", required=True, metavar="MODULE:FACTORY",
                   help="zero-argument callable returning an iterable of input batches")
    p.add_argument("--batch-sizes", default="2,4,8,16,32", metavar="B,B,...",
                   help="comma-separated batch sizes to evaluate (default: %(default)s)")
    p.add_argument("--tolerance", type=float, default=None, metavar="NATS",
                   help="KL tolerance per channel (default 0.05; see README.md)")
    p.add_argument("--draws", type=int, default=256, help="random sub-batches per batch size")
    p.add_argument("--seed", type=int, default=0, help="seed of the sub-batch draws")
    p.add_argument("--max-samples", type=int, default=None, metavar="N",
                   help="stop reading batches after N samples")
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    p.add_argument("--plot", metavar="FILE", help="write a PNG of error vs batch size")
    p.add_argument("--recalibrate", action="store_true",
                   help="recompute BatchNorm running statistics exactly on a copy and report "
                   "the mismatch before and after")
    p.add_argument("--save-recalibrated", metavar="FILE",
                   help="save the recalibrated copy's state_dict (torch.save); implies "
                   "--recalibrate")
    p.add_argument("--overwrite", action="store_true", help="replace existing output files")
    p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="progress lines on stderr (default: only on a terminal)")
    p.set_defaults(func=run)


def _batch_sizes(text: str) -> list[int]:
    try:
        sizes = [int(part) for part in text.split(",") if part.strip()]
    except ValueError:
        sizes = []
    if not sizes or min(sizes) < 2:
        raise _UsageError(f"'--batch-sizes' must be comma-separated integers >= 2 "
                          f"(got {text!r}); e.g. --batch-sizes 2,4,8,16,32")
    return sizes


def _check_output(option: str, path: str | None, overwrite: bool) -> None:
    if path is None:
        return
    p = Path(path)
    if p.exists() and not overwrite:
        raise _UsageError(f"'{option}' file {path!r} exists; pass --overwrite to replace it "
                          "or choose another path")
    if not p.parent.is_dir():
        raise _UsageError(f"'{option}' directory {str(p.parent)!r} does not exist; create it "
                          "or choose another path")


def _import_module(option: str, name: str, cache: dict[str, ModuleType]) -> ModuleType:
    is_path = name.endswith(".py") or os.sep in name or "/" in name
    if not is_path:
        if os.getcwd() not in sys.path:
            sys.path.insert(0, os.getcwd())  # as `python -m` does: modules of the cwd
        try:
            return importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name and (name == exc.name or name.startswith(exc.name + ".")):
                raise _UsageError(
                    f"'{option}' module {name!r} is not importable ({exc}); run from the "
                    "directory that holds it, or give the path to its .py file"
                ) from exc
            raise _UsageError(f"'{option}' module {name!r} failed to import: "
                              f"ModuleNotFoundError: {exc}; install what it needs") from exc
        except Exception as exc:
            raise _UsageError(f"'{option}' module {name!r} failed to import: "
                              f"{type(exc).__name__}: {exc}") from exc
    path = Path(name).expanduser().resolve()
    if not path.is_file():
        raise _UsageError(f"'{option}' file {name!r} does not exist; give MODULE:FACTORY with "
                          "MODULE a dotted module name or the path to a .py file")
    key = str(path)
    if key not in cache:
        digest = hashlib.sha1(key.encode()).hexdigest()[:10]
        spec = importlib.util.spec_from_file_location(f"_shiftwatch_factory_{digest}", path)
        if spec is None or spec.loader is None:
            raise _UsageError(f"'{option}' file {name!r} cannot be loaded as a Python module")
        module = importlib.util.module_from_spec(spec)
        if str(path.parent) not in sys.path:
            sys.path.insert(0, str(path.parent))  # let it import its neighbours
        sys.modules[spec.name] = module
        try:
            spec.loader.exec_module(module)
        except Exception as exc:
            del sys.modules[spec.name]
            raise _UsageError(f"'{option}' file {name!r} failed to import: "
                              f"{type(exc).__name__}: {exc}") from exc
        cache[key] = module
    return cache[key]


def load_factory(option: str, spec: str,
                 cache: dict[str, ModuleType] | None = None) -> Callable[[], Any]:
    """The callable named by ``spec`` (``MODULE:FACTORY``); ``option`` names the CLI option
    in error messages.  Raises ``_UsageError`` with one line saying what to fix."""
    module_name, sep, attr = spec.rpartition(":")
    if not sep or not module_name or not attr:
        raise _UsageError(f"'{option}' must be MODULE:FACTORY, e.g. mymodels:make_model or "
                          f"path/to/file.py:make_model (got {spec!r})")
    module = _import_module(option, module_name, {} if cache is None else cache)
    obj: Any = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            names = sorted(n for n, v in vars(module).items()
                           if callable(v) and not n.startswith("_"))
            raise _UsageError(f"'{option}' factory {attr!r} not found in {module_name!r}; "
                              f"callables there: {', '.join(names) or 'none'}")
        obj = getattr(obj, part)
    if not callable(obj):
        raise _UsageError(f"'{option}' {spec!r} must name a zero-argument callable "
                          f"(got {type(obj).__name__})")
    return obj


def _call(option: str, spec: str, factory: Callable[[], Any]) -> Any:
    try:
        return factory()
    except Exception as exc:
        raise _UsageError(
            f"'{option}' factory {spec!r} raised {type(exc).__name__}: {exc}"
        ) from exc


def _run(args: argparse.Namespace) -> int:
    from torch import nn

    from ..probe import KL_TOLERANCE, plot_probe, probe_normalization

    sizes = _batch_sizes(args.batch_sizes)
    for option, path in (("--json", args.json), ("--plot", args.plot),
                         ("--save-recalibrated", args.save_recalibrated)):
        _check_output(option, path, args.overwrite)
    if args.plot:
        from ..probe.plot import _figure_class

        _figure_class()  # fail now, before the run, when matplotlib is missing
    cache: dict[str, ModuleType] = {}
    model = _call("--model", args.model, load_factory("--model", args.model, cache))
    if not isinstance(model, nn.Module):
        raise _UsageError(f"'--model' factory {args.model!r} must return a torch.nn.Module "
                          f"(got {type(model).__name__})")
    data = _call("--data", args.data, load_factory("--data", args.data, cache))
    recal = bool(args.recalibrate or args.save_recalibrated)
    result = probe_normalization(
        model, data, batch_sizes=sizes,
        tolerance=KL_TOLERANCE if args.tolerance is None else args.tolerance,
        draws=args.draws, seed=args.seed, max_samples=args.max_samples,
        recalibrate=recal, progress=args.progress,
    )
    print(result.to_text())
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(result.to_dict(), fh, indent=2, allow_nan=False)
            fh.write("\n")
        print(f"wrote {args.json}", file=sys.stderr)
    if args.plot:
        if any(lr.batch_sizes for lr in result.layers):
            plot_probe(result, args.plot)
            print(f"wrote {args.plot}", file=sys.stderr)
        else:
            print(f"{_PROG}: no BatchNorm layer with evaluated batch sizes: no plot written",
                  file=sys.stderr)
    if args.save_recalibrated:
        if result.recalibrated_model is None:
            raise _UsageError("'--save-recalibrated': the model has no BatchNorm layer with "
                              "running statistics, so nothing was recalibrated")
        import torch

        torch.save(result.recalibrated_model.state_dict(), args.save_recalibrated)
        print(f"wrote {args.save_recalibrated}", file=sys.stderr)
    return 0


def run(args: argparse.Namespace) -> int:
    """Entry point of the subcommand (``func`` of the sub-parser); returns the exit code."""
    try:
        return _run(args)
    except (_UsageError, ConfigError, UnsupportedInputError, ImportError) as exc:
        print(f"{_PROG}: error: {exc}", file=sys.stderr)
        return 2
