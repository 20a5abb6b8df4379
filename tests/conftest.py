"""Fixtures shared by the whole suite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

REPO_ROOT = Path(__file__).resolve().parent.parent
# ../shared beside the clone; PLUMBLINE_SHARED names it where the clone sits elsewhere (a git
# worktree in another folder).
SHARED_DIR = Path(os.environ.get("PLUMBLINE_SHARED") or REPO_ROOT.parent / "shared")


def shared_path(*parts: str) -> Path:
    """A path under ``../shared``; skips the test when it is absent, fails it in CI.

    ``../shared`` holds the reference data (NIST StRD files, published check values). A user's
    fresh clone does not have it, so there the tests that read it skip with a message; CI has it
    beside its clone and sets ``CI``, so there a missing folder is a failure, not a skip.
    """
    path = SHARED_DIR.joinpath(*parts)
    if not path.exists():
        message = f"reference data not found at {path} (the ../shared folder beside the clone)"
        if os.environ.get("CI"):
            pytest.fail(message + "; CI must have it")
        pytest.skip(message)
    return path


@pytest.fixture
def nist_dir() -> Path:
    """The folder of NIST StRD linear-regression files."""
    return shared_path("reference", "nist_strd")
