"""Careful file effects: atomic writes, atomic moves that never overwrite, temp-file cleanup.

Every file formgate publishes is written under a temporary name in its final
folder, flushed to disk, then renamed into place, so nobody ever sees half a
certificate. Inputs are only ever moved (same-filesystem rename), never copied or
deleted.
"""

from __future__ import annotations

import errno
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

from pipeline.names import fit

TEMP_PREFIX = "."
TEMP_SUFFIX = ".tmp"


def fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomic(
    data: bytes,
    path: Path,
    *,
    before_rename: Callable[[], None] | None = None,
    sync: bool = True,
    make_parents: bool = True,
) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the whole new one.

    The temporary file is ``.<name>.<random>.tmp`` in the same folder (cleaned up by
    :func:`clean_temp_files` if a crash leaves it). ``sync=False`` skips the fsyncs,
    for files such as the heartbeat whose loss on power failure does not matter.
    ``make_parents=False`` creates the file's folder only if the folder above it exists:
    a station folder that has gone (a share unmounted) is an error, not made anew on
    the disk below.
    """
    path.parent.mkdir(parents=make_parents, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f"{TEMP_PREFIX}{path.name}.", suffix=TEMP_SUFFIX, dir=path.parent
    )
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            if sync:
                os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        if before_rename is not None:
            before_rename()
        os.replace(tmp, path)
    except BaseException as exc:
        Path(tmp).unlink(missing_ok=True)
        if isinstance(exc, OSError) and exc.errno is not None and exc.filename is None:
            exc.filename = str(path)  # a failed write (ENOSPC, EIO) names no file by itself
        raise
    if sync:
        fsync_dir(path.parent)


def require_folder(folder: Path) -> None:
    """Raise FileNotFoundError naming ``folder`` unless it is there: a station folder that has
    gone (a share unmounted) is a fault to pause on, never a folder to make anew on the disk below."""
    if not folder.is_dir():
        raise FileNotFoundError(errno.ENOENT, "the station folder is missing", str(folder))


def move_into(
    source: Path,
    folder: Path,
    *,
    name: str | None = None,
    exact: bool = False,
    make_parents: bool = True,
) -> Path | None:
    """Rename ``source`` into ``folder`` (same filesystem, atomic); return the new path.

    Never overwrites: on a clash the new name gets ``~2``, ``~3``... appended (the name
    shortened with a hash if it would not fit), or, with ``exact``, FileExistsError is
    raised. Returns None if ``source`` vanished (another process took it first); a
    missing ``folder`` (with ``make_parents=False``, its parent) raises FileNotFoundError.
    """
    folder.mkdir(parents=make_parents, exist_ok=True)
    base = name or source.name
    target = folder / base
    n = 1
    while os.path.lexists(target):  # a dangling link is in the way too
        if exact:
            raise FileExistsError(errno.EEXIST, "already exists", str(target))
        n += 1
        target = folder / (fit(base, reserve_bytes=len(f"~{n}")) + f"~{n}")
    try:
        os.rename(source, target)
    except FileNotFoundError:
        if not os.path.lexists(source):
            return None
        raise
    fsync_dir(folder)
    return target


def clean_temp_files(folder: Path) -> Iterator[Path]:
    """Remove our own unfinished temporary files (``.*.tmp``) under ``folder``; yield each."""
    if not folder.exists():
        return
    for path in folder.rglob(f"{TEMP_PREFIX}*{TEMP_SUFFIX}"):
        if path.is_file():
            path.unlink()
            yield path
