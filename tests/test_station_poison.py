"""One bad inbox entry never stops the station: each is judged, set aside or left with a reason.

A real `formgate watch` process (meeting file permissions even when the tests run as
root) gets, in a rename-mode and a settle-mode inbox: a name that is not UTF-8, a name
with a line break, a 250-character name, a file it may not read, a folder, a dangling
symbolic link, a link to a folder, a named pipe, a file it may not move, young and old
dot-names; then a good file. It must keep running, decide each entry once, and judge
the good file as usual.
"""

from __future__ import annotations

import contextlib
import datetime
import email
import email.policy
import os
import subprocess
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.names import from_text
from pipeline.station.settings import read_settings
from pipeline.station.status import status_text
from tests.station_kit import (
    cycle_file,
    drop,
    make_station,
    permissions_are_obeyed,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow

INBOXES = (
    '[inbox.quick]\nfolder = "inbox"\nhandover = "rename"\n\n'
    '[inbox.slow]\nfolder = "settle-inbox"\nhandover = "settle"\nsettle_s = 0.5\n'
)
UNDECODABLE = os.fsdecode(b"cell_\xe9.csv")
LONG = "L" * 246 + ".csv"  # 250 characters: with the ledger id in front, too long for the disk


def _immutable(path: Path, on: bool) -> bool:
    """Set or clear the file's immutable flag (not even root may rename it); False if unsupported."""
    try:
        done = subprocess.run(
            ["chattr", "+i" if on else "-i", str(path)], capture_output=True, check=False
        )
    except FileNotFoundError:
        return False
    return done.returncode == 0


def _in_work(work: Path) -> list[Path]:
    """Inputs being judged (work/.taken holds settle-mode originals being watched)."""
    return [p for p in work.iterdir() if not p.name.startswith(".")]


def _mails(folder: Path) -> list[str]:
    out = []
    for p in folder.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        out.append(str(msg["Subject"]) + "\n" + msg.get_body().get_content())  # type: ignore[union-attr]
    return out


def test_poison_entries_are_set_aside_and_the_station_goes_on(tmp_path: Path) -> None:
    if not permissions_are_obeyed(tmp_path):
        pytest.skip("this machine cannot run a station that meets file permissions")
    toml = station_toml(inboxes=INBOXES, extra="waiting_alert_s = 60\n")
    s = make_station(tmp_path / "st", toml)
    quick, slow = (i.folder for i in s.inboxes)
    slow.mkdir(exist_ok=True)
    poison: dict[Path, str] = {}  # entry -> what must become of it
    for inbox, tag in ((quick, "q"), (slow, "s")):
        (inbox / UNDECODABLE).write_bytes(cycle_file(f"U-{tag}", seed=1 if tag == "q" else 2))
        (inbox / f"two\nlines-{tag}.csv").write_bytes(cycle_file(f"N-{tag}", seed=3 if tag == "q" else 4))
        (inbox / f"{tag}{LONG[1:]}").write_bytes(cycle_file(f"LONG-{tag}", seed=5 if tag == "q" else 6))
        locked = inbox / f"locked-{tag}.csv"
        locked.write_bytes(cycle_file(f"P-{tag}", seed=7 if tag == "q" else 8))
        locked.chmod(0)
        poison[locked] = "cannot be read (Permission denied)"
        (inbox / f"dir-{tag}").mkdir()
        (inbox / f"dir-{tag}" / "inside.csv").write_bytes(b"x\n")
        poison[inbox / f"dir-{tag}"] = "a folder, not a file"
        (inbox / f"dangling-{tag}.csv").symlink_to(tmp_path / "nowhere.csv")
        poison[inbox / f"dangling-{tag}.csv"] = "a symbolic link to nothing"
        (inbox / f"to-folder-{tag}.csv").symlink_to(tmp_path)
        poison[inbox / f"to-folder-{tag}.csv"] = "a symbolic link to a folder"
        os.mkfifo(inbox / f"pipe-{tag}.csv")
        poison[inbox / f"pipe-{tag}.csv"] = "a named pipe, not a file"
        (inbox / "..csv").write_bytes(b"old dot-name\n")
        hour_ago = time.time() - 3600
        os.utime(inbox / "..csv", (hour_ago, hour_ago))
        (inbox / ".young.csv").write_bytes(b"a writer's temporary file\n")
    for name, data in (("empty.csv", b""), ("no-newline.csv", cycle_file("NN-1").rstrip(b"\n"))):
        (slow / name).write_bytes(data)  # quiet, but never ends cleanly: never taken
        os.utime(slow / name, (time.time() - 7200, time.time() - 7200))
    frozen = quick / "frozen.csv"
    frozen.write_bytes(cycle_file("F-1", seed=9))
    can_freeze = _immutable(frozen, True)
    proc = start_watch(s.root, obey_permissions=True)
    try:
        wait_until(lambda: s.heartbeat.exists(), what="station started")
        for path in poison:
            wait_until(lambda p=path: not os.path.lexists(p), what=f"{path.name} set aside")
        wait_until(lambda: not _in_work(s.work), what="the files in work judged")
        (quick / ".good.csv.part").write_bytes(cycle_file("GOOD-1", seed=10))
        (quick / ".good.csv.part").rename(quick / "good.csv")
        wait_until(lambda: not (quick / "good.csv").exists() and not _in_work(s.work),
                   what="the good file taken after the poison")
        wait_until(lambda: any("file(s) waiting" in m for m in _mails(s.mail)), what="waiting alert")
        assert proc.poll() is None, "the station is still running"
        report = status_text(read_settings(s.root), datetime.datetime.now(datetime.UTC))
    finally:
        code = stop_watch(proc)
        if can_freeze:
            _immutable(frozen, False)
    assert code == 0
    with Ledger(s.ledger) as ledger:
        finals = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        aside = ledger.facts.set_aside_rows(100)
    # names that are not plain text are judged all the same, stored as lossless text
    expected = ["cell_\\xe9.csv"] * 2 + ["two\\x0alines-q.csv", "two\\x0alines-s.csv"]
    expected += [f"q{LONG[1:]}", f"s{LONG[1:]}", "good.csv"]
    assert sorted(r.name for r in finals) == sorted(expected)
    for row in finals:
        assert row.state == "archived" and Path(row.final_path or "").exists(), row
        assert len(Path(row.final_path or "").name.encode()) <= 255
    assert from_text("cell_\\xe9.csv") == UNDECODABLE
    assert from_text("two\\x0alines-q.csv") == "two\nlines-q.csv"
    # each poison entry is in quarantine with its reason beside it, and in the ledger
    for path, why in poison.items():
        found = [a for a in aside if a.name == path.name and a.state == "quarantined"]
        assert found and why in found[0].reason, (path.name, [a.reason for a in aside])
        target = Path(found[0].final_path or "")
        assert os.path.lexists(target)
        assert target.name.startswith(f"aside-{found[0].id:06d}_"), target.name  # leads to its row
        assert why in target.with_name(target.name + ".reason.txt").read_text()
    if can_freeze:
        left = [a for a in aside if a.name == "frozen.csv"]
        assert [a.state for a in left] == ["left_in_place"]
        assert left[0].reason.startswith(
            "left in place: frozen.csv was not judged; the station cannot move it out of the "
            "inbox (Operation not permitted)."
        )
        assert frozen.exists()
        assert "  quick: left in place: frozen.csv was not judged;" in report
    # dot-names: the young one is a writer's and waits unseen; the old one is shown and alerted
    assert (quick / ".young.csv").exists() and (quick / "..csv").exists()
    assert "..csv" in report and "waiting 60 min" in report
    assert ".young.csv" not in report
    for name in ("empty.csv", "no-newline.csv"):
        assert (slow / name).exists()
        assert f"  slow: {name}: waiting 2.0 h; it does not look complete" in report
    mails = _mails(s.mail)
    waiting = [m for m in mails if "file(s) waiting in inbox" in m]
    assert any("..csv: waiting 60 min; a temporary name" in m for m in waiting)
    assert any("- no-newline.csv: waiting 2.0 h; it does not look complete" in m for m in waiting)
    set_aside = [m for m in mails if "set aside:" in m.splitlines()[0]]
    assert len(set_aside) == len(poison)


def test_a_station_killed_twice_with_one_input_in_hand_quarantines_it_as_crashing_the_judge(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    inbox = s.inboxes[0].folder
    (inbox / "crash.csv").write_bytes(cycle_file("CR-1", capacity_ah=1.5))
    for _ in range(2):  # dies while publishing its result, the first time and on recovery
        proc = start_watch(s.root, {"FORMGATE_FAULT": "after_write"})
        try:
            proc.wait(120)
        finally:
            stop_watch(proc)
        assert proc.returncode == -9
    again = start_watch(s.root)
    try:
        wait_until(lambda: any(s.quarantine.glob("*crash.csv")), what="the input quarantined")
        # handed over as a cycler must (write, then rename): a file written in place can be
        # claimed half-written and is rightly quarantined as changed after its claim
        drop(inbox, "after.csv", cycle_file("CR-2", seed=4))
        # the property is that the station goes on judging, not how soon: a station started
        # after two kills starts its workers afresh, which a busy machine makes slow
        wait_until(lambda: any(s.archive.rglob("*after.csv")), timeout_s=180.0,
                   what="the next file judged")
    finally:
        assert stop_watch(again) == 0
    reason = next(s.quarantine.glob("*crash.csv.reason.txt")).read_text()
    assert "it crashed the judge: the station process ended 2 times while recording this file" in reason
    # its result was recorded before the deaths, its certificate promised: given up, not lost
    with Ledger(s.ledger) as ledger:
        (row,) = [r for r in ledger.inputs.in_state("quarantined") if r.name == "crash.csv"]
        result = ledger.results.of_input(row.id)
        assert result is not None
        assert ledger.certificates.outcome(result.id)[0] == "failed"
    assert not any(s.certificates.rglob("CR-1.pdf"))


def test_an_entry_that_cannot_be_moved_is_tried_once_until_it_changes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    """A folder no one may move (immutable) is tried once, logged once, alerted once: the
    probe each try writes into the inbox must not wake the station into trying again at
    once (it did: about 500 tries, and log lines, a second). Once it changes, and its
    back-off has passed, it is tried again."""
    from pipeline.station import lingering, watcher
    from pipeline.station import station as station_module
    from tests.station_kit import running

    monkeypatch.setattr(lingering, "LEFT_FIRST_WAIT_S", 1.0)
    listings: list[Path] = []
    real_list_entries = watcher.list_entries

    def counted(folder: Path) -> watcher.Listing:
        listings.append(folder)
        return real_list_entries(folder)

    monkeypatch.setattr(station_module, "list_entries", counted)
    s = make_station(tmp_path / "st")
    inbox = s.inboxes[0].folder
    stuck = inbox / "stuck"
    stuck.mkdir()
    (stuck / "inside.csv").write_bytes(b"x\n")
    if not _immutable(stuck, True):
        pytest.skip("this filesystem has no immutable flag (chattr)")
    try:
        with running(s):
            wait_until(lambda: _left_rows(s) == 1, what="the folder recorded as left in place")
            before = len([p for p in listings if p == inbox])
            time.sleep(3.0)  # the station idles: it lists on its reconcile turns (0.5 s)
            inbox_listings = len([p for p in listings if p == inbox]) - before
            tries = [r for r in caplog.records if "left in place" in r.getMessage()]
            assert len(tries) == 1, [r.getMessage() for r in tries]
            assert inbox_listings <= 20, f"{inbox_listings} listings of the inbox in 3 s"
            _immutable(stuck, False)  # the fault is fixed: the folder's change time moves
            wait_until(lambda: not stuck.exists(), what="the folder set aside once movable")
    finally:
        with contextlib.suppress(FileNotFoundError):
            _immutable(stuck, False)
    with Ledger(s.ledger) as ledger:
        rows = ledger.facts.set_aside_rows(10)
    assert sorted(r.state for r in rows) == ["left_in_place", "quarantined"]
    alerts = [m for m in _mails(s.mail) if "left in place: stuck" in m.splitlines()[0]]
    assert len(alerts) == 1


def _left_rows(s: object) -> int:
    with Ledger(s.ledger) as ledger:  # type: ignore[attr-defined]
        return len(ledger.facts.set_aside_rows(10, state="left_in_place"))
