"""Settle hand-over: the station judges its own copy of a file, and watches the writer's original.

In settle mode nothing tells the station that a writer has finished: a writer that
pauses for longer than ``settle_s`` may still hold the file open and append to it
later. Renaming the file into work/ does not stop such a writer (its handle follows
the file), so the appended bytes would land in the file being judged, or in the
archived file, which would then no longer match the ledger's hash.

So, in settle mode, the claim copies the file into work/ (the station's copy, hashed
while it is copied, flushed to disk) and moves the writer's original aside, into
``work/.taken/<inbox>/<sha256>_<name>``. The copy is judged and archived as usual.
The original is watched: if it changes (the writer came back), it is moved back into
its inbox, where it is taken again as a new version of the file, and one alert says
"file changed after it was taken". Once it has stayed unchanged for ``HOLD_SETTLES``
times ``settle_s`` and still matches the copy byte for byte, it is removed (the
archive holds the same bytes), and so are the folders it leaves empty.

Rename and marker hand-overs need none of this: there the writer says the file is
complete. docs/station.md recommends them for that reason.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from pipeline.names import fit, from_text
from pipeline.station.watcher import list_entries
from pipeline.writing import fsync_dir, move_into, require_folder

log = logging.getLogger("formgate.station")

TAKEN = ".taken"
# How long an original is watched, in quiet periods: a writer back within four times the
# pause that made its file look finished is caught; one that pauses longer than that is
# not, which is why docs/station.md recommends rename or marker hand-over.
HOLD_SETTLES = 4.0
BLOCK_BYTES = 1 << 20
NAME_RESERVE_BYTES = 32


class UnreadableSource(Exception):
    """Reading the writer's file failed: the file's own fault. ``path``: where it lies now."""

    def __init__(self, error: OSError, path: Path) -> None:
        super().__init__(str(error))
        self.error = error
        self.path = path


@dataclass(frozen=True, slots=True)
class Copy:
    """The station's copy of a settle-mode file: where it lies in work/, its SHA-256 and size."""

    path: Path
    sha256: str
    size: int


PENDING = "_"  # an original moved aside whose copy is not complete yet: its name has no hash


def take_copy(fh: BinaryIO, source: Path, work: Path, *, inbox: str, name: str) -> Copy | None:
    """Move the open file ``fh`` (at ``source``) aside and copy it into ``work`` as ``name``.

    In order, so that a crash at any point loses nothing and judges nothing twice: the
    original is moved aside as pending (an OSError naming ``source`` means it could not
    be moved); the copy is written under a temporary name, flushed and renamed into
    work/; then the original's name gets the copy's hash. A pending original found
    later goes back to its inbox (review), where it is taken again, or found to be a
    duplicate of a copy already made. None if ``source`` has gone. Raises
    UnreadableSource when the original cannot be read, OSError for a fault of the
    surroundings.
    """
    require_folder(work)
    aside = work / TAKEN / inbox
    aside.mkdir(parents=True, exist_ok=True)
    pending = move_into(source, aside, name=fit(PENDING + name, reserve_bytes=NAME_RESERVE_BYTES))
    if pending is None:
        return None
    fh.seek(0)
    digest = hashlib.sha256()
    size = 0
    fd, tmp = tempfile.mkstemp(prefix=f".{name[:80]}.", suffix=".tmp", dir=work)
    try:
        with os.fdopen(fd, "wb") as out:
            while True:
                try:
                    block = fh.read(BLOCK_BYTES)
                except OSError as exc:
                    raise UnreadableSource(exc, pending) from exc
                if not block:
                    break
                digest.update(block)
                out.write(block)
                size += len(block)
            out.flush()
            os.fsync(out.fileno())
        os.chmod(tmp, 0o644)
        target = move_into(Path(tmp), work, name=name, make_parents=False)
        assert target is not None
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    sha = digest.hexdigest()
    os.rename(pending, aside / fit(f"{sha}_{name}", reserve_bytes=NAME_RESERVE_BYTES))
    fsync_dir(aside)
    return Copy(target, sha, size)


@dataclass(frozen=True, slots=True)
class Original:
    """A writer's original in work/.taken, as found now."""

    path: Path
    inbox: str
    name: str  # the inbox name to give it back under
    sha256: str  # of the copy taken from it; empty while pending
    size: int
    mtime_ns: int


def originals(work: Path) -> Iterator[Original]:
    """Every original kept aside in ``work/.taken``."""
    top = work / TAKEN
    try:
        inboxes = sorted(e.name for e in os.scandir(top) if e.is_dir(follow_symlinks=False))
    except FileNotFoundError:
        return
    for inbox in inboxes:
        for entry, (size, mtime_ns) in sorted(list_entries(top / inbox).files.items()):
            sha, sep, name = entry.partition("_")
            if sep and (len(sha) == 64 or not sha):  # no hash: pending, its copy never made
                yield Original(top / inbox / entry, inbox, from_text(name), sha, size, mtime_ns)


def same_bytes(path: Path, sha256: str) -> bool:
    if not sha256:
        return False
    with path.open("rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest() == sha256


def give_back(original: Original, inbox_folder: Path) -> Path | None:
    """Move a changed original back into its inbox under its name; None if that name is taken."""
    target = inbox_folder / original.name
    if os.path.lexists(target):
        return None
    os.rename(original.path, target)
    fsync_dir(inbox_folder)
    return target


def tidy(work: Path) -> None:
    """Remove the folders of work/.taken that hold nothing any more."""
    top = work / TAKEN
    with contextlib.suppress(OSError):
        for folder in top.iterdir():
            with contextlib.suppress(OSError):
                folder.rmdir()  # only if empty
        top.rmdir()

