"""The drop folders: which inbox files are complete, and moving files without losing a byte.

A file in the inbox is complete when any of these holds (DESIGN.md section 6):

1. **Marker**: ``NAME.ready`` stands beside it.
2. **Renamed into place**: its change time (``st_ctime``) is later than its modification time
   (``st_mtime``). Writing a file sets both to the same instant; renaming it, or setting its
   times afterwards as ``cp -p``, ``rsync -t``, ``scp -p`` and unpacking tools do, moves only the
   change time. So a file written under a temporary name and renamed into the inbox is taken at
   once. Limits: on a file system whose timestamps are coarser than the gap between the last
   write and the rename, the two times are equal and the file waits for rule 3 instead (safe,
   only slower); a writer that changes a file's mode or owner while still writing it would make
   it look finished, so such a writer should use a marker. Turn the rule off per feed with
   ``IngestSpec.detect_rename = False``.
3. **Settled**: neither time has moved for the feed's ``settle`` time, judged on the real clock
   (never the business clock).

Names starting with ``.`` or ending in ``.part``, ``.tmp`` or ``.ready`` are never data; nor is
anything but a regular file (folders, symbolic links, devices are left alone), nor a file with a
second hard link (another name for a file elsewhere).

Moves never overwrite: a name already taken in the destination gets a suffix (``week_07-2.csv``).
A move is a hard link under the new name followed by removing the old one (atomic, no clobber);
where the folders are on different file systems it is a copy to a temporary name, an fsync, a
no-clobber link into place, then removing the original.
"""

from __future__ import annotations

import errno
import hashlib
import os
import stat
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from monitor.store import fsync_dir, fsync_file

TEMPORARY_SUFFIXES = (".part", ".tmp", ".ready")
MARKER_SUFFIX = ".ready"


@dataclass(frozen=True)
class InboxFile:
    """A data file in an inbox and, when complete, the rule that made it so."""

    path: Path
    size: int
    mtime_ns: int
    rule: str | None  # "marker" | "renamed" | "settled"; None while still waiting
    changed_ns: int = 0  # the later of its modification and change times

    @property
    def name(self) -> str:
        return self.path.name

    @property
    def marker(self) -> Path:
        return self.path.with_name(self.path.name + MARKER_SUFFIX)


@dataclass(frozen=True)
class InboxSurvey:
    """What an inbox holds right now; nothing is read or moved to find out."""

    complete: tuple[InboxFile, ...]  # oldest first (modification time, then name)
    waiting: tuple[InboxFile, ...]  # not settled yet: stay, and raise nothing
    ignored: tuple[tuple[str, str], ...]  # (name, why)
    problem: str | None = None  # e.g. the inbox folder does not exist
    lone_markers: tuple[str, ...] = ()  # NAME.ready with no NAME beside it


def is_temporary_name(name: str) -> bool:
    """Names that are never read as data."""
    return name.startswith(".") or name.lower().endswith(TEMPORARY_SUFFIXES)


