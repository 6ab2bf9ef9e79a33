"""Command line entry point: parses arguments, calls the library, prints. Nothing else.

Each sub-command lives in its own module under :mod:`benchrun.commands` and exposes
``register(subparsers)``, which adds its parser and sets ``func(args) -> int``.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from benchrun import __version__
from benchrun.errors import BenchrunError

#: Sub-command modules, in the order they are listed by ``benchrun --help``.
COMMAND_MODULES = (
    "demo",
    "run",
    "sim",
    "bench",
    "analyze",
    "grade",
    "report",
    "loss",
    "keys",
    "verify",
    "reports",
    "export",
    "compact",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="benchrun",
        description="Double-pulse reverse-recovery testing of power diodes.",
        epilog="High voltage and stored energy can kill: see README before connecting a bench.",
    )
    parser.add_argument("--version", action="version", version=f"benchrun {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"benchrun.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"benchrun.commands.{name}":
                continue  # command not present in this build
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except BenchrunError as exc:
        print(f"benchrun {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"benchrun {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
