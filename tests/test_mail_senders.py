"""Several senders on one outbox, and a mail server that is down: real station, real SMTP, real CLI.

The station's mail thread and `formgate mail retry` runs (in threads of the test, each
with its own ledger connection, or in processes of their own) send against a slow
aiosmtpd server on loopback; the Message-IDs are counted where the mail arrives. A
server that is not there shows in `formgate status` and raises one alert.
"""

from __future__ import annotations

import collections
import datetime
import multiprocessing
import os
import re
import signal
import sqlite3
import threading
import time
from pathlib import Path

import pytest

from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from pipeline.station.mailer import new_owner, owner_is_gone
from pipeline.station.settings import Settings
from pipeline.station.status import status_text
from tests.smtp_server import CERTS, free_port, smtp_server
from tests.station_kit import cycle_file, drop, make_station, running, station_toml, wait_until

pytestmark = pytest.mark.slow

CELLS = 12


def smtp_table(port: int, *, timeout_s: float = 10.0, security: str = "starttls") -> str:
    return (
        f'[smtp]\nhost = "127.0.0.1"\nport = {port}\nsecurity = "{security}"\n'
        f'sender = "formgate@example.com"\ntimeout_s = {timeout_s}\n'
        f'ca_file = "{CERTS / "ca.pem"}"\n'
    )


def outbox_states(s: Settings) -> dict[str, int]:
    with Ledger(s.ledger) as ledger:
        return ledger.outbox.counts()


def sent_ids(s: Settings) -> list[str]:
    with Ledger(s.ledger) as ledger:
        return [m.message_id for m in ledger.outbox.in_state("sent")]


def test_the_station_and_two_retry_loops_beside_it_send_every_message_exactly_once(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with smtp_server(starttls=True, data_delay_s=0.4) as server:
        s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(server.port)))
        codes: list[int] = []
        done = threading.Event()

        def retry_loop() -> None:
            while not done.is_set():
                codes.append(main(["mail", "retry", str(s.root)]))
                time.sleep(0.05)

        loops = [threading.Thread(target=retry_loop, name=f"retry-{n}") for n in range(2)]
        with running(s):
            for loop in loops:
                loop.start()
            try:
                for n in range(CELLS):
                    drop(s.inboxes[0].folder, f"low-{n}.csv",
                         cycle_file(f"S-{n}", capacity_ah=1.5, seed=n))
                wait_until(
                    lambda: len(sent_ids(s)) >= CELLS and not outbox_states(s)["pending"],
                    timeout_s=180, what="every letter sent",
                )
                time.sleep(1.0)  # a second copy of a letter would arrive by now
            finally:
                done.set()
                for loop in loops:
                    loop.join(120)
        arrived = [str(r.parsed()["Message-ID"]) for r in server.received]
    twice = {mid: n for mid, n in collections.Counter(arrived).items() if n > 1}
    assert not twice, f"sent more than once: {twice}"
    assert sorted(arrived) == sorted(sent_ids(s))
    with Ledger(s.ledger) as ledger:
        failures = [m for m in ledger.outbox.in_state("sent") if m.kind == "failure"]
        assert len(failures) == CELLS and all(m.attempts == 1 for m in failures)
        assert ledger.outbox.being_sent(datetime.datetime.now(datetime.UTC)) == []
    # a retry that met mail the station (or the other loop) was sending did not call it a failure
    assert codes and set(codes) == {0}
    out = capsys.readouterr().out
    by_retries = sum(int(n) for n in re.findall(r"^sent (\d+), delayed 0, parked 0", out, re.M))
    assert by_retries <= CELLS


def _claim_and_die(ledger_path: str, mail_id: int) -> None:
    """In a child process: claim a mail for an hour, then die as a SIGKILL leaves a sender."""
    now = datetime.datetime.now(datetime.UTC)
    with Ledger(Path(ledger_path)) as ledger:
        claimed = ledger.outbox.claim(
            mail_id, owner=new_owner(), now=now, until=now + datetime.timedelta(hours=1)
        )
        assert claimed is not None
    os.kill(os.getpid(), signal.SIGKILL)