def survey_inbox(
    inbox: Path, *, settle_seconds: float, real_clock: Callable[[], float], detect_rename: bool
) -> InboxSurvey:
    """Sort an inbox's entries into complete, waiting and ignored (see the module docstring)."""
    try:
        entries = sorted(os.scandir(inbox), key=lambda entry: entry.name)
    except FileNotFoundError:
        return InboxSurvey((), (), (), f"the inbox {inbox} does not exist")
    except NotADirectoryError:
        return InboxSurvey((), (), (), f"the inbox {inbox} is not a folder")
    except OSError as exc:  # unreadable (EACCES), a link loop, an I/O error
        reason = exc.strerror or str(exc)
        return InboxSurvey((), (), (), f"the inbox {inbox} cannot be listed: {reason}")
    now = real_clock()
    names = {entry.name for entry in entries}
    complete: list[InboxFile] = []
    waiting: list[InboxFile] = []
    ignored: list[tuple[str, str]] = []
    lone: list[str] = []
    for entry in entries:
        name = entry.name
        if name.endswith(MARKER_SUFFIX) and not name.startswith("."):
            if name[: -len(MARKER_SUFFIX)] not in names:
                lone.append(name)
            continue  # a marker: read together with its file
        if is_temporary_name(name):
            ignored.append((name, "a temporary or hidden name"))
            continue
        try:
            info = entry.stat(follow_symlinks=False)
        except FileNotFoundError:
            continue  # gone since the listing
        if stat.S_ISLNK(info.st_mode):
            ignored.append((name, "a symbolic link"))
            continue
        if not stat.S_ISREG(info.st_mode):
            ignored.append((name, "not a regular file"))
            continue
        if info.st_nlink > 1:
            # Another name of a file elsewhere (a hard link): reading it would ingest, quote and
            # move bytes that were never delivered here.
            ignored.append((name, "a hard link (the file has another name elsewhere)"))
            continue
        changed = max(info.st_mtime_ns, info.st_ctime_ns) / 1e9
        rule: str | None = None
        if name + MARKER_SUFFIX in names:
            rule = "marker"
        elif detect_rename and info.st_ctime_ns > info.st_mtime_ns:
            rule = "renamed"
        elif now - changed >= settle_seconds:
            rule = "settled"
        found = InboxFile(Path(entry.path), info.st_size, info.st_mtime_ns, rule,
                          max(info.st_mtime_ns, info.st_ctime_ns))
        (complete if rule else waiting).append(found)
    complete.sort(key=lambda f: (f.mtime_ns, f.name))
    return InboxSurvey(tuple(complete), tuple(waiting), tuple(ignored), None, tuple(lone))


@dataclass(frozen=True)
class InboxNote:
    """A file in an inbox that a scan did not take, why, and what to do about it."""

    feed: str
    name: str
    state: Literal["settling", "changing", "ignored", "lone_marker"]
    reason: str
    action: str

    def line(self) -> str:
        return f"{self.feed}/{self.name}: {self.reason}; {self.action}"


def _duration_text(seconds: float) -> str:
    seconds = max(0.0, seconds)
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def inbox_notes(
    feed: str, settle: float, survey: InboxSurvey, *, now: float,
    changing: tuple[str, ...] = (),
) -> tuple[InboxNote, ...]:
    """Why each file the survey found was not taken (``settle``: the feed's settle time in
    seconds; ``changing``: files that changed while they were read), in words a user can act
    on."""
    notes: list[InboxNote] = []
    for item in survey.waiting:
        age = now - item.changed_ns / 1e9
        notes.append(InboxNote(
            feed, item.name, "settling",
            f"not complete yet: it last changed {_duration_text(age)} ago, and a file is taken "
            f"once unchanged for {_duration_text(settle)} (the feed's settle)",
            f"it is taken in about {_duration_text(max(settle - age, 1.0))}, or at the next scan "
            f"once "
            f"{item.name}{MARKER_SUFFIX} stands beside it",
        ))
    for name in changing:
        notes.append(InboxNote(
            feed, name, "changing", "it changed while it was being read",
            "it is taken once it stops changing; write it under a temporary name and rename it "
            f"when done, or add {name}{MARKER_SUFFIX}",
        ))
    for name, why in survey.ignored:
        if why == "a temporary or hidden name":
            notes.append(InboxNote(
                feed, name, "ignored",
                "never read as data: a temporary or hidden name (starting with '.', or ending "
                "in .part or .tmp)",
                "rename it to its final name when it is complete",
            ))
        else:
            notes.append(InboxNote(feed, name, "ignored", f"never read as data: {why}",
                                   "put data files in the inbox itself"))
    for name in survey.lone_markers:
        stem = name[: -len(MARKER_SUFFIX)]
        notes.append(InboxNote(
            feed, name, "lone_marker", f"a marker with no file {stem} beside it",
            f"{stem} is taken when it arrives; remove the marker if it was left by mistake",
        ))
    return tuple(notes)


