"""Command line entry point: parses arguments, calls the library, prints. Nothing else.

Each sub-command lives in its own module under :mod:`benchrun.commands` and exposes
``register(subparsers)``, which adds its parser and sets ``func(args) -> int``.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import logging
import os
import sys
from collections.abc import Sequence

from benchrun import __version__
from benchrun.errors import BenchrunError, user_message

#: Exit code after the reader of our output went away (``benchrun ... | head``): 128 + SIGPIPE,
#: what a shell reports for a program ended by that signal.
EXIT_BROKEN_PIPE = 141
#: Exit code of an unexpected internal error (EX_SOFTWARE of BSD sysexits.h).
EXIT_INTERNAL = 70

#: Libraries whose log records are not for the user of a command line (the signature
#: library logs a traceback on every failed check that benchrun reports as a result).
QUIET_LOGGERS = ("pyhanko", "pyhanko_certvalidator", "sqlalchemy", "h5py", "matplotlib",
                 "fontTools", "PIL", "pyvisa", "pyvisa_py", "asyncio", "urllib3")

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
    "serve",
    "users",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="benchrun",
        description="Double-pulse reverse-recovery testing of power diodes.",
        epilog="High voltage and stored energy can kill: see README before connecting a bench.",
    )
    parser.add_argument("--version", action="version", version=f"benchrun {__version__}")
    parser.add_argument("--debug", action="store_true",
                        help="show tracebacks and library log messages (for reporting a bug)")
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


def quiet_libraries(debug: bool) -> None:
    """Keep third-party log records off the terminal unless ``debug``."""
    if debug:
        logging.basicConfig(level=logging.DEBUG, format="%(name)s: %(levelname)s: %(message)s")
    for name in QUIET_LOGGERS:
        logger = logging.getLogger(name)
        logger.setLevel(logging.NOTSET if debug else logging.CRITICAL + 1)
        logger.propagate = debug


def _stdout_gone() -> int:
    """The reader of stdout went away: stop writing to it, without a second error at exit."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):
        pass
    return EXIT_BROKEN_PIPE


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit code.

    Errors reach the user as one line ``benchrun COMMAND: error: what went wrong``; a
    traceback only with ``--debug``.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    debug = bool(getattr(args, "debug", False))
    quiet_libraries(debug)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    name = f"benchrun {args.command}"
    try:
        code = int(args.func(args) or 0)
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        return _stdout_gone()
    except BenchrunError as exc:
        _report(name, user_message(exc), debug)
        return 2
    except KeyboardInterrupt:
        print(f"{name}: interrupted", file=sys.stderr)
        return 130
    except MemoryError:
        _report(name, "out of memory", debug)
        return EXIT_INTERNAL
    except OSError as exc:
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        _report(name, f"{exc.strerror or exc}{where}", debug)
        return 2
    except Exception as exc:  # the boundary: one line, never a traceback
        _report(name, f"internal error: {type(exc).__name__}: {user_message(exc)} (run again "
                      "with --debug for the details, and please report it)", debug)
        return EXIT_INTERNAL


def _report(name: str, message: str, debug: bool) -> None:
    if debug:
        import traceback

        traceback.print_exc()
    with contextlib.suppress(OSError):  # stderr gone too: nothing left to tell
        print(f"{name}: error: {message}", file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
