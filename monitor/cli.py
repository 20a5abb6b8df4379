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

# Each command and the module under monitor.commands that registers it, in the order
# ``plumbline --help`` lists them. Only the module of the command given is imported, so a light
# command (``--version``, ``status``, ``ack``, ``check``, ``schema``) never pays for the numerical
# stack the heavy ones need; ``tests/test_cli_startup.py`` checks this table against the modules.
COMMANDS: dict[str, str] = {
    "demo": "demo",
    "pass": "one_pass",
    "run": "run",
    "status": "status",
    "note": "note",
    "ack": "ack",
    "rebaseline": "rebaseline",
    "check": "check",
    "fit": "fit",
    "breaks": "breaks",
    "schema": "schema",
    "backup": "backup",
    "audit": "audit",
    "forecasts": "forecasts",
    "digest": "digest",
}
COMMAND_MODULES: tuple[str, ...] = tuple(dict.fromkeys(COMMANDS.values()))


def build_parser(modules: Sequence[str] = COMMAND_MODULES) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="plumbline",
        description="Monitor recurring linear-regression forecasts: refit, forecast with "
        "prediction intervals, audit coverage, test for drift and breaks.",
    )
    parser.add_argument("--version", action="version", version=f"plumbline {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in modules:
        module = importlib.import_module(f"monitor.commands.{name}")
        module.register(subparsers)
    return parser


def modules_needed(argv: Sequence[str]) -> tuple[str, ...]:
    """The command modules to import for ``argv``: the one of the command named, none for
    ``--version`` alone, every one for help or an unknown command (argparse lists them)."""
    for arg in argv:
        if arg in ("-h", "--help"):
            return COMMAND_MODULES
        if arg == "--version":
            return ()
        if arg.startswith("-"):
            continue
        return (COMMANDS[arg],) if arg in COMMANDS else COMMAND_MODULES
    return COMMAND_MODULES


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
    arguments = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser(modules_needed(arguments))
    try:
        args = parser.parse_args(arguments)
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
