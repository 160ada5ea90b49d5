"""Careful file effects: atomic writes, atomic moves that never overwrite, temp-file cleanup.

Every file formgate publishes is written under a temporary name in its final
folder, flushed to disk, then renamed into place, so nobody ever sees half a
certificate. Inputs are only ever moved (same-filesystem rename), never copied or
deleted.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

TEMP_PREFIX = "."
TEMP_SUFFIX = ".tmp"


def _fsync_dir(folder: Path) -> None:
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
) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the whole new one.

    The temporary file is ``.<name>.<random>.tmp`` in the same folder (cleaned up by
    :func:`clean_temp_files` if a crash leaves it). ``sync=False`` skips the fsyncs,
    for files such as the heartbeat whose loss on power failure does not matter.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
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
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    if sync:
        _fsync_dir(path.parent)


def move_into(
    source: Path, folder: Path, *, name: str | None = None, exact: bool = False
) -> Path | None:
    """Rename ``source`` into ``folder`` (same filesystem, atomic); return the new path.

    Never overwrites: on a clash the new name gets ``~2``, ``~3``... appended, or,
    with ``exact``, FileExistsError is raised. Returns None if ``source`` vanished
    (another process took it first).
    """
    folder.mkdir(parents=True, exist_ok=True)
    base = name or source.name
    target = folder / base
    n = 1
    while target.exists():
        if exact:
            raise FileExistsError(f"{target} already exists")
        n += 1
        target = folder / f"{base}~{n}"
    try:
        os.rename(source, target)
    except FileNotFoundError:
        return None
    _fsync_dir(folder)
    return target


def clean_temp_files(folder: Path) -> Iterator[Path]:
    """Remove our own unfinished temporary files (``.*.tmp``) under ``folder``; yield each."""
    if not folder.exists():
        return
    for path in folder.rglob(f"{TEMP_PREFIX}*{TEMP_SUFFIX}"):
        if path.is_file():
            path.unlink()
            yield path
