"""The station's mail over a real SMTP conversation (aiosmtpd on loopback, STARTTLS with a test CA)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from tests.smtp_server import CERTS, free_port, smtp_server
from tests.station_kit import (
    REPO,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    station_toml,
    wait_until,
)

pytestmark = pytest.mark.slow


def smtp_table(port: int) -> str:
    return (
        f'[smtp]\nhost = "127.0.0.1"\nport = {port}\nsecurity = "starttls"\n'
        f'sender = "formgate@example.com"\ntimeout_s = 2.0\nca_file = "{CERTS / "ca.pem"}"\n'
    )


def counts(s) -> dict[str, int]:
    with Ledger(s.ledger) as ledger:
        return ledger.outbox.counts()


def test_mail_server_down_then_up_delivers_once_with_the_certificate(tmp_path: Path) -> None:
    port = free_port()
    s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(port)))
    with running(s):
        drop(s.inboxes[0].folder, "low.csv", cycle_file("M-1", capacity_ah=1.5))
        wait_until(lambda: settled(s, 1), what="cell judged")
        wait_until(lambda: _attempts(s) >= 1, what="a failed delivery attempt")
        assert counts(s).get("sent", 0) == 0
    with smtp_server(port=port, starttls=True) as server:
        out = subprocess.run(
            [sys.executable, "-m", "pipeline", "mail", "retry", str(s.root)],
            cwd=REPO,
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert out.returncode == 0, out.stderr
        assert out.stdout.startswith("sent 1, delayed 0, parked 0")
        assert len(server.received) == 1
        msg = server.received[0].parsed()
    assert msg["Subject"].startswith("formgate: FAIL cell M-1, lot LOT-A")
    pdf = next(
        part for part in msg.iter_attachments() if part.get_content_type() == "application/pdf"
    )
    assert pdf.get_content() == (s.certificates / "LOT-A" / "M-1.pdf").read_bytes()
    final = counts(s)
    assert (final.get("pending", 0), final.get("sent", 0), final.get("parked", 0)) == (0, 1, 0)


def _attempts(s) -> int:
    with Ledger(s.ledger) as ledger:
        return sum(m.attempts for m in ledger.outbox.in_state("pending"))


def test_permanent_refusal_parks_the_mail_and_raises_an_alert(tmp_path: Path) -> None:
    with smtp_server(
        starttls=True, rcpt_reply={"quality@example.com": "550 5.1.1 no such mailbox"}
    ) as server:
        s = make_station(tmp_path / "st", station_toml(smtp=smtp_table(server.port)))
        with running(s):
            drop(s.inboxes[0].folder, "low.csv", cycle_file("P-1", capacity_ah=1.5))
            wait_until(lambda: counts(s).get("parked", 0) >= 1, what="parked failure mail")
            wait_until(
                lambda: any(
                    "could not be delivered" in str(r.parsed()["Subject"]) for r in server.received
                ),
                what="alert delivered",
            )
    with Ledger(s.ledger) as ledger:
        parked = ledger.outbox.in_state("parked")
    assert [m.kind for m in parked] == ["failure"]
    assert "550" in (parked[0].reply or parked[0].last_error or "")
