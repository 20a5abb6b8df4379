"""The ``plumbline`` command: parses arguments, dispatches to ``monitor.commands``, sets exit codes.

Each command lives in its own module under ``monitor/commands/`` exposing
``register(subparsers)`` (adds its parser and sets ``handler``) and a handler returning the exit
code. Exit codes (DESIGN.md section 9): 0 success; 1 a critical finding is open and ``--strict``
was given; 2 bad usage, invalid config or input file, refused clock, or a held database lock.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from monitor import __version__
from monitor.errors import PlumblineError

# Module names under monitor.commands, in the order ``plumbline --help`` lists them.
COMMAND_MODULES: tuple[str, ...] = (
    "demo",
    "one_pass",
    "run",
    "status",
    "ack",
    "rebaseline",
    "check",
    "fit",
    "breaks",
    "schema",
    "backup",
    "audit",
    "forecasts",
    "digest",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="plumbline",
        description="Monitor recurring linear-regression forecasts: refit, forecast with "
        "prediction intervals, audit coverage, test for drift and breaks.",
    )
    parser.add_argument("--version", action="version", version=f"plumbline {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        module = importlib.import_module(f"monitor.commands.{name}")
        module.register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on bad usage, 0 on --help
        return int(exc.code or 0)
    if getattr(args, "handler", None) is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args.handler(args))
    except PlumblineError as exc:
        print(f"plumbline: {exc}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:
        return 0


def entry_point() -> None:
    sys.exit(main())


if __name__ == "__main__":
    entry_point()
