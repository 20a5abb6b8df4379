"""Small text helpers shared by the config loader, ingest and the command line."""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable
from datetime import timedelta


def nearest_name(word: str, candidates: Iterable[str]) -> str | None:
    """The candidate closest to ``word`` (difflib ratio ≥ 0.6), or None when none is close."""
    matches = difflib.get_close_matches(word, list(candidates), n=1, cutoff=0.6)
    return matches[0] if matches else None


def did_you_mean(word: str, candidates: Iterable[str]) -> str:
    """`` (did you mean 'x'?)`` for the nearest candidate, or an empty string."""
    best = nearest_name(word, candidates)
    return f" (did you mean '{best}'?)" if best is not None else ""


# Characters a terminal or a text viewer acts on instead of showing: C0 controls (ESC starts the
# colour and cursor sequences), DEL, C1 controls, and the bidirectional marks, embeddings,
# overrides and isolates that can make text read in another order than it is stored.
_BIDI = "\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069"
_UNSAFE = re.compile(f"[\x00-\x09\x0b-\x1f\x7f-\x9f{_BIDI}]")
_UNSAFE_WITH_NEWLINE = re.compile(f"[\x00-\x1f\x7f-\x9f{_BIDI}]")


def _escape(match: re.Match[str]) -> str:
    code = ord(match.group(0))
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def printable(text: str, *, keep_newlines: bool = True) -> str:
    """``text`` with every control character and bidirectional mark written as an escape
    (``\\x1b``, ``\\u202e``), so a value from a data file cannot move the cursor, recolour a
    terminal or reorder what a reader sees. Line feeds stay unless ``keep_newlines`` is False.
    """
    pattern = _UNSAFE if keep_newlines else _UNSAFE_WITH_NEWLINE
    return pattern.sub(_escape, text)


def format_p_value(p: float | None) -> str:
    """p-values as people read them: 4 decimals, and "< 0.0001" below that (DESIGN.md section 2)."""
    if p is None:
        return "n/a"
    if p != p:  # NaN never reaches a report silently
        return "n/a"
    if p < 0.0001:
        return "< 0.0001"
    return f"{p:.4f}"


_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smhd])\s*$")
_UNIT_SECONDS = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}


def parse_duration(text: str) -> timedelta:
    """``<number><unit>`` with unit s, m, h or d (``30s``, ``5m``, ``7d``), as in the config file.

    Raises ValueError with a message saying the accepted form.
    """
    match = _DURATION.match(text)
    if match is None:
        raise ValueError(f"{text!r} is not a duration; write <number><unit> with unit s, m, h or d")
    return timedelta(seconds=float(match.group(1)) * _UNIT_SECONDS[match.group(2)])


def is_duration(text: str) -> bool:
    """True when ``text`` reads as a duration (and so not as a cron expression)."""
    return _DURATION.match(text) is not None


__all__ = [
    "did_you_mean", "format_p_value", "is_duration", "nearest_name", "parse_duration", "printable",
]
