"""A burst of files (a rack finishing together): every verdict and failure mail before the last
pass certificate, and a station killed while it renders loses no certificate.

A real station process (`formgate watch`), a real SMTP conversation (aiosmtpd on loopback,
STARTTLS with the test CA), a real SQLite ledger and real PDFs on disk.
"""

from __future__ import annotations

import email.utils
import hashlib
import os
import signal
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from tests.smtp_server import free_port, smtp_server
from tests.station_kit import (
    cycle_file,
    make_station,
    settled,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)
from tests.test_mail_senders import smtp_table

pytestmark = pytest.mark.slow

FILES = 200


def certificates_rendered(ledger_path: Path) -> tuple[int, int]:
    """(record certificates rendered, still waiting) as the ledger has them now."""
    if not ledger_path.exists():
        return 0, 0
    with Ledger(ledger_path) as ledger:
        rendered = ledger.db.one(
            "SELECT count(*) AS n FROM certificate_queue WHERE outcome = 'rendered'"
        )
        assert rendered is not None
        return int(rendered["n"]), ledger.certificates.backlog().waiting


def test_a_burst_has_every_verdict_and_failure_mail_before_its_last_pass_certificate_and_a_kill_loses_none(
    tmp_path: Path,
) -> None:
    port = free_port()
    s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(port, timeout_s=5.0)))
    staging = tmp_path / "rack"
    staging.mkdir()
    failing = {f"B-{n:03d}" for n in range(FILES) if n % 5 == 0}  # capacity 1.5 Ah: fails
    for n in range(FILES):
        cell = f"B-{n:03d}"
        data = cycle_file(cell, capacity_ah=1.5 if cell in failing else 2.0, seed=n)
        (staging / f"{cell}.csv").write_bytes(data)
    with smtp_server(port=port, starttls=True) as server:
        for path in sorted(staging.iterdir()):  # the whole rack hands over at once
            os.rename(path, s.inboxes[0].folder / path.name)
        first = start_watch(s.root)
        try:
            wait_until(
                lambda: certificates_rendered(s.ledger)[0] >= 20, timeout_s=300,
                what="the first certificates rendered",
            )
            rendered_before, waiting_before = certificates_rendered(s.ledger)
        finally:
            first.send_signal(signal.SIGKILL)  # mid-render: no chance to tidy up
            stop_watch(first)
        assert waiting_before > 0, "the kill came after the last certificate: nothing was tested"
        second = start_watch(s.root)
        try:
            wait_until(lambda: settled(s, FILES), timeout_s=600, what="every file and certificate")
            wait_until(
                lambda: _pending_mail(s.ledger) == 0, timeout_s=120, what="every letter sent"
            )
        finally:
            assert stop_watch(second) == 0
        received = list(server.received)

    with Ledger(s.ledger) as ledger:
        results = [r for r in ledger.results.recent(10 * FILES) if r.regrade_id is None]
        assert len(results) == FILES
        assert {r.cell_id for r in results if r.verdict == "fail"} == failing
        # no certificate lost: each is on disk with the bytes recorded as published
        for r in results:
            assert r.pdf_path is not None
            data = Path(r.pdf_path).read_bytes()
            assert data.startswith(b"%PDF-")
            published = ledger.published.by_path(os.path.abspath(r.pdf_path))
            assert published is not None and published.sha256 == hashlib.sha256(data).hexdigest()
            assert ledger.certificates.outcome(r.id)[0] == "rendered"
        verdicts = ledger.db.one(
            "SELECT max(published_at) AS t FROM published WHERE kind = 'result'"
        )["t"]
        last_pass = ledger.db.one(
            "SELECT max(p.published_at) AS t FROM published p JOIN results r ON r.id = p.result_id "
            "WHERE p.kind = 'certificate' AND r.verdict = 'pass'"
        )["t"]
        failure_mails = list(ledger.db.rows(
            "SELECT message_id, sent_at FROM outbox WHERE kind = 'failure' ORDER BY id"
        ))
    # every verdict out before the last pass certificate (both runs: times on one clock, UTC)
    assert verdicts < last_pass
    assert len(failure_mails) == len(failing)
    assert all(m["sent_at"] is not None and m["sent_at"] < last_pass for m in failure_mails)
    # each failure mailed with its certificate attached (at least once: a kill between the
    # server's acceptance and the ledger's note may send the one letter in hand again)
    mailed = [r.parsed() for r in received if r.parsed()["X-Formgate-Kind"] == "failure"]
    ids = [m["Message-ID"] for m in mailed]
    assert set(ids) == {m["message_id"] for m in failure_mails}
    assert len(ids) - len(set(ids)) <= 1
    for message in mailed:
        (attachment,) = list(message.iter_attachments())
        assert attachment.get_content().startswith(b"%PDF-")
        assert email.utils.parsedate_to_datetime(message["Date"]) is not None
    print(f"killed with {rendered_before} certificate(s) rendered, {waiting_before} waiting")


def _pending_mail(ledger_path: Path) -> int:
    with Ledger(ledger_path) as ledger:
        return ledger.outbox.counts()["pending"]
