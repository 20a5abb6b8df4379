"""The looks DESIGN.md section 2 forbids, read from the design itself, so that the tests check
exactly what it lists and one list serves every output (tables, pages, e-mail).

``assert_no_borrowed_looks(text)`` fails on any of them. The design lives in ``../shared``; where
it is absent (a user's clone) the check skips with a message, and fails in CI (the rule of
``conftest.shared_path``).
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

# the same folder as conftest.SHARED_DIR (not imported: tests/notify has its own conftest)
DESIGN = Path(
    os.environ.get("PLUMBLINE_SHARED") or Path(__file__).resolve().parent.parent.parent / "shared"
) / "DESIGN.md"

_SECTION = re.compile(r"\*\*Looks to avoid\.\*\*(.*?)\n\nWhat to do instead", re.S)


def borrowed_looks() -> list[re.Pattern[str]]:
    """The labels and headings the design names, as patterns matched within one line: quoted
    phrases and code spans of section 2's "Looks to avoid" list. A phrase with an ellipsis
    matches with anything in its place; one with " / " gives its parts, each the start of a
    line."""
    if not DESIGN.exists():  # the same rule as conftest.shared_path
        message = f"the design is not at {DESIGN} (the ../shared folder beside the clone)"
        if os.environ.get("CI"):
            pytest.fail(message + "; CI must have it")
        pytest.skip(message)
    text = DESIGN.read_text(encoding="utf-8")
    match = _SECTION.search(text)
    assert match, "DESIGN.md has no 'Looks to avoid' list"
    block = " ".join(match.group(1).split())
    patterns: list[re.Pattern[str]] = []
    for phrase in re.findall(r'"([^"]+)"', block) + re.findall(r"`([^`]+)`", block):
        parts = phrase.split(" / ")
        # "data: / alternative hypothesis:" names the opening words of printout lines
        start = r"^\s*" if len(parts) > 1 else ""
        for part in parts:
            part = part.strip()
            if part.lower() == "summary" or len(part) < 3:
                continue  # the word "summary" and "=" rules are checked by their shape below
            pieces = [re.escape(piece.strip()) for piece in part.split("…")]
            patterns.append(re.compile(start + ".*?".join(pieces)))
    return patterns


def assert_no_borrowed_looks(text: str) -> None:
    """No forbidden label, no heading line "summary", no "===" rule line, no significance stars."""
    looks = borrowed_looks()
    for line in text.splitlines():
        for look in looks:
            assert not look.search(line), f"a borrowed look ({look.pattern!r}) in {line!r}"
        stripped = line.strip()
        assert not stripped.lower().startswith("summary"), f"a 'summary' heading: {line!r}"
        assert not re.fullmatch(r"=[=\s]{2,}", stripped), f"a '=' rule line: {line!r}"
    assert "***" not in text, "significance stars"
