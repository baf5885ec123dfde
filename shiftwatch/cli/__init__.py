"""The ``shiftwatch`` command line.

Each subcommand lives in its own module under ``shiftwatch.cli`` and exposes
``register(subparsers) -> None``, which adds an ``argparse`` sub-parser whose ``func``
default is called with the parsed namespace and returns the exit code.  Subcommand
modules are imported lazily so ``shiftwatch --version`` stays fast and an optional
dependency missing for one subcommand does not break the others.

Exit codes: 0 success, 1 a check failed (e.g. ``gate`` found alerts), 2 unusable input
or usage error.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from .. import __version__

#: Subcommand modules, in the order they appear in ``--help``.
SUBCOMMANDS: tuple[str, ...] = ("summary", "report", "compare", "gate", "probe")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="shiftwatch",
        description="Inspect shiftwatch runs (event logs) and probe normalization layers.",
    )
    parser.add_argument("--version", action="version", version=f"shiftwatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in SUBCOMMANDS:
        try:
            module = importlib.import_module(f"{__name__}.{name}_cmd")
        except ModuleNotFoundError as exc:
            if exc.name and exc.name.startswith(f"{__name__}.{name}_cmd"):
                continue  # subcommand not built yet
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        parser.print_help(sys.stderr)
        return 2
    return int(args.func(args) or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
