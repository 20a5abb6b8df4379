"""Rewrite ``demo_feed/`` from the demo scenario's seeded generator (``monitor.demo``).

Run from anywhere::

    python tests/tools/make_demo_feed.py            # rewrite demo_feed/ beside this script's folder
    python tests/tools/make_demo_feed.py --check    # exit 1 if demo_feed/ differs, writing nothing

Files in ``demo_feed/`` that the generator no longer makes are removed, so the folder holds
exactly the generated files (``tests/test_demo_scenario.py`` checks the same, byte for byte).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path, PurePosixPath

from monitor.demo import scenario_files

DEMO_FEED = Path(__file__).resolve().parents[2] / "demo_feed"
# The digest picture drawn by tests/tools/screenshot_digest.py sits with the demo's files but is
# not made by the scenario's generator, so it is neither compared nor removed.
PICTURE = "digest.png"


def existing_files(folder: Path) -> set[str]:
    """Relative POSIX paths of every file under ``folder``."""
    if not folder.exists():
        return set()
    return {
        p.relative_to(folder).as_posix()
        for p in folder.rglob("*")
        if p.is_file() and p.relative_to(folder).as_posix() != PICTURE
    }


def differences(folder: Path, files: dict[str, bytes]) -> list[str]:
    """One line per file that is missing, extra or different under ``folder``."""
    present = existing_files(folder)
    problems = [f"missing: {path}" for path in sorted(set(files) - present)]
    problems += [f"extra: {path}" for path in sorted(present - set(files))]
    problems += [
        f"differs: {path}"
        for path in sorted(set(files) & present)
        if (folder / path).read_bytes() != files[path]
    ]
    return problems


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="compare only; write nothing")
    parser.add_argument("--out", type=Path, default=DEMO_FEED, help="folder (default demo_feed/)")
    args = parser.parse_args(argv)
    files = scenario_files()
    problems = differences(args.out, files)
    if args.check:
        for line in problems:
            print(line)
        print(f"{len(problems)} difference(s) in {args.out}")
        return 1 if problems else 0
    for path in sorted(existing_files(args.out) - set(files)):
        (args.out / path).unlink()
    for relative, content in files.items():
        target = args.out.joinpath(*PurePosixPath(relative).parts)
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(content)
    for folder in sorted((p for p in args.out.rglob("*") if p.is_dir()), reverse=True):
        if not any(folder.iterdir()):
            folder.rmdir()
    total = sum(len(content) for content in files.values())
    print(f"wrote {len(files)} files, {total:,} bytes, to {args.out} ({len(problems)} changed)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