def test_a_claim_of_a_killed_sender_is_taken_over_and_a_live_one_is_left_alone(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.mail.letters import Letter

    with smtp_server() as server:
        s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(server.port, security="none").replace(
            f'ca_file = "{CERTS / "ca.pem"}"\n', "")))
        now = datetime.datetime.now(datetime.UTC)
        with Ledger(s.ledger, now=now) as ledger:
            dead, live = (
                ledger.outbox.queue(
                    Letter("alert", f"<{name}@demo.example>", ("maintenance@example.com",),
                           f"alert {name}", "text"),
                    now=now,
                )
                for name in ("dead", "live")
            )
            far = "other-host.example/pid:[1]/4242/1/abc"  # a sender on another machine
            assert ledger.outbox.claim(live, owner=far, now=now,
                                       until=now + datetime.timedelta(hours=1))
        child = multiprocessing.get_context("spawn").Process(
            target=_claim_and_die, args=(str(s.ledger), dead)
        )
        child.start()
        child.join(60)
        assert child.exitcode == -signal.SIGKILL
        with Ledger(s.ledger) as ledger:
            holder = ledger.outbox.get(dead).claimed_by  # type: ignore[union-attr]
        assert holder is not None and owner_is_gone(holder) and not owner_is_gone(far)
        assert not owner_is_gone(new_owner())  # this very process

        assert main(["mail", "retry", str(s.root)]) == 0
        out = capsys.readouterr().out
        assert [str(r.parsed()["Message-ID"]) for r in server.received] == ["<dead@demo.example>"]
    assert out.splitlines() == [
        "sent 1, delayed 0, parked 0; outbox now 1 pending, 0 parked",
        "  1 mail(s) were being sent by another sender at the time (the station, or another "
        "formgate mail retry): left to it, not counted here",
    ]


def _status(s: Settings) -> str:
    return status_text(s, datetime.datetime.now(datetime.UTC))


def outage_alerts(s: Settings) -> list[str]:
    with Ledger(s.ledger) as ledger:
        return [
            m.message_id
            for state in ("pending", "sent", "parked")
            for m in ledger.outbox.in_state(state)
            if m.kind == "alert" and "mail cannot be delivered since" in m.subject
        ]


