"""Faults of the surroundings pause the station, raise one alert each, and it resumes by itself.

Real faults: folders made read-only (a station that meets file permissions even when
the tests run as root), a folder that goes away, a small real file system filled up
(tmpfs, where this machine lets the tests mount one), a ledger on a file system of its
own that fills up, and rule files broken while the station is down.
"""

from __future__ import annotations

import contextlib
import datetime
import email
import email.policy
import errno
import json
import os
import sqlite3
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import Settings, read_settings
from pipeline.station.status import status_text
from tests.station_kit import (
    cycle_file,
    drop,
    make_station,
    permissions_are_obeyed,
    running,
    settled,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow

QUICK = "retry_max_s = 1\n"


def _alerts(s: Settings, words: str) -> list[str]:
    out = []
    for p in s.mail.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        if words in str(msg["Subject"]):
            out.append(str(msg["Subject"]) + "\n" + msg.get_body().get_content())  # type: ignore[union-attr]
    return out


def _beat(s: Settings) -> dict[str, object]:
    try:
        return dict(json.loads(s.heartbeat.read_text(encoding="utf-8")))
    except (OSError, ValueError):
        return {}


def _paused(s: Settings, words: str) -> bool:
    beat = _beat(s)
    troubles = beat.get("troubles")
    return beat.get("state") == "paused" and isinstance(troubles, list) and any(
        words in str(t) for t in troubles
    )


def _chmod_tree(folder: Path, writable: bool) -> None:
    for path in [folder, *folder.rglob("*")]:
        if path.is_dir():
            path.chmod(0o755 if writable else 0o555)


def test_read_only_and_missing_output_folders_pause_and_the_station_resumes(tmp_path: Path) -> None:
    if not permissions_are_obeyed(tmp_path):
        pytest.skip("this machine cannot run a station that meets file permissions")
    s = make_station(tmp_path / "st", station_toml(extra=QUICK))
    inbox = s.inboxes[0].folder
    proc = start_watch(s.root, obey_permissions=True)
    try:
        drop(inbox, "a.csv", cycle_file("RO-1"))
        wait_until(lambda: settled(s, 1), what="first cell")
        _chmod_tree(s.results, writable=False)
        try:
            drop(inbox, "b.csv", cycle_file("RO-2", seed=2))
            wait_until(lambda: _paused(s, "Permission denied"), what="paused on the read-only folder")
            report = status_text(read_settings(s.root), datetime.datetime.now(datetime.UTC))
            assert "station test-station: paused" in report
            assert f"  paused: {s.results / 'LOT-A'}" in report and "Permission denied since" in report
            assert not any(s.archive.rglob("*b.csv"))
        finally:
            _chmod_tree(s.results, writable=True)
        wait_until(lambda: settled(s, 2), what="resumed by itself after the folder is writable")
        certificates_away = s.root / "certificates-away"
        s.certificates.rename(certificates_away)
        try:
            drop(inbox, "c.csv", cycle_file("RO-3", seed=3))
            wait_until(lambda: _paused(s, "No such file or directory"), what="paused on a missing folder")
            assert not certificates_away.joinpath("LOT-A", "RO-3.pdf").exists()
        finally:
            certificates_away.rename(s.certificates)
        wait_until(lambda: settled(s, 3), what="resumed by itself after the folder is back")
        wait_until(lambda: len(_alerts(s, "station paused")) == 2, what="one alert per fault")
        assert proc.poll() is None
    finally:
        code = stop_watch(proc)
    assert code == 0
    alerts = sorted(_alerts(s, "station paused"))
    assert "Permission denied" in alerts[1] and "No such file or directory" in alerts[0]
    assert (s.certificates / "LOT-A" / "RO-3.pdf").exists()
    assert _beat(s)["state"] == "stopped"
    assert _beat(s)["last_error"] == ""  # the pause's reason went with the pause


@contextlib.contextmanager
def _small_filesystem(path: Path, size: str) -> Iterator[Path]:
    """A tmpfs of ``size`` mounted at ``path`` for the test, or a skip where mounting is not allowed."""
    path.mkdir()
    try:
        done = subprocess.run(
            ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
            capture_output=True,
            check=False,
        )
    except FileNotFoundError:
        pytest.skip("no mount command: a small full file system cannot be made here")
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small file system here ({done.stderr.decode().strip()})")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], check=False)


def _fill(folder: Path) -> Path:
    """Fill the file system of ``folder`` to the last byte with one file; return it."""
    filler = folder / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o644)
    try:
        for size in (2**20, 2**16, 2**12, 2**9, 1):
            block = b"\0" * size
            while True:
                try:
                    os.write(fd, block)
                except OSError as exc:
                    assert exc.errno == errno.ENOSPC
                    break
    finally:
        os.close(fd)
    return filler


