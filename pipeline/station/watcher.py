"""Watch inbox folders: filesystem events wake the station; a scan of the folder is the truth.

Events from watchdog (inotify, or polling for network shares where inotify sees
nothing) only set a wake-up flag. The station then lists the folder itself
(:func:`list_folder`), so files whose events were lost, or that arrived while the
station was down, are found all the same. A supervisor call restarts an observer
whose thread has died. Deciding what is finished is handoff.py's job.
"""

from __future__ import annotations

import logging
import os
import stat
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from watchdog.events import FileSystemEvent, FileSystemEventHandler
from watchdog.observers import Observer
from watchdog.observers.api import BaseObserver
from watchdog.observers.polling import PollingObserver

log = logging.getLogger("formgate.watcher")

RESTART_WAIT_S = 60.0  # between tries to restart an observer that cannot start (inotify limits)


class _QuietStop(logging.Filter):
    """Drop watchdog's report of an event read while its inotify thread is being stopped.

    It comes from a harmless race inside watchdog at shutdown (the folder listing, not
    events, is what the station relies on) and would otherwise print an ERROR on stop.
    """

    def filter(self, record: logging.LogRecord) -> bool:
        return "called when the thread is inactive" not in record.getMessage()


logging.getLogger("watchdog.observers.inotify").addFilter(_QuietStop())


@dataclass(frozen=True, slots=True)
class Other:
    """An entry that is not a regular file: its kind, its mtime, and for a link what it points to."""

    kind: str  # "folder", "symlink", "fifo", "socket" or "device"
    mtime_ns: int
    points_to: str = ""  # for a symlink: "a file", "a folder", "nothing" or "something else"


@dataclass(frozen=True, slots=True)
class Listing:
    """One listing of a folder: regular files (name -> (size, mtime ns)) and everything else."""

    files: dict[str, tuple[int, int]] = field(default_factory=dict)
    others: dict[str, Other] = field(default_factory=dict)


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "folder"
    if stat.S_ISLNK(mode):
        return "symlink"
    if stat.S_ISFIFO(mode):
        return "fifo"
    if stat.S_ISSOCK(mode):
        return "socket"
    return "device"


def _points_to(path: str) -> str:
    try:
        mode = os.stat(path).st_mode
    except OSError:  # dangling, a loop, or a target the station may not see
        return "nothing"
    return "a file" if stat.S_ISREG(mode) else "a folder" if stat.S_ISDIR(mode) else "something else"


def list_entries(folder: Path) -> Listing:
    """Every entry directly in ``folder``, sorted into regular files and the rest.

    Links are never followed (a link is listed as one). A missing folder lists empty;
    any other error listing it (no permission, a share gone) is raised.
    """
    listing = Listing()
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return listing
    for entry in entries:
        try:
            st = entry.stat(follow_symlinks=False)
        except FileNotFoundError:  # gone between listing and stat: a writer renamed it
            continue
        if stat.S_ISREG(st.st_mode):
            listing.files[entry.name] = (st.st_size, st.st_mtime_ns)
            continue
        kind = _kind(st.st_mode)
        target = _points_to(entry.path) if kind == "symlink" else ""
        listing.others[entry.name] = Other(kind, st.st_mtime_ns, target)
    return listing


def list_folder(folder: Path) -> dict[str, tuple[int, int]]:
    """Regular files directly in ``folder``: name -> (size in bytes, mtime in ns)."""
    return list_entries(folder).files


class _Wake(FileSystemEventHandler):
    def __init__(self, wake: threading.Event) -> None:
        self._wake = wake

    def on_any_event(self, event: FileSystemEvent) -> None:
        self._wake.set()


class InboxWatcher:
    """Observers on the inbox folders that set ``wake`` on any change.

    ``polling`` uses watchdog's PollingObserver (for CIFS/NFS shares, where inotify
    reports nothing: watchdog README). ``supervise()`` restarts a dead observer.
    """

    def __init__(
        self,
        folders: Sequence[Path],
        wake: threading.Event,
        *,
        polling: bool = False,
        poll_interval_s: float = 2.0,
    ) -> None:
        self.folders = tuple(folders)
        self.wake = wake
        self.polling = polling
        self.poll_interval_s = poll_interval_s
        self._observer: BaseObserver | None = None
        self._missing = False  # its folder was not there: say so when it is watched again
        self._next_try_s = 0.0  # a failed restart is tried again no sooner than this
        self.restarts = 0

    def _new_observer(self) -> BaseObserver:
        observer: BaseObserver
        if self.polling:
            observer = PollingObserver(timeout=self.poll_interval_s)
        else:
            observer = Observer()
        handler = _Wake(self.wake)
        for folder in self.folders:
            observer.schedule(handler, str(folder), recursive=False)
        observer.daemon = True
        return observer

    def start(self) -> None:
        """Start watching; a folder that is not there (an unmounted share) is watched once it
        is back (``supervise``), and meanwhile the periodic scan reports it."""
        if not all(os.path.isdir(f) for f in self.folders):
            self._missing = True
            return
        self._observer = self._new_observer()
        self._observer.start()

    def alive(self) -> bool:
        return self._observer is not None and self._observer.is_alive()

    def supervise(self, now_s: float | None = None) -> bool:
        """Restart the observer if its thread has died or its folder came back; True if a
        restart happened. A folder that went stops its observer (which sees nothing there)."""
        now_s = time.monotonic() if now_s is None else now_s
        if not all(os.path.isdir(f) for f in self.folders):
            if self._observer is not None:
                self.stop()
            self._missing = True
            return False
        if self.alive() or now_s < self._next_try_s:
            return False
        if self._missing:
            log.info("watching %s again", ", ".join(str(f) for f in self.folders))
        else:
            log.warning("folder observer stopped; restarting it (the periodic scan covered the gap)")
        self._missing = False
        self.stop()
        try:
            self.start()
        except OSError as exc:  # e.g. inotify watch limit: the periodic scan still works
            log.error("cannot restart the folder observer: %s; relying on periodic scans (tried "
                      "again in %g s)", exc, RESTART_WAIT_S)
            self._observer = None
            self._next_try_s = now_s + RESTART_WAIT_S
            return False
        self.restarts += 1
        self.wake.set()
        return True

    def stop(self) -> None:
        observer, self._observer = self._observer, None
        if observer is None:
            return
        try:
            observer.stop()
            if observer.is_alive():
                observer.join(timeout=5)
        except RuntimeError:  # never started
            pass
