"""The pages in a real browser: headless Chromium (Debian's ``chromium``) loads the digest and a
model page from ``file://`` URLs with no console message, its DOM shows every model and finding
(and no element made from user text), and a screenshot is not blank (Pillow).

Console messages are read from Chromium's own log (``--enable-logging=stderr``), where each one
is a ``CONSOLE`` line; a control page with a planted error shows that the check can fail. With
``CI`` set a missing Chromium fails the test; elsewhere it skips with a message.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from report_history import SCRIPT_SERIES, History, build_history, copy_history
from test_html import Page

from monitor.notify import write_digest, write_model_pages

TIMEOUT = 90


@pytest.fixture(scope="module")
def built_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("history"))


@pytest.fixture
def history(built_history: History, tmp_path: Path) -> History:
    return copy_history(built_history, tmp_path / "workspace")


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    message = "headless Chromium not found (Debian: apt-get install chromium)"
    if os.environ.get("CI"):
        pytest.fail(message + "; CI must have it")
    pytest.skip(message)


def _run(browser: str, profile: Path, *args: str) -> subprocess.CompletedProcess[str]:
    command = [
        browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        "--disable-quic", "--disable-extensions", "--mute-audio", "--hide-scrollbars",
        f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0", *args,
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=TIMEOUT, check=False,
                          env={**os.environ, "LANG": "C.UTF-8"})


def _console(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]


def test_console_check_can_fail(tmp_path: Path) -> None:
    browser = _chromium()
    page = tmp_path / "planted.html"
    page.write_text("<!doctype html><p>x</p><script>missingFunction()</script>", "utf-8")
    result = _run(browser, tmp_path / "profile", "--dump-dom", page.as_uri())
    assert any("missingFunction" in line for line in _console(result.stderr))


def test_pages_in_headless_chromium(history: History, tmp_path: Path) -> None:
    browser = _chromium()
    with history.open() as store:
        digest = write_digest(store, history.config)
        write_model_pages(store, history.config)
        findings = store.open_findings()
    model_page = digest.parent / "model-delivery_hours.html"
    for index, path in enumerate((digest, model_page)):
        result = _run(browser, tmp_path / f"profile-{index}", "--dump-dom", path.as_uri())
        assert result.returncode == 0, result.stderr[-2000:]
        assert _console(result.stderr) == [], path.name
        dom = Page(result.stdout)
        assert not dom.find("script") and not dom.find("img")
        assert not any(name.startswith("on") for e in dom.elements for name in e.attrs)
        assert SCRIPT_SERIES in dom.text
        if path == digest:
            for model in history.config.models:
                assert model in dom.text
            for finding in findings:
                assert finding.message in dom.text
            assert len(dom.find("li", "finding")) >= len(findings)
        else:
            assert "delivery_hours" in dom.text
            for finding in findings:
                if finding.model == "delivery_hours":
                    assert finding.message in dom.text

        shot = tmp_path / f"{path.stem}.png"
        result = _run(browser, tmp_path / f"profile-shot-{index}", f"--screenshot={shot}",
                      "--window-size=1280,1800", path.as_uri())
        assert result.returncode == 0 and shot.exists(), result.stderr[-2000:]
        assert _console(result.stderr) == []
        image = Image.open(shot).convert("RGB")
        pixels = np.asarray(image, dtype=float)
        assert image.size == (1280, 1800)
        colours = {tuple(p) for p in pixels[::7, ::7].reshape(-1, 3).astype(int)}
        assert len(colours) > 20
        assert pixels.std() > 10
        keep = os.environ.get("PLUMBLINE_KEEP_SCREENSHOTS")
        if keep:
            Path(keep).mkdir(parents=True, exist_ok=True)
            shutil.copy(shot, Path(keep) / shot.name)
