"""Folder watching: events wake the station; a dead observer is restarted; polling works too."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest

from pipeline.station.watcher import InboxWatcher, list_folder


@pytest.mark.parametrize("polling", [False, True])
def test_a_new_file_wakes_the_station(tmp_path: Path, polling: bool) -> None:
    wake = threading.Event()
    watcher = InboxWatcher([tmp_path], wake, polling=polling, poll_interval_s=0.2)
    watcher.start()
    try:
        (tmp_path / "a.csv").write_text("x\n")
        assert wake.wait(10), "no wake-up after a file appeared"
    finally:
        watcher.stop()


def test_a_dead_observer_is_restarted_by_the_supervisor(tmp_path: Path) -> None:
    wake = threading.Event()
    watcher = InboxWatcher([tmp_path], wake)
    watcher.start()
    try:
        assert watcher.supervise() is False  # alive: nothing to do
        watcher._observer.stop()  # type: ignore[union-attr]  # the thread ends, as if it had died
        watcher._observer.join(5)  # type: ignore[union-attr]
        assert not watcher.alive()
        assert watcher.supervise() is True
        assert watcher.alive() and watcher.restarts == 1
        wake.clear()
        (tmp_path / "b.csv").write_text("x\n")
        assert wake.wait(10), "the restarted observer reports events"
    finally:
        watcher.stop()


def test_list_folder_lists_regular_files_only(tmp_path: Path) -> None:
    (tmp_path / "a.csv").write_bytes(b"12345")
    (tmp_path / "sub").mkdir()
    listing = list_folder(tmp_path)
    assert list(listing) == ["a.csv"] and listing["a.csv"][0] == 5
    assert list_folder(tmp_path / "missing") == {}
