"""Claims on the outbox, on real SQLite files: one sender per mail, outcomes by the owner only.

Each sender has a connection of its own (a process or thread of its own in the station),
so the tests open the ledger once per sender.
"""

from __future__ import annotations

import datetime
import multiprocessing
import sqlite3
import tempfile
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, rule

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrate import applied_migrations, migrate
from pipeline.ledger.migrations import MIGRATIONS
from pipeline.ledger.outbox import NotClaimed
from pipeline.mail.letters import Letter
from pipeline.model import SourceRef

T0 = datetime.datetime(2026, 3, 2, 6, 0, tzinfo=datetime.UTC)


def minutes(n: float) -> datetime.datetime:
    return T0 + datetime.timedelta(minutes=n)


def alert(n: int) -> Letter:
    return Letter("alert", f"<claim-{n}@demo.example>", ("maintenance@example.com",), f"alert {n}",
                  "text")


def test_a_second_sender_cannot_claim_a_held_mail_until_the_lease_is_over(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as a, Ledger(path, now=T0) as b:
        mail_id = a.outbox.queue(alert(1), now=T0)
        held = a.outbox.claim(mail_id, owner="A", now=T0, until=minutes(10))
        assert held is not None and (held.claimed_by, held.claimed_until) == ("A", minutes(10))
        assert b.outbox.claim(mail_id, owner="B", now=minutes(9.99), until=minutes(20)) is None
        seen = b.outbox.get(mail_id)
        assert seen is not None and seen.claimed_by == "A"
        # the lease is over: the claim is taken over, and its first owner may no longer record
        taken = b.outbox.claim(mail_id, owner="B", now=minutes(10), until=minutes(20))
        assert taken is not None and taken.claimed_by == "B"
        with pytest.raises(NotClaimed, match=r"is claimed by B, not by A: only the sender"):
            a.outbox.mark_sent(mail_id, owner="A", now=minutes(11), reply="250 late")
        b.outbox.mark_sent(mail_id, owner="B", now=minutes(12), reply="250 ok")
        sent = a.outbox.get(mail_id)
    assert sent is not None
    assert (sent.state, sent.attempts, sent.reply, sent.claimed_by, sent.claimed_until) == (
        "sent", 1, "250 ok", None, None
    )


def test_an_outcome_or_release_by_a_sender_that_holds_no_claim_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as a, Ledger(path, now=T0) as b:
        mail_id = a.outbox.queue(alert(1), now=T0)
        with pytest.raises(NotClaimed, match="is claimed by no sender, not by B"):
            b.outbox.mark_sent(mail_id, owner="B", now=T0, reply="250")
        assert a.outbox.claim(mail_id, owner="A", now=T0, until=minutes(10)) is not None
        for step in (
            lambda: b.outbox.mark_sent(mail_id, owner="B", now=T0, reply="250"),
            lambda: b.outbox.mark_retry(
                mail_id, owner="B", now=T0, next_attempt_at=minutes(1), error="421"
            ),
            lambda: b.outbox.park(mail_id, owner="B", now=T0, reply="550"),
        ):
            with pytest.raises(NotClaimed, match="is claimed by A, not by B"):
                step()
        assert not b.outbox.release(mail_id, owner="B")
        row = a.outbox.get(mail_id)
        assert row is not None and (row.state, row.attempts, row.claimed_by) == ("pending", 0, "A")
        # the owner's outcome clears the claim; a retry is not due, so nobody claims it
        a.outbox.mark_retry(mail_id, owner="A", now=T0, next_attempt_at=minutes(5), error="421")
        assert b.outbox.claim(mail_id, owner="B", now=minutes(1), until=minutes(9)) is None
        again = b.outbox.claim(mail_id, owner="B", now=minutes(5), until=minutes(9))
        assert again is not None and again.attempts == 1
        assert b.outbox.release(mail_id, owner="B")
        released = a.outbox.get(mail_id)
        assert released is not None and released.claimed_by is None


def test_a_claim_of_a_dead_owner_is_taken_from_it_by_name_and_only_pending_mail_is_claimed(
    tmp_path: Path,
) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        first = ledger.outbox.queue(alert(1), now=T0)
        assert ledger.outbox.claim(first, owner="A", now=T0, until=minutes(10)) is not None
        # the caller knows A has died: it names A and takes the claim before the lease is over
        assert ledger.outbox.claim(first, owner="B", now=T0, until=minutes(10), take_from="C") is None
        taken = ledger.outbox.claim(first, owner="B", now=T0, until=minutes(10), take_from="A")
        assert taken is not None and taken.claimed_by == "B"
        assert [m.id for m in ledger.outbox.being_sent(minutes(9))] == [first]
        assert ledger.outbox.being_sent(minutes(10)) == []
        ledger.outbox.park(first, owner="B", now=T0, reply="550 no such user")
        ledger.outbox.park(first, owner="B", now=T0, reply="550 no such user")  # again: no-op
        assert ledger.outbox.claim(first, owner="B", now=minutes(1), until=minutes(10)) is None
        later = ledger.outbox.queue(alert(2), now=minutes(30))
        assert ledger.outbox.claim(later, owner="B", now=minutes(29), until=minutes(40)) is None
        with pytest.raises(ValueError, match="lease must end after now"):
            ledger.outbox.claim(later, owner="B", now=minutes(30), until=minutes(30))
        with pytest.raises(ValueError, match="needs an owner"):
            ledger.outbox.claim(later, owner="", now=minutes(30), until=minutes(31))
        with pytest.raises(sqlite3.IntegrityError):  # a claim never outlives its pending state
            ledger.db.conn.execute("UPDATE outbox SET claimed_by = 'X', claimed_until = ? "
                                   "WHERE id = ?", (minutes(50).isoformat(), first))


def _claim_every_mail(path: str, owner: str, ids: list[int], start: Any, out: Any) -> None:
    """In a child process: wait for the start, then try to claim every mail as ``owner``."""
    now = datetime.datetime.now(datetime.UTC)
    with Ledger(Path(path)) as ledger:
        start.wait(30)
        won = [
            i for i in ids
            if ledger.outbox.claim(i, owner=owner, now=now, until=now + datetime.timedelta(hours=1))
        ]
    out.put((owner, won))


def test_processes_racing_for_the_same_mails_claim_each_exactly_once(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        ids = [ledger.outbox.queue(alert(n), now=T0) for n in range(40)]
    ctx = multiprocessing.get_context("spawn")
    start, out = ctx.Event(), ctx.Queue()
    children = [
        ctx.Process(target=_claim_every_mail, args=(str(path), f"P{n}", ids, start, out))
        for n in range(4)
    ]
    for child in children:
        child.start()
    start.set()
    results = dict(out.get(timeout=120) for _ in children)
    for child in children:
        child.join(60)
        assert child.exitcode == 0
    won = [i for claimed in results.values() for i in claimed]
    assert sorted(won) == ids  # every mail claimed, and by one process only
    with Ledger(path, now=T0) as ledger:
        for owner, claimed in results.items():
            for i in claimed:
                row = ledger.outbox.get(i)
                assert row is not None and row.claimed_by == owner


def test_a_ledger_of_schema_4_gains_the_claim_columns_and_keeps_its_mail(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        migrate(conn, MIGRATIONS[:4], applied_at=T0.isoformat(), where=SourceRef(str(path)))
        conn.execute(
            "INSERT INTO outbox (kind, message_id, recipients, subject, body_text, state, "
            "next_attempt_at, created_at) VALUES ('alert', '<old@demo.example>', "
            "'[\"maintenance@example.com\"]', 'old', 'text', 'pending', ?, ?)",
            (T0.isoformat(timespec="microseconds"), T0.isoformat(timespec="microseconds")),
        )
    finally:
        conn.close()
    with Ledger(path, now=T0) as ledger:
        assert "0005_outbox_claims" in [name for name, _ in applied_migrations(ledger.db.conn)]
        (row,) = ledger.outbox.due(minutes(1))
        assert (row.message_id, row.claimed_by, row.claimed_until) == ("<old@demo.example>", None,
                                                                       None)
        assert ledger.outbox.claim(row.id, owner="A", now=minutes(1), until=minutes(2))
        assert ledger.integrity_ok()


# ---- any interleaving of several senders -----------------------------------------------------

OWNERS = ("A", "B", "C")
MAILS = 3


class ClaimMachine(RuleBasedStateMachine):
    """Senders on connections of their own claim, send, retry, park and release at random
    while the clock moves on. Each sender remembers the claims it believes it holds; the
    ledger must answer exactly as a model of the rules says, and no two senders may ever
    believe they hold a live claim on one mail."""

    def __init__(self) -> None:
        super().__init__()
        self.dir = tempfile.TemporaryDirectory()
        path = Path(self.dir.name) / "ledger.sqlite"
        self.senders = {owner: Ledger(path, now=T0) for owner in OWNERS}
        self.ids = [self.senders["A"].outbox.queue(alert(n), now=T0) for n in range(MAILS)]
        self.clock = 0.0
        # the model: state, when due, holder and lease end, per mail id
        self.state = dict.fromkeys(self.ids, "pending")
        self.due_at = dict.fromkeys(self.ids, 0.0)
        self.holder: dict[int, tuple[str, float] | None] = dict.fromkeys(self.ids)
        self.believes: dict[str, dict[int, float]] = {owner: {} for owner in OWNERS}

    def teardown(self) -> None:
        for ledger in self.senders.values():
            ledger.close()
        self.dir.cleanup()

    @rule(step=st.sampled_from([0.0, 0.5, 1.0, 3.0, 7.0]))
    def time_passes(self, step: float) -> None:
        self.clock += step

    @rule(owner=st.sampled_from(OWNERS), n=st.integers(0, MAILS - 1),
          lease=st.sampled_from([1.0, 2.0, 5.0]))
    def claim(self, owner: str, n: int, lease: float) -> None:
        mail_id, now = self.ids[n], self.clock
        held = self.holder[mail_id]
        expected = (
            self.state[mail_id] == "pending"
            and self.due_at[mail_id] <= now
            and (held is None or held[1] <= now or held[0] == owner)
        )
        row = self.senders[owner].outbox.claim(
            mail_id, owner=owner, now=minutes(now), until=minutes(now + lease)
        )
        assert (row is not None) == expected
        if row is not None:
            assert row.claimed_by == owner
            self.holder[mail_id] = (owner, now + lease)
            self.believes[owner][mail_id] = now + lease

    @rule(owner=st.sampled_from(OWNERS), n=st.integers(0, MAILS - 1),
          outcome=st.sampled_from(["sent", "retry", "park", "release"]))
    def finish(self, owner: str, n: int, outcome: str) -> None:
        mail_id, now = self.ids[n], self.clock
        outbox = self.senders[owner].outbox
        held = self.holder[mail_id]
        mine = held is not None and held[0] == owner
        if outcome == "release":
            assert outbox.release(mail_id, owner=owner) == mine
        elif self.state[mail_id] in ("sent", "parked"):
            if outcome in ("sent", "park") and self.state[mail_id] == {"sent": "sent", "park": "parked"}[outcome]:
                self._outcome(outbox, mail_id, owner, outcome)  # a repeated final outcome: no-op
                return
            with pytest.raises(ValueError, match="not pending"):
                self._outcome(outbox, mail_id, owner, outcome)
            return
        elif not mine:
            with pytest.raises(NotClaimed):
                self._outcome(outbox, mail_id, owner, outcome)
            self.believes[owner].pop(mail_id, None)  # refused: this sender knows it lost the claim
            return
        else:
            self._outcome(outbox, mail_id, owner, outcome)
            self.state[mail_id] = {"sent": "sent", "retry": "pending", "park": "parked"}[outcome]
            if outcome == "retry":
                self.due_at[mail_id] = now + 2.0
        if mine:
            self.holder[mail_id] = None
        self.believes[owner].pop(mail_id, None)

    def _outcome(self, outbox: Any, mail_id: int, owner: str, outcome: str) -> None:
        now = minutes(self.clock)
        if outcome == "sent":
            outbox.mark_sent(mail_id, owner=owner, now=now, reply="250 ok")
        elif outcome == "retry":
            outbox.mark_retry(mail_id, owner=owner, now=now,
                              next_attempt_at=minutes(self.clock + 2.0), error="421 later")
        else:
            outbox.park(mail_id, owner=owner, now=now, reply="550 no")

    @invariant()
    def no_two_senders_hold_one_live_claim(self) -> None:
        for mail_id in self.ids:
            live = [o for o in OWNERS if self.believes[o].get(mail_id, -1.0) > self.clock]
            assert len(live) <= 1, f"mail {mail_id} claimed by {live} at once"

    @invariant()
    def the_ledger_agrees_with_the_model(self) -> None:
        for mail_id in self.ids:
            row = self.senders["B"].outbox.get(mail_id)
            assert row is not None and row.state == self.state[mail_id]
            held = self.holder[mail_id]
            assert row.claimed_by == (held[0] if held else None)
            assert (row.claimed_by is None) or row.state == "pending"


TestClaimMachine = ClaimMachine.TestCase
TestClaimMachine.settings = settings(
    max_examples=60,
    stateful_step_count=40,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
