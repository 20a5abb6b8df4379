"""The ``plumbline`` command: parses arguments, dispatches to ``monitor.commands``, sets exit codes.

Each command lives in its own module under ``monitor/commands/`` exposing
``register(subparsers)`` (adds its parser and sets ``handler``) and a handler returning the exit
code. Exit codes (DESIGN.md section 9): 0 success; 1 a critical finding is open and ``--strict``
was given; 2 bad usage, invalid config or input file, refused clock, or a held database lock; 3 the
database cannot be read or written (a damaged file, a full disk, a read-only mount).
"""

from __future__ import annotations

import argparse
import importlib
import sqlite3
import sys
from collections.abc import Sequence
from typing import Any, TextIO

from monitor import __version__
from monitor.errors import DatabaseFaultError, PlumblineError
from monitor.text import printable

# Module names under monitor.commands, in the order ``plumbline --help`` lists them.
COMMAND_MODULES: tuple[str, ...] = (
    "demo",
    "one_pass",
    "run",
    "status",
    "note",
    "ack",
    "rebaseline",
    "check",
    "fit",
    "breaks",
    "schema",
    "backup",
    "audit",
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


class EscapedOutput:
    """Standard output with :func:`monitor.text.printable` applied to every write, so no value
    from a data file (a series name, a file name, a reason) reaches the terminal as a control
    character or a bidirectional mark, whichever command prints it. ``unescaped`` is the stream
    underneath, for a command's own control characters (the demo's progress line)."""

    def __init__(self, stream: TextIO) -> None:
        self.unescaped = stream

    def write(self, text: str) -> int:
        self.unescaped.write(printable(text))
        return len(text)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.unescaped, name)


def main(argv: Sequence[str] | None = None) -> int:
    original = sys.stdout
    sys.stdout = EscapedOutput(original)
    try:
        return _main(argv)
    finally:
        sys.stdout = original


def _main(argv: Sequence[str] | None) -> int:
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
        print(f"plumbline: {printable(str(exc))}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:
        return 0
    except sqlite3.Error as exc:  # a fault the store did not name: still one line, exit 3
        print(f"plumbline: the database cannot be used: {printable(str(exc))}", file=sys.stderr)
        return DatabaseFaultError.exit_code


def entry_point() -> None:
    sys.exit(main())


if __name__ == "__main__":
    entry_point()
