"""The looks DESIGN.md section 2 forbids, read from the design itself, so that the tests check
exactly what it lists and one list serves every output (tables, pages, e-mail).

``assert_no_borrowed_looks(text)`` fails on any of them. The design lives in ``../shared``; where
it is absent (a user's clone) the check skips with a message, and fails in CI (the rule of
``conftest.shared_path``).
"""

from __future__ import annotations

import html
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


# Plumbline's own retired words and layouts (issue 10): what each page, printout and e-mail must no
# longer say, beside the design's list above. Each pattern is matched within one line of text;
# the reason says what replaced it.
RETIRED_WORDS: tuple[tuple[re.Pattern[str], str], ...] = (
    (re.compile(r"#\d+\s+(critical|warning|notice)\s+[a-z]+_[a-z_]+"),
     "a console-style finding line (#id severity kind); lead with what and where in words"),
    (re.compile(r"\b(critical|warning|notice)\s+[a-z]+(_[a-z]+)+\s"),
     "a severity followed by a snake_case kind; the kind's name belongs to JSON"),
    (re.compile(r"\(since [^,)]*, (new|ongoing|cleared)\b"),
     "the (since …, ongoing) tail; say the state in words"),
    (re.compile(r"\backnowledg", re.I), "acknowledge/ACKNOWLEDGED; an owner's note replaced it"),
    (re.compile(r"\bongoing\b", re.I), "'ongoing'; the word is 'still open'"),
    (re.compile(r"\bcleared\b", re.I), "'cleared'; the words are 'no longer seen'"),
    (re.compile(r"\bNew findings\b|\(new\)"), "'new'; the words are 'newly raised'"),
    (re.compile(r"\bpooled zone\b", re.I), "the pooled-zone square; say what the misses mean"),
    (re.compile(r"\bzone (green|yellow|red)\b|\b(green|yellow|red) zone\b", re.I),
     "a coverage zone by its colour; say 'misses about as expected' and so on"),
    (re.compile(r"\bbaseline", re.I), "'baseline'; name the periods by their dates"),
    (re.compile(r"\brecent window\b", re.I), "'recent window'; name the periods by their dates"),
    (re.compile(r"\bdrifted\b", re.I), "'drifted'; say what moved"),
    (re.compile(r"Test that every slope is zero"),
     "the F test's tail line; say what it means for the forecast"),
)

# Markup that drew a colour with no words of its own.
RETIRED_MARKUP: tuple[tuple[str, str], ...] = (
    ('class="swatch"', "a colour square standing alone"),
    ("zone-green", "a colour class named by the zone"),
    ("zone-red", "a colour class named by the zone"),
)


def assert_own_words(text: str, *, markup: str | None = None) -> None:
    """No retired word or layout in ``text`` (a page as its words, a printout, an e-mail part);
    with ``markup`` (the page's HTML), no retired colour markup either."""
    for number, line in enumerate(text.splitlines(), start=1):
        for pattern, reason in RETIRED_WORDS:
            assert not pattern.search(line), f"line {number}: {reason}: {line.strip()!r}"
    if markup is not None:
        for piece, reason in RETIRED_MARKUP:
            assert piece not in markup, f"{reason} ({piece!r})"


def page_words(markup: str) -> str:
    """A page's words, one block element to a line: no style, script or chart markup."""
    text = re.sub(r"<(style|script|svg)\b.*?</\1>", " ", markup, flags=re.S)
    text = re.sub(r"<(br|/p|/li|/tr|/h\d|/dt|/dd|/div|/caption|/figcaption|/title)\b[^>]*>", "\n",
                  text)
    return html.unescape(re.sub(r"<[^>]+>", " ", text))
