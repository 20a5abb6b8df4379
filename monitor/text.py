"""Small text helpers shared by the config loader, ingest and the command line."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


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


__all__ = ["did_you_mean", "format_p_value", "nearest_name"]