def test_a_full_disk_and_a_full_ledger_pause_the_station_until_there_is_room(tmp_path: Path) -> None:
    with (
        _small_filesystem(tmp_path / "disk", "24m") as disk,
        _small_filesystem(tmp_path / "ledger-disk", "2m") as ledger_disk,
    ):
        extra = QUICK + f'ledger = "{ledger_disk / "ledger.sqlite"}"\n'
        s = make_station(disk / "st", station_toml(extra=extra))
        inbox = s.inboxes[0].folder
        proc = start_watch(s.root)
        try:
            drop(inbox, "a.csv", cycle_file("FULL-1"))
            wait_until(lambda: settled(s, 1), what="first cell")
            # the ledger's own disk fills up: it cannot record the next claim
            filler = _fill(ledger_disk)
            drop(inbox, "b.csv", cycle_file("FULL-2", seed=2))
            wait_until(lambda: _paused(s, "ledger-disk"), what="paused on the ledger's disk")
            filler.unlink()
            wait_until(lambda: settled(s, 2), what="resumed once the ledger has room")
            # the station's disk fills up: the next result cannot be written
            (inbox / ".c.csv.part").write_bytes(cycle_file("FULL-3", seed=3))
            filler = _fill(disk)
            (inbox / ".c.csv.part").rename(inbox / "c.csv")
            wait_until(lambda: not (inbox / "c.csv").exists(), what="c.csv claimed")
            wait_until(lambda: any((s.root / "logs").glob("*")) and not settled(s, 3), what="c in hand")
            # the heartbeat is rewritten in place on a full disk: status shows why it pauses
            wait_until(lambda: _paused(s, "No space left on device"), what="paused on a full disk")
            report = status_text(read_settings(s.root), datetime.datetime.now(datetime.UTC))
            assert report.splitlines()[0] == "station test-station: paused", report
            assert "No space left on device (the disk is full) since" in report
            assert proc.poll() is None
            assert not settled(s, 3)
            filler.unlink()
            wait_until(lambda: settled(s, 3), what="resumed once the disk has room")
            wait_until(lambda: len(_alerts(s, "station paused")) == 2, what="one alert per fault")
        finally:
            code = stop_watch(proc)
        assert code == 0
        alerts = sorted(_alerts(s, "station paused"))
        assert any("ledger-disk" in a for a in alerts), alerts
        assert any("No space left on device (the disk is full)" in a for a in alerts), alerts
        with Ledger(s.ledger) as ledger:
            assert ledger.integrity_ok()
            assert sorted(r.cell_id for r in ledger.results.recent(10)) == ["FULL-1", "FULL-2", "FULL-3"]


