"""The ``regwarden`` command line.

Conventions shared by every command
-----------------------------------
* ``--format table|json`` on every command that reports: JSON goes to standard
  output, messages and progress to standard error.
* Exit codes: 0 clean; 1 alerts at or above ``--fail-on LEVEL``; 2 bad usage or
  config; 3 data or source problem; 4 internal error.  An unexpected exception is
  shown as one line with a hint to rerun with ``--debug`` for the traceback, and
  exits 4, never 1.

Each command lives in its own module ``monitor.cli._<name>`` exposing
``register(subparsers)``; add new modules to :data:`COMMAND_MODULES`.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import traceback
from collections.abc import Sequence

from .. import __version__
from ..errors import EXIT_INTERNAL, RegwardenError

__all__ = ["COMMAND_MODULES", "build_parser", "main"]

#: modules that register a sub-command, in the order ``--help`` lists them
COMMAND_MODULES = ["_fit", "_check", "_validate", "_promote", "_annotate", "_store", "_compare"]
COMMAND_MODULES += ["_history", "_report", "_changes"]
COMMAND_MODULES += ["_run", "_serve", "_status", "_backfill"]
COMMAND_MODULES += ["_alerts", "_deliver"]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="regwarden",
        description="Refit, compare and check families of linear regression models, and keep "
        "their history.",
    )
    parser.add_argument("--version", action="version", version=f"regwarden {__version__}")
    parser.add_argument("--debug", action="store_true",
                        help="show the full traceback of an unexpected error")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    subparsers.required = True
    for name in COMMAND_MODULES:
        importlib.import_module(f"{__name__}.{name}").register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``regwarden`` console script; returns the exit code."""
    arguments = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in arguments
    try:
        parser = build_parser()
        options = parser.parse_args(arguments)
        return int(options.handler(options))
    except SystemExit as stop:  # argparse: 2 for bad usage, 0 for --help
        return int(stop.code) if isinstance(stop.code, int) else 2
    except RegwardenError as error:
        print(f"regwarden: {error}", file=sys.stderr)
        if debug:
            traceback.print_exc()
        return error.exit_code
    except KeyboardInterrupt:
        print("regwarden: interrupted", file=sys.stderr)
        return 130
    except Exception as error:  # noqa: BLE001 - the one place that catches everything
        first_line = (str(error).splitlines() or [""])[0]
        print(f"regwarden: internal error: {type(error).__name__}: {first_line} "
              "(this is a bug; rerun with --debug for the traceback)", file=sys.stderr)
        if debug:
            traceback.print_exc()
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
