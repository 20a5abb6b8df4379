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


__all__ = ["did_you_mean", "format_p_value", "is_duration", "nearest_name", "parse_duration"]
