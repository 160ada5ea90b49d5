"""A station never exits over its settings or one of its inboxes: it waits, says why, and goes on.

Real `formgate watch` processes: one started on a broken station.toml waits (no restart
loop under a service manager) with its reason in `formgate status`, and starts once the
file is fixed; one whose inbox is missing at start, or goes while it runs, judges its
other inbox, shows and alerts the missing one once, and takes its files once it is back.
"""

from __future__ import annotations

import datetime
import email
import email.policy
import json
import re
import time
from pathlib import Path

import pytest

from pipeline.cli.main import main
from pipeline.station.settings import Settings, read_settings
from pipeline.station.startup import STATE_FILE
from pipeline.station.status import status_text
from tests.station_kit import (
    cycle_file,
    drop,
    heartbeat_troubles,
    make_station,
    settled,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow

TWO_INBOXES = (
    '[inbox.hall-a]\nfolder = "inbox-a"\nhandover = "rename"\n\n'
    '[inbox.hall-b]\nfolder = "inbox-b"\nhandover = "rename"\n'
)


def _alerts(s: Settings, words: str) -> list[str]:
    out = []
    for p in s.mail.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        if words in str(msg["Subject"]):
            out.append(str(msg["Subject"]))
    return out


def _status(s: Settings) -> str:
    return status_text(read_settings(s.root), datetime.datetime.now(datetime.UTC))


def test_a_broken_station_file_makes_the_station_wait_and_say_why_until_it_is_fixed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = make_station(tmp_path / "st")
    good = (s.root / "station.toml").read_text(encoding="utf-8")
    broken = good.replace("workers = 2", "workers = 2\nworkerz = 3")
    (s.root / "station.toml").write_text(broken, encoding="utf-8")
    # a heartbeat left by an earlier run must not be shown as the station's state
    s.heartbeat.write_text(json.dumps({"state": "stopped", "pid": 1, "updated_at": "2026-01-01T00:00:00+00:00"}))
    proc = start_watch(s.root)
    try:
        wait_until(lambda: (s.root / STATE_FILE).exists(), what="the waiting state written")
        time.sleep(1.0)
        assert proc.poll() is None, "the station waits instead of exiting"
        assert main(["status", str(s.root)]) == 2
        out, err = capsys.readouterr()
        assert out.splitlines()[0] == f"station in {s.root}: waiting to start"
        problem = f"{s.root / 'station.toml'}, line 4: unknown key 'workerz' in [station]."
        lines = out.splitlines()
        assert lines[1].startswith("  since ") and lines[1].endswith(f" (pid {proc.pid}): {problem}")
        assert lines[2:] == ["  Did you mean 'workers'?"]
        assert err == f"{problem}\n  Did you mean 'workers'?\n"
        (s.root / "station.toml").write_text(good, encoding="utf-8")
        wait_until(lambda: json.loads(s.heartbeat.read_text()).get("state") == "running",
                   what="the station started once the file was fixed")
        assert not (s.root / STATE_FILE).exists()
        drop(s.inboxes[0].folder, "a.csv", cycle_file("W-1"))
        wait_until(lambda: settled(s, 1), what="a file judged")
    finally:
        code = stop_watch(proc)
    assert code == 0
    assert proc.stderr is not None


def test_a_waiting_station_shows_its_reason_in_status_when_the_file_is_good_but_a_folder_is_gone(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    s.archive.rename(s.root / "archive-away")
    proc = start_watch(s.root)
    try:
        wait_until(lambda: (s.root / STATE_FILE).exists(), what="the waiting state written")
        report = _status(s)
        assert report.splitlines()[0] == "station test-station: waiting to start"
        assert f"[folders] archive: the folder {s.archive} does not exist" in report.splitlines()[1]
        (s.root / "archive-away").rename(s.archive)
        wait_until(lambda: "station test-station: running" in _status(s), what="started")
    finally:
        assert stop_watch(proc) == 0


def test_a_missing_inbox_is_a_trouble_of_its_own_and_the_other_inbox_goes_on(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st", station_toml(inboxes=TWO_INBOXES))
    hall_a, hall_b = (i.folder for i in s.inboxes)
    away = s.root / "hall-b-unmounted"
    hall_b.rename(away)  # missing at start: a share not mounted yet
    proc = start_watch(s.root)
    try:
        drop(hall_a, "a1.csv", cycle_file("MA-1"))
        wait_until(lambda: settled_in(s, hall_a, 1), what="hall-a judges while hall-b is missing")
        wait_until(lambda: any("inbox hall-b is missing" in t for t in heartbeat_troubles(s)),
                   what="the missing inbox shown")
        report = _status(s)
        assert "  trouble: inbox hall-b is missing (its folder " in report
        assert "hall-b (" in report and "the folder is not there" in report
        since = re.search(r"trouble: inbox hall-b is missing .* since (\S+)$", report, re.M)
        assert since is not None, report
        away.rename(hall_b)  # mounted: its files are taken
        drop(hall_b, "b1.csv", cycle_file("MB-1", seed=2))
        wait_until(lambda: settled(s, 2), what="hall-b taken once it is back")
        wait_until(lambda: not heartbeat_troubles(s), what="the trouble cleared")
        hall_b.rename(away)  # gone while running
        drop(hall_a, "a2.csv", cycle_file("MA-2", seed=3))
        wait_until(lambda: settled_in(s, hall_a, 3), what="hall-a goes on")
        wait_until(lambda: any("inbox hall-b is missing" in t for t in heartbeat_troubles(s)),
                   what="the missing inbox shown again")
        away.rename(hall_b)
        drop(hall_b, "b2.csv", cycle_file("MB-2", seed=4))
        wait_until(lambda: settled(s, 4), what="hall-b resumes")
        # gone twice within minutes (a share that flaps): one alert, not one per going
        wait_until(lambda: len(_alerts(s, "inbox hall-b is missing")) == 1, what="one alert")
        assert proc.poll() is None
    finally:
        code = stop_watch(proc)
    assert code == 0
    assert len(_alerts(s, "inbox hall-b is missing")) == 1
    # the alert says since when, as status does
    ((subject, body),) = _alert_texts(s, "inbox hall-b is missing")
    assert subject == f"formgate: ALERT — inbox hall-b is missing (its folder {hall_b} is not " \
        f"there) since {since[1]}", subject
    assert f"{hall_b}, is not there since {since[1]}: a share" in " ".join(body.split()), body


def _alert_texts(s: Settings, words: str) -> list[tuple[str, str]]:
    """(subject, body) of each alert whose subject holds ``words``."""
    out = []
    for p in s.mail.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        if words in str(msg["Subject"]):
            out.append((str(msg["Subject"]), msg.get_body().get_content()))  # type: ignore[union-attr]
    return out


def settled_in(s: Settings, inbox: Path, expected: int) -> bool:
    """``expected`` inputs final, and nothing waiting in ``inbox`` or work/."""
    if any(p for p in inbox.iterdir() if not p.name.startswith(".")):
        return False
    from pipeline.ledger.ledger import Ledger

    if not s.ledger.exists():
        return False
    with Ledger(s.ledger) as ledger:
        return len(ledger.inputs.in_state("archived", "quarantined", "duplicate")) >= expected
