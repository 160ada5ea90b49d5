"""The ledger's certificate queue: the order certificates are rendered in, and the letters that
wait for the certificate they attach or the file they link (a real SQLite ledger on disk)."""

from __future__ import annotations

import dataclasses
import datetime
import json
from collections.abc import Iterator
from pathlib import Path

import pytest

from pipeline.ledger.certificates import FAILED, HELD, PASSED
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.outbox import LINK_WAIT_S
from tests.test_ledger import CHECKS, LOT, T0, claim, finish, mail, sha


def at(seconds: float) -> datetime.datetime:
    return T0 + datetime.timedelta(seconds=seconds)


def judged(
    ledger: Ledger, name: str, verdict: str, *, when: float = 0.0, letters: tuple = (),
    priority: int | None = None,
) -> int:
    """Record a judged file whose certificate is promised (the station's way since the queue)."""
    row, _ = claim(ledger, name, f"{name}.csv", at=at(when))
    cell = name.upper()
    result_id = ledger.results.record(
        row.id, cell_id=cell, lot=LOT, verdict=verdict, hazards=(),
        result_json=json.dumps({"verdict": verdict, "cell": cell}), checks=CHECKS,
        rule_set_name="demo_lfp", rule_set_revision="3", rule_set_sha256=sha("rules"),
        analysed_at=at(when), json_path=f"results/{LOT}/{cell}.json",
        pdf_path=f"certificates/{LOT}/{cell}.pdf", mails=letters,
        certificate_priority={"fail": FAILED, "hold": HELD, "pass": PASSED}[verdict]
        if priority is None else priority,
    )
    finish(ledger, row.id, at(when))
    return result_id


@pytest.fixture
def ledger(tmp_path: Path) -> Iterator[Ledger]:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as opened:
        yield opened


def test_failed_cells_come_first_then_held_then_passed_each_oldest_first(ledger: Ledger) -> None:
    p1 = judged(ledger, "p1", "pass", when=0)
    f1 = judged(ledger, "f1", "fail", when=5)
    h1 = judged(ledger, "h1", "hold", when=1)
    f2 = judged(ledger, "f2", "fail", when=2)
    p2 = judged(ledger, "p2", "pass", when=3)
    order = [w.result_id for w in ledger.certificates.waiting(10)]
    assert order == [f2, f1, h1, p1, p2]
    urgent = [w.result_id for w in ledger.certificates.waiting(10, most_priority=HELD)]
    assert urgent == [f2, f1, h1]
    backlog = ledger.certificates.backlog()
    assert (backlog.waiting, backlog.oldest, backlog.failed) == (5, at(0), 0)
    ledger.certificates.rendered(f2, now=at(10))
    assert ledger.certificates.outcome(f2) == ("rendered", at(10))
    assert ledger.certificates.backlog().waiting == 4
    assert not ledger.certificates.is_waiting(f2) and ledger.certificates.is_waiting(f1)


def test_a_result_recorded_with_its_certificate_is_not_queued(ledger: Ledger) -> None:
    row, _ = claim(ledger, "x", "x.csv")
    result_id = ledger.results.record(
        row.id, cell_id="X", lot=LOT, verdict="pass", hazards=(), result_json="{}",
        checks=CHECKS, rule_set_name="demo_lfp", rule_set_revision="3",
        rule_set_sha256=sha("rules"), analysed_at=T0, json_path="r/X.json",
        pdf_path="c/X.pdf", mails=(),
    )
    assert ledger.certificates.outcome(result_id) == (None, None)
    assert ledger.certificates.backlog().waiting == 0


def test_a_failure_letter_waits_for_the_certificate_it_attaches(ledger: Ledger) -> None:
    letter = dataclasses.replace(mail("<f1@x.example>"), attachment_path="certificates/F1.pdf")
    f1 = judged(ledger, "f1", "fail", letters=(letter,))
    assert ledger.outbox.due(at(60)) == []  # published, but its certificate is not rendered yet
    ledger.certificates.rendered(f1, now=at(2))
    (due,) = ledger.outbox.due(at(60))
    assert due.message_id == "<f1@x.example>" and due.attachment_path == "certificates/F1.pdf"


def test_a_certificate_given_up_lets_its_letter_go_without_it_and_say_why(ledger: Ledger) -> None:
    letter = dataclasses.replace(mail("<f2@x.example>"), attachment_path="certificates/F2.pdf")
    f2 = judged(ledger, "f2", "fail", letters=(letter,))
    ledger.certificates.give_up(f2, "MemoryError: out of memory\nmore", now=at(3))
    (due,) = ledger.outbox.due(at(60))
    assert due.attachment_path is None
    assert due.body_text.startswith("text\n\nThe certificate of this record could not be rendered")
    assert "(MemoryError: out of memory)" in due.body_text
    assert ledger.certificates.outcome(f2) == ("failed", at(3))
    assert ledger.certificates.backlog().failed == 1
    ledger.certificates.give_up(f2, "again", now=at(4))  # done once: nothing changes
    assert ledger.outbox.due(at(60))[0].body_text == due.body_text


def test_renders_lost_are_counted(ledger: Ledger) -> None:
    p1 = judged(ledger, "p1", "pass")
    assert [ledger.certificates.lost(p1) for _ in range(3)] == [1, 2, 3]
    assert ledger.certificates.waiting(1)[0].losses == 3


def test_a_letter_that_links_a_file_waits_until_it_is_published_after_the_letter(
    ledger: Ledger, tmp_path: Path
) -> None:
    link = str(tmp_path / "certificates" / LOT / "C1~cell.pdf")
    # the cell's certificate of an earlier decision was published before the letter
    ledger.published.record(path=link, sha256=sha("old"), kind="cell certificate", now=at(-5))
    letter = dataclasses.replace(mail("<c1@x.example>", kind="hold"), waits_for=link)
    ledger.outbox.queue(letter, now=at(0))
    assert ledger.outbox.due(at(1)) == []
    ledger.published.record(path=link, sha256=sha("new"), kind="cell certificate", now=at(2))
    (due,) = ledger.outbox.due(at(3))
    assert due.waits_for == link


def test_a_letter_waits_for_a_linked_file_at_most_its_longest_wait(ledger: Ledger) -> None:
    letter = dataclasses.replace(mail("<c2@x.example>", kind="hold"), waits_for="/nowhere/C2.pdf")
    ledger.outbox.queue(letter, now=at(0))
    assert ledger.outbox.due(at(LINK_WAIT_S - 1)) == []
    assert [m.message_id for m in ledger.outbox.due(at(LINK_WAIT_S))] == ["<c2@x.example>"]


def test_status_counts_the_letters_that_wait_for_a_certificate(ledger: Ledger) -> None:
    letter = dataclasses.replace(mail("<f3@x.example>"), attachment_path="certificates/F3.pdf")
    f3 = judged(ledger, "f3", "fail", letters=(letter,))
    linked = dataclasses.replace(mail("<c3@x.example>", kind="hold"), waits_for="/nowhere/C3.pdf")
    ledger.outbox.queue(linked, now=at(0))
    ledger.outbox.queue(mail("<a1@x.example>", kind="alert"), now=at(0))
    assert ledger.outbox.counts()["pending"] == 3
    assert ledger.outbox.waiting_for_files(at(10)) == 2
    ledger.certificates.rendered(f3, now=at(11))
    assert ledger.outbox.waiting_for_files(at(12)) == 1
    assert ledger.outbox.waiting_for_files(at(LINK_WAIT_S + 1)) == 0  # waited its longest