def test_started_with_a_broken_rule_file_it_judges_with_the_last_valid_rules(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    rules = s.rules_dir / "test_cells.toml"
    with running(s):
        drop(s.inboxes[0].folder, "before.csv", cycle_file("LR-1"))
        wait_until(lambda: settled(s, 1), what="first cell")
    rules.write_text(rules.read_text().replace("low = 0.9 ", "lowe = 0.9 "), encoding="utf-8")
    with running(s):
        drop(s.inboxes[0].folder, "after.csv", cycle_file("LR-2", seed=2))
        wait_until(lambda: settled(s, 2), what="judged with the last valid rules")
        wait_until(lambda: bool(_alerts(s, "started with the last valid rules")), what="alert")
    alert = _alerts(s, "started with the last valid rules")[0]
    assert "It judges with the last rules that were valid, kept in its ledger (test-cells 1)" in alert
    assert f"{rules}, line 16: unknown key 'lowe' in [check.capacity]." in alert.replace("\r\n", "\n")
    with Ledger(s.ledger) as ledger:
        assert [r.verdict for r in ledger.results.recent(10)] == ["pass", "pass"]


def test_started_with_no_valid_rules_ever_it_waits_paused_and_judges_once_they_are_fixed(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    rules = s.rules_dir / "test_cells.toml"
    good = rules.read_text()
    rules.write_text(good.replace("low = 0.9 ", "lowe = 0.9 "), encoding="utf-8")
    drop(s.inboxes[0].folder, "waits.csv", cycle_file("NR-1"))
    with running(s):
        wait_until(lambda: _paused(s, "no valid rules"), what="paused for its rules")
        report = status_text(s, datetime.datetime.now(datetime.UTC))
        assert "station test-station: paused" in report and "paused: no valid rules" in report
        assert (s.inboxes[0].folder / "waits.csv").exists(), "files wait while there are no rules"
        rules.write_text(good, encoding="utf-8")
        wait_until(lambda: settled(s, 1), what="judged once the rules are fixed")
        wait_until(lambda: bool(_alerts(s, "no valid rules")), what="alert")
    assert "files wait in the inboxes and are judged once the rules are fixed" in _alerts(
        s, "no valid rules"
    )[0]


def test_the_heartbeat_is_rewritten_in_place_when_the_disk_is_full(tmp_path: Path) -> None:
    from pipeline.station.heartbeat import SIZE, read_heartbeat, write_heartbeat

    with _small_filesystem(tmp_path / "disk", "1m") as disk:
        path = disk / "heartbeat.json"
        write_heartbeat(path, {"state": "running", "troubles": []})
        filler = _fill(disk)
        beat = {"state": "paused", "troubles": ["paused: No space left on device since now"]}
        write_heartbeat(path, beat)
        assert read_heartbeat(path) == beat
        assert path.stat().st_size == SIZE
        assert not list(disk.glob(".heartbeat.json*")), "no temporary file left behind"
        filler.unlink()


def test_status_shows_a_station_paused_over_a_locked_ledger_and_what_it_can_when_unreadable(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Another process holds the ledger's write lock (``BEGIN IMMEDIATE``) past the busy timeout
    (lowered here, so the station pauses soon): status reads beside it and shows the pause.
    A lock that keeps readers out too (an exclusive one, once the station has stopped):
    status still shows the heartbeat and says why the rest is missing."""
    from pipeline.cli.main import main
    from pipeline.ledger import connection

    monkeypatch.setattr(connection, "BUSY_TIMEOUT_MS", 500)
    s = make_station(tmp_path / "st", station_toml(extra=QUICK))
    inbox = s.inboxes[0].folder
    with running(s):
        drop(inbox, "a.csv", cycle_file("LOCK-1"))
        wait_until(lambda: settled(s, 1), what="first cell")
        holder = sqlite3.connect(s.ledger, isolation_level=None)
        try:
            holder.execute("BEGIN IMMEDIATE")
            drop(inbox, "b.csv", cycle_file("LOCK-2", seed=2))
            wait_until(lambda: _paused(s, "is locked by another process"), what="paused on the lock")
            assert main(["status", str(s.root)]) == 0
            report = capsys.readouterr().out
            assert report.splitlines()[0] == "station test-station: paused", report
            assert f"paused: the ledger {s.ledger} is locked by another process" in report
            assert "LOCK-1  lot LOT-A  pass" in report  # read from the ledger all the same
            assert "ledger integrity: ok" in report
        finally:
            holder.execute("ROLLBACK")
        wait_until(lambda: settled(s, 2), what="resumed once the lock is gone")
    try:
        holder.execute("PRAGMA locking_mode = EXCLUSIVE")  # readers are kept out too
        holder.execute("BEGIN EXCLUSIVE")
        assert main(["status", str(s.root)]) == 0
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    report = capsys.readouterr().out
    lines = report.splitlines()
    assert lines[0] == "station test-station: stopped" and "last heartbeat" in lines[1], report
    assert "queue" in lines and "  work: 0 file(s) being judged" in lines
    assert lines[-1] == (
        f"ledger: cannot be read now: the ledger {s.ledger} is locked by another process "
        "(database is locked); the rest of the status is in it"
    ), report
