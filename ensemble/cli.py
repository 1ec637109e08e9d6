"""Command line: ``ensemble <command> ...``.

Each command lives in ``ensemble/commands/<name>.py`` with two functions:
``add_parser(subparsers, parents)`` declares its arguments (cheap imports only, so ``--help`` stays
fast) and ``main(args) -> int`` does the work.  This module maps errors to exit codes:

* 0: success;
* 2: bad input or configuration (:class:`~ensemble.errors.EnsembleError`), one line on stderr;
* 1: internal error, one line with a hint (``--verbose`` shows the traceback);
* 130: interrupted.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys

from . import __version__
from .errors import EnsembleError

#: Command modules in the order ``--help`` lists them.
COMMANDS = ("run", "stability", "simulate", "steer", "inspect", "config", "assess", "report")

log = logging.getLogger("ensemble")


def _common_options() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    group = common.add_mutually_exclusive_group()
    group.add_argument("-q", "--quiet", action="store_true",
                       help="print only errors (and the command's requested output)")
    group.add_argument("-v", "--verbose", action="store_true",
                       help="print progress details and, on an internal error, the traceback")
    return common


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (all commands)."""
    parser = argparse.ArgumentParser(
        prog="ensemble",
        description="Clock ensemble time scale: form the scale, detect anomalies, steer an "
                    "output, assess clocks, archive everything in HDF5.",
        epilog="Run 'ensemble COMMAND --help' for a command's options and examples. "
               "Exit codes: 0 success, 2 bad input or configuration, 1 internal error.")
    parser.add_argument("--version", action="version", version=f"ensemble {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    common = _common_options()
    for name in COMMANDS:
        module = importlib.import_module(f"ensemble.commands.{name}")
        module.add_parser(sub, [common])
    return parser


def _configure_logging(args: argparse.Namespace) -> None:
    level = logging.WARNING
    if getattr(args, "verbose", False):
        level = logging.DEBUG
    elif getattr(args, "quiet", False):
        level = logging.ERROR
    else:
        level = logging.INFO
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``ensemble`` command; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    _configure_logging(args)
    try:
        return int(args.func(args) or 0)
    except EnsembleError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the last line of defence of the CLI
        if getattr(args, "verbose", False):
            import traceback
            traceback.print_exc()
        print(f"internal error: {type(exc).__name__}: {exc} (this is a bug in ensemble; rerun "
              f"with --verbose for the traceback and report it)", file=sys.stderr)
        return 1


def entry() -> None:  # pragma: no cover - thin wrapper for console scripts
    sys.exit(main())