def test_a_mail_server_that_is_down_shows_in_status_alerts_once_and_clears_when_it_is_back(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    port = free_port()  # nothing listens: every connection is refused
    toml = station_toml(smtp=smtp_table(port, timeout_s=2.0)).replace(
        "digest_quiet_s = 1.0\n", "digest_quiet_s = 1.0\noutage_alert_s = 3.0\n"
    )
    s = make_station(tmp_path / "st", toml)
    assert s.routing.outage_alert_s == 3.0
    line = f"  trouble: mail cannot be delivered: cannot connect to 127.0.0.1:{port}: "
    with running(s):
        drop(s.inboxes[0].folder, "low.csv", cycle_file("D-1", capacity_ah=1.5))
        wait_until(lambda: line in _status(s), what="the trouble line in formgate status")
        assert main(["status", str(s.root)]) == 0
        shown = [x for x in capsys.readouterr().out.splitlines() if x.startswith(line)]
        assert len(shown) == 1 and re.search(r"refused since \d{4}-\d\d-\d\dT\d\d:\d\d:\d\d", shown[0])
        wait_until(lambda: outage_alerts(s), timeout_s=30, what="the outage alert")
        time.sleep(6.0)  # past the mail thread's next turn: still one alert
        (alert_id,) = outage_alerts(s)
        with Ledger(s.ledger) as ledger:
            alert = ledger.outbox.by_message_id(alert_id)
            noted = ledger.facts.state("mail_trouble")
        assert alert is not None and noted is not None
        since = datetime.datetime.fromisoformat(
            re.search(r"since (\S+)", alert.subject)[1]  # type: ignore[index]
        )
        assert (alert.created_at - since).total_seconds() >= 3.0
        assert "How this alert reaches you: it waits in the same outbox" in alert.body_text
        assert "NOBODY IS TOLD BY MAIL OF A FAILED OR HELD CELL" in alert.body_text
        copies = list(s.mail.glob("*.eml"))  # the copy written at once, while mail is down
        assert len(copies) == 1 and alert_id in copies[0].read_text(encoding="utf-8")
        assert str(copies[0]) in alert.body_text

        with smtp_server(port=port, starttls=True) as server:
            assert main(["mail", "retry", str(s.root)]) == 0
            arrived = [str(r.parsed()["Message-ID"]) for r in server.received]
        assert line not in _status(s) and "trouble: mail" not in _status(s)
    assert arrived.count(alert_id) == 1 and len(arrived) == len(set(arrived)) == 2
    assert outage_alerts(s) == [alert_id]
    assert outbox_states(s)["pending"] == 0


def test_a_ledger_locked_past_its_busy_timeout_during_a_send_does_not_send_a_letter_twice(
    tmp_path: Path,
) -> None:
    """Another connection takes the write lock while the server has the message and keeps it
    past the sender's busy timeout: the sent letter cannot be recorded at once. The sender
    keeps it, claims nothing new until it is recorded, and never sends it again."""
    from pipeline.mail.letters import Letter
    from pipeline.mail.smtp import SmtpSettings
    from pipeline.station.mailer import Sender, deliver_due

    path = tmp_path / "ledger.sqlite"
    now = datetime.datetime.now(datetime.UTC)
    with Ledger(path, now=now) as ledger:
        for n in (1, 2):
            ledger.outbox.queue(
                Letter("alert", f"<locked-{n}@demo.example>", ("maintenance@example.com",),
                       f"alert {n}", "text"),
                now=now,
            )
    locker = sqlite3.connect(path, isolation_level=None, check_same_thread=False, timeout=10)

    def lock_once() -> None:  # as the first message arrives, before the server answers it
        if not locked:
            locker.execute("BEGIN IMMEDIATE")
            locked.append(True)

    locked: list[bool] = []
    try:
        with smtp_server(on_data=lock_once) as server:
            smtp = SmtpSettings(host="127.0.0.1", sender="formgate@example.com",
                                port=server.port, security="none", timeout_s=10.0)
            sender = Sender()
            with Ledger(path) as ledger:
                ledger.db.conn.execute("PRAGMA busy_timeout = 200")
                for _turn in range(3):  # as the mail thread does: a turn, an error, another turn
                    with pytest.raises(sqlite3.OperationalError, match="locked"):
                        deliver_due(ledger, smtp, station="demo", alerts_to=(), sender=sender)
                # nothing new was claimed while a sent letter was not recorded, and the sent
                # one keeps its claim (another sender would send it again at once otherwise)
                assert len(server.received) == 1 and locked
                (first,) = sender.unrecorded
                held = ledger.outbox.get(first)
                assert held is not None and (held.state, held.claimed_by) == ("pending",
                                                                              sender.owner)
                # the station's log and `mail retry` say it in the same words
                sent = sender.unrecorded[first]
                assert sent.row.claimed_until is not None
                assert sent.words() == (
                    "mail <locked-1@demo.example> went out but the ledger could not record it; "
                    f"its claim stays until {sent.row.claimed_until}, so no other sender sends it "
                    "before: alert 1"
                )
                locker.execute("ROLLBACK")  # the other process lets go of the ledger
                for _turn in range(2):
                    deliver_due(ledger, smtp, station="demo", alerts_to=(), sender=sender)
                rows = ledger.outbox.in_state("sent")
            arrived = collections.Counter(str(r.parsed()["Message-ID"]) for r in server.received)
    finally:
        locker.close()
    assert arrived == {"<locked-1@demo.example>": 1, "<locked-2@demo.example>": 1}
    assert [(m.message_id, m.attempts, m.claimed_by) for m in rows] == [
        ("<locked-1@demo.example>", 1, None), ("<locked-2@demo.example>", 1, None)
    ]


def test_mail_retry_beside_a_ledger_another_process_keeps_locked_says_so_and_sends_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.ledger import connection
    from pipeline.mail.letters import Letter

    with smtp_server() as server:
        s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(server.port, security="none")
                                                        .replace(f'ca_file = "{CERTS / "ca.pem"}"\n', "")))
        now = datetime.datetime.now(datetime.UTC)
        with Ledger(s.ledger, now=now) as ledger:
            ledger.outbox.queue(Letter("alert", "<held@demo.example>", ("maintenance@example.com",),
                                       "alert", "text"), now=now)
        monkeypatch.setattr(connection, "BUSY_TIMEOUT_MS", 200)
        holder = sqlite3.connect(s.ledger, isolation_level=None)
        holder.execute("BEGIN IMMEDIATE")
        try:
            assert main(["mail", "retry", str(s.root)]) == 2
        finally:
            holder.execute("ROLLBACK")
            holder.close()
        out, err = capsys.readouterr()
        assert server.received == [] and out == ""
        assert err == (f"the ledger {s.ledger} could not be written (database is locked); nothing "
                       "more was sent. Try again when the other process has let go of it\n")
        assert main(["mail", "retry", str(s.root)]) == 0  # the lock gone, it goes once
        assert [str(r.parsed()["Message-ID"]) for r in server.received] == ["<held@demo.example>"]