def read_stable(path: Path, expected_mtime_ns: int | None = None) -> bytes | None:
    """The file's bytes, or None when it changed while (or since it was surveyed and) read."""
    try:
        # O_NOFOLLOW: a file swapped for a symbolic link since the survey is not followed.
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
        with os.fdopen(fd, "rb") as handle:
            before = os.fstat(handle.fileno())
            data = handle.read()
            after = os.fstat(handle.fileno())
    except (FileNotFoundError, OSError) as exc:
        if isinstance(exc, FileNotFoundError) or exc.errno == errno.ELOOP:
            return None
        raise
    if not stat.S_ISREG(before.st_mode) or before.st_nlink > 1:
        return None
    unchanged = (before.st_size, before.st_mtime_ns) == (after.st_size, after.st_mtime_ns)
    if not unchanged or len(data) != after.st_size:
        return None
    if expected_mtime_ns is not None and after.st_mtime_ns != expected_mtime_ns:
        return None
    return data


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def with_suffix_number(name: str, number: int) -> str:
    """``week_07.csv`` → ``week_07-2.csv``; a name without an extension gets ``-2`` at the end."""
    if number == 1:
        return name
    stem, dot, extension = name.rpartition(".")
    if not dot or not stem:
        return f"{name}-{number}"
    return f"{stem}-{number}.{extension}"


def free_name(name: str, wants: Iterable[tuple[Path, str]], taken: Iterable[Path] = ()) -> str:
    """The first of ``name``, ``name-2``, ... under which every wanted path is free.

    ``wants`` lists (folder, suffix) pairs that must all be free for a name: the data file and
    its side files (``NAME.errors.txt`` ...). ``taken`` holds paths promised to files not yet
    in place.
    """
    wanted = list(wants)
    promised = {str(path) for path in taken}
    for number in range(1, 100_000):
        candidate = with_suffix_number(name, number)
        paths = [folder / (candidate + suffix) for folder, suffix in wanted]
        if not any(p.exists() or p.is_symlink() or str(p) in promised for p in paths):
            return candidate
    raise RuntimeError(f"no free name for {name}")


def move_no_clobber(source: Path, target: Path) -> None:
    """Move ``source`` to ``target``, refusing (FileExistsError) to replace anything there."""
    try:
        os.link(source, target)
    except OSError as exc:
        if exc.errno not in (errno.EXDEV, errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP):
            raise
        _copy_across(source, target)
    os.unlink(source)
    fsync_dir(target.parent)
    fsync_dir(source.parent)


def _copy_across(source: Path, target: Path) -> None:
    temporary = target.with_name(f".{target.name}.{os.getpid()}.part")
    with source.open("rb") as reader, temporary.open("wb") as writer:
        for block in iter(lambda: reader.read(1 << 20), b""):
            writer.write(block)
        writer.flush()
        fsync_file(writer.fileno())
    try:
        os.link(temporary, target)
    except OSError as exc:
        if exc.errno == errno.EEXIST:
            os.unlink(temporary)
            raise
        if target.exists():
            os.unlink(temporary)
            raise FileExistsError(errno.EEXIST, "exists", str(target)) from exc
        os.rename(temporary, target)  # no hard links here: check-then-rename is the best left
        return
    os.unlink(temporary)


def write_new_file(target: Path, content: bytes | Iterable[bytes]) -> None:
    """Write a side file atomically (temporary name, fsync, rename), replacing only our own.
    ``content`` may come in pieces (a long list of rejected rows)."""
    temporary = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    with temporary.open("wb") as writer:
        for piece in [content] if isinstance(content, bytes) else content:
            writer.write(piece)
        writer.flush()
        fsync_file(writer.fileno())
    os.replace(temporary, target)
    fsync_dir(target.parent)


def same_file(first: Path, second: Path) -> bool:
    try:
        return os.path.samefile(first, second)
    except OSError:
        return False


__all__ = [
    "MARKER_SUFFIX",
    "TEMPORARY_SUFFIXES",
    "InboxFile",
    "InboxNote",
    "InboxSurvey",
    "free_name",
    "inbox_notes",
    "is_temporary_name",
    "move_no_clobber",
    "read_stable",
    "same_file",
    "sha256_of",
    "survey_inbox",
    "with_suffix_number",
    "write_new_file",
]
