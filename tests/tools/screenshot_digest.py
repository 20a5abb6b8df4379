"""Render the demo's digest to a PNG with headless Chromium: ``demo_feed/digest.png``.

    python tests/tools/screenshot_digest.py [--out demo_feed/digest.png] [--workspace DIR]
                                        [--chromium PATH] [--keep]

Replays the demo scenario with ``plumbline demo --dir WORKSPACE`` (a new temporary folder by
default, removed afterwards unless ``--keep``), then opens the digest page it wrote
(``reports/digest-<date>.html``) in Debian's ``chromium`` without a sandbox, GPU, network
services or a profile of its own (a fresh ``--user-data-dir``), and saves a 1200 × 1800 screenshot
of its top: the opening sentence and the first findings of "What needs attention".

Exit status 0 with the PNG's path and size printed; 1 when the demo, Chromium or the screenshot
fails (the reason on stderr). Run it again after any change to the digest's look, then commit the
new PNG with that change.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

REPO_ROOT = Path(__file__).resolve().parents[2]
DEFAULT_OUT = REPO_ROOT / "demo_feed" / "digest.png"
WINDOW = (1200, 1800)
CHROMIUM_NAMES = ("chromium", "chromium-browser")
# Flags that keep a headless run self-contained: no sandbox (containers and CI run as root), no
# GPU, no first-run pages, and none of the background services that would reach the network.
CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-quic",
)


def find_chromium(given: str | None) -> str:
    """The Chromium binary: ``given``, else the first of ``CHROMIUM_NAMES`` on PATH."""
    candidates = [given] if given else list(CHROMIUM_NAMES)
    for name in candidates:
        found = shutil.which(name)
        if found:
            return found
    raise SystemExit(f"screenshot_digest: no Chromium found (tried {', '.join(candidates)}); "
                     "install Debian's 'chromium' or pass --chromium PATH")


def replay_demo(workspace: Path) -> Path:
    """Run ``plumbline demo --dir workspace`` in this process; return the digest page."""
    sys.path.insert(0, str(REPO_ROOT))
    from monitor.cli import main

    code = main(["demo", "--dir", str(workspace)])
    if code != 0:
        raise SystemExit(f"screenshot_digest: 'plumbline demo' exited {code}")
    pages = sorted((workspace / "reports").glob("digest-*.html"))
    if not pages:
        raise SystemExit(f"screenshot_digest: the demo wrote no digest in {workspace / 'reports'}")
    return pages[-1]


def screenshot(chromium: str, page: Path, out: Path) -> None:
    """Save a ``WINDOW``-sized screenshot of ``page`` to ``out`` with a fresh profile."""
    out.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="plumbline-chromium-") as profile:
        command = [
            chromium, *CHROMIUM_FLAGS, f"--user-data-dir={profile}",
            f"--screenshot={out}", f"--window-size={WINDOW[0]},{WINDOW[1]}", page.as_uri(),
        ]
        result = subprocess.run(command, capture_output=True, text=True, timeout=180)
    if result.returncode != 0 or not out.exists():
        tail = "\n".join(result.stderr.strip().splitlines()[-5:])
        raise SystemExit(f"screenshot_digest: chromium exited {result.returncode}:\n{tail}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"where to write the PNG (default: {DEFAULT_OUT})")
    parser.add_argument("--workspace", type=Path,
                        help="the demo workspace to create (new or empty; default: a temporary "
                        "folder)")
    parser.add_argument("--chromium", help="the Chromium binary (default: chromium on PATH)")
    parser.add_argument("--keep", action="store_true",
                        help="keep the temporary workspace and print its path")
    args = parser.parse_args(argv)

    chromium = find_chromium(args.chromium)
    if args.workspace is not None:
        workspace, temporary = args.workspace.resolve(), False
    else:
        workspace, temporary = Path(tempfile.mkdtemp(prefix="plumbline-screenshot-")), True
    try:
        page = replay_demo(workspace)
        out = args.out.resolve()
        screenshot(chromium, page, out)
    finally:
        if temporary and not args.keep:
            shutil.rmtree(workspace, ignore_errors=True)
    print(f"{out}: screenshot of {page.name}, {out.stat().st_size:,} bytes")
    if temporary and args.keep:
        print(f"workspace kept at {workspace}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
