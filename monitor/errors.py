"""Plumbline's exceptions.

    PlumblineError                 base of everything Plumbline raises on purpose
    ├── UsageError                 bad command-line use (exit 2)
    ├── InputFileError             a file named on the command line cannot be used (exit 2)
    ├── ConfigError                the YAML config is invalid (exit 2)
    ├── ClockRefusedError          a pass's business clock is before the latest pass's (exit 2)
    ├── DatabaseLockedError        another process holds the database's writer lock (exit 2)
    ├── ComputeUnavailableError    the Dask scheduler of ``compute:`` cannot be reached (exit 2)
    ├── ComputeLostError           the cluster lost a batch mid-pass; the pass stopped (exit 2)
    └── DatabaseFaultError         the database file or its disk cannot be used: a garbled or
                                   truncated file, a full disk, a read-only mount (exit 3)

Every class carries ``exit_code``; the CLI prints the message on one line and exits with it.
"""

from __future__ import annotations


class PlumblineError(Exception):
    """Base class; ``exit_code`` is what the CLI exits with."""

    exit_code: int = 2


class UsageError(PlumblineError):
    """The command line asks for something that cannot be done."""


class InputFileError(PlumblineError):
    """A file named on the command line (``fit``, ``breaks``) cannot be used as asked."""


class ConfigError(PlumblineError):
    """The configuration file is invalid; the message names the YAML path and line."""


class ClockRefusedError(PlumblineError):
    """A pass was asked to run at a business clock earlier than the latest pass's."""


class DatabaseLockedError(PlumblineError):
    """Another process holds the advisory writer lock of the database."""


class ComputeUnavailableError(PlumblineError):
    """The analysis cluster named by ``compute:`` cannot be reached or started; raised before a
    pass records anything."""


class ComputeLostError(PlumblineError):
    """The analysis cluster lost work it could not run again (workers died too often, or the
    scheduler went away). The pass is recorded as stopped early, its mark unmoved, so the next
    pass redoes it."""


class DatabaseFaultError(PlumblineError):
    """The database cannot be read or written for a reason outside Plumbline: its file is
    damaged (a garbled or truncated header), its disk is full, or it sits on a read-only mount.
    Nothing half-done is kept: the transaction in progress was rolled back."""

    exit_code = 3


__all__ = [
    "ClockRefusedError",
    "ComputeLostError",
    "ComputeUnavailableError",
    "ConfigError",
    "DatabaseFaultError",
    "DatabaseLockedError",
    "InputFileError",
    "PlumblineError",
    "UsageError",
]
