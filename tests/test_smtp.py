"""Sending mail: real SMTP conversations on loopback, verified TLS, .eml files, backoff."""

from __future__ import annotations

import email
import email.policy
import ssl
from email.message import EmailMessage
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from pipeline.mail.letters import build_message, failure_letter
from pipeline.mail.smtp import SmtpSettings, eml_file_name, next_attempt_delay_s, send, write_eml
from tests.smtp_server import CA_FILE, HOST, OTHER_CA_FILE, free_port, silent_server, smtp_server
from tests.test_mail import SENDER, TO, WHEN, make_pdf, make_result


def settings(port: int, **options: Any) -> SmtpSettings:
    values: dict[str, Any] = {
        "host": HOST,
        "port": port,
        "sender": SENDER,
        "security": "none",
        "timeout_s": 5.0,
    }
    values.update(options)
    return SmtpSettings(**values)


def failure_mail(tmp_path: Path, **result_options: Any) -> tuple[EmailMessage, bytes]:
    """A failure mail with a real PDF certificate attached, and the PDF's bytes."""
    pdf_path = tmp_path / "certificates" / "DEMO-LOT-01" / "DEMO-0007.pdf"
    pdf = make_pdf(pdf_path)
    letter = failure_letter(make_result(**result_options), str(pdf_path), TO, station="line-1")
    return build_message(letter, sender=SENDER, date=WHEN), pdf


def attachment_bytes(message: EmailMessage) -> bytes:
    [attachment] = list(message.iter_attachments())
    assert attachment.get_content_type() == "application/pdf"
    content = attachment.get_content()
    assert isinstance(content, bytes)
    return content


def test_local_relay_receives_the_failure_mail_and_its_pdf_intact(tmp_path: Path) -> None:
    message, pdf = failure_mail(tmp_path)
    with smtp_server() as server:
        result = send(message, settings(server.port))
    assert (result.outcome, result.reply, result.refused) == (
        "sent",
        "250 2.0.0 accepted as TEST-QUEUE-1",
        (),
    )
    [mail] = server.received
    assert mail.mail_from == "station@example.com"
    assert mail.rcpt_tos == TO
    parsed = mail.parsed()
    assert parsed["Message-ID"] == message["Message-ID"]
    assert parsed["Subject"] == str(message["Subject"])
    assert attachment_bytes(parsed) == pdf


def test_starttls_with_the_site_ca_in_ca_file_sends(tmp_path: Path) -> None:
    message, pdf = failure_mail(tmp_path)
    with smtp_server(starttls=True) as server:
        result = send(message, settings(server.port, security="starttls", ca_file=str(CA_FILE)))
    assert result.outcome == "sent", result.reply
    [mail] = server.received
    assert attachment_bytes(mail.parsed()) == pdf


def test_implicit_tls_with_the_site_ca_sends(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server(implicit_tls=True) as server:
        result = send(message, settings(server.port, security="tls", ca_file=str(CA_FILE)))
    assert result.outcome == "sent", result.reply
    assert len(server.received) == 1


@pytest.mark.parametrize("ca_file", [None, str(OTHER_CA_FILE)], ids=["system-CAs", "other-CA"])
def test_starttls_with_a_certificate_from_an_unknown_ca_is_refused(
    tmp_path: Path, ca_file: str | None
) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server(starttls=True) as server:
        result = send(message, settings(server.port, security="starttls", ca_file=ca_file))
    assert result.outcome == "park"
    assert result.reply == (
        f"the TLS certificate of {HOST}:{server.port} could not be verified (unable to get local "
        "issuer certificate). If the server uses a site CA, set ca_file to that CA's "
        "certificate file; verification is never switched off"
    )
    assert server.received == []


def test_implicit_tls_with_a_certificate_from_an_unknown_ca_is_refused(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server(implicit_tls=True) as server:
        result = send(message, settings(server.port, security="tls"))
    assert result.outcome == "park"
    assert "could not be verified" in result.reply
    assert server.received == []


def test_a_server_without_starttls_gets_nothing_in_clear_text(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server() as server:
        result = send(message, settings(server.port, security="starttls", ca_file=str(CA_FILE)))
    assert result.outcome == "park"
    assert result.reply == (
        f"{HOST}:{server.port} does not offer STARTTLS: refusing to send in clear text. Use a "
        "server that offers it, or security = 'tls' for one that speaks TLS from the start"
    )
    assert server.received == []


def test_mail_server_down_then_up(tmp_path: Path) -> None:
    message, pdf = failure_mail(tmp_path)
    port = free_port()
    down = send(message, settings(port))
    assert down.outcome == "retry"
    assert down.reply == f"cannot connect to {HOST}:{port}: [Errno 111] Connection refused"
    with smtp_server(port=port) as server:
        up = send(message, settings(port))
    assert up.outcome == "sent"
    [mail] = server.received
    assert attachment_bytes(mail.parsed()) == pdf


def test_a_server_that_never_answers_is_retried_after_the_timeout(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with silent_server() as port:
        result = send(message, settings(port, timeout_s=1.0))
    assert result.outcome == "retry"
    assert result.reply.startswith(f"no answer from {HOST}:{port} within 1 s")


@pytest.mark.parametrize(
    ("rcpt_reply", "data_reply", "outcome", "reply"),
    [
        (
            "451 4.3.0 mailbox busy, try later",
            None,
            "retry",
            "every recipient refused: quality@example.com: 451 4.3.0 mailbox busy, try later; "
            "line-lead@example.org: 451 4.3.0 mailbox busy, try later",
        ),
        (
            "550 5.1.1 no such mailbox",
            None,
            "park",
            "every recipient refused: quality@example.com: 550 5.1.1 no such mailbox; "
            "line-lead@example.org: 550 5.1.1 no such mailbox",
        ),
        (None, "451 4.3.0 queue full, try later", "retry", "451 4.3.0 queue full, try later"),
        (
            None,
            "554 5.6.0 message refused by policy",
            "park",
            "554 5.6.0 message refused by policy",
        ),
    ],
    ids=["rcpt-451", "rcpt-550", "data-451", "data-554"],
)
def test_4xx_is_retried_and_5xx_is_parked_with_the_server_reply(
    tmp_path: Path, rcpt_reply: str | None, data_reply: str | None, outcome: str, reply: str
) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server(rcpt_reply=rcpt_reply, data_reply=data_reply) as server:
        result = send(message, settings(server.port))
    assert (result.outcome, result.reply) == (outcome, reply)
    assert server.received == []


def test_mixed_4xx_and_5xx_refusals_are_retried(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    replies = {
        "quality@example.com": "550 5.1.1 no such mailbox",
        "line-lead@example.org": "452 4.2.2 mailbox full",
    }
    with smtp_server(rcpt_reply=replies) as server:
        result = send(message, settings(server.port))
    assert result.outcome == "retry"


def test_a_partly_refused_mail_is_sent_and_names_who_did_not_get_it(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server(rcpt_reply={"line-lead@example.org": "550 5.1.1 no such mailbox"}) as server:
        result = send(message, settings(server.port))
    assert result.outcome == "sent"
    assert result.refused == ("line-lead@example.org: 550 5.1.1 no such mailbox",)
    [mail] = server.received
    assert mail.rcpt_tos == ("quality@example.com",)


@pytest.mark.parametrize(
    ("cell_id", "shown"),
    [
        ("X\r\nBcc: victim@example.com", "X Bcc: victim@example.com"),
        (
            "=?utf-8?q?X=0D=0ABcc=3A_victim@example.com?=",
            "= ?utf-8?q?X=0D=0ABcc=3A_victim@example.com?=",
        ),
    ],
    ids=["line-break", "encoded-word"],
)
def test_header_injection_from_a_cell_id_reaches_only_the_intended_recipients(
    tmp_path: Path, cell_id: str, shown: str
) -> None:
    message, _ = failure_mail(tmp_path, cell_id=cell_id)
    with smtp_server() as server:
        result = send(message, settings(server.port))
    assert result.outcome == "sent"
    [mail] = server.received
    assert mail.rcpt_tos == TO
    parsed = mail.parsed()
    assert "Bcc" not in parsed
    assert not any(line.lower().startswith(b"bcc:") for line in mail.content.splitlines())
    subject = str(parsed["Subject"])
    assert subject.startswith(f"formgate: FAIL cell {shown}, lot DEMO-LOT-01")
    assert "\r" not in subject and "\n" not in subject


def test_login_after_starttls(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    secure = {"security": "starttls", "ca_file": str(CA_FILE), "username": "station"}
    with smtp_server(starttls=True, login=("station", "right horse")) as server:
        good = send(message, settings(server.port, password="right horse", **secure))
        bad = send(message, settings(server.port, password="wrong", **secure))
    assert good.outcome == "sent", good.reply
    assert bad.outcome == "park", bad.reply
    assert bad.reply == "535 5.7.8 Authentication credentials invalid"
    assert len(server.received) == 1
    # smtplib tries each mechanism the server offers before it gives up.
    assert server.logins[0] == ("PLAIN", True)
    assert [ok for _, ok in server.logins[1:]] == [False, False]


def test_a_password_is_never_sent_in_clear_text(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    with smtp_server() as server:
        result = send(message, settings(server.port, username="station", password="secret"))
    assert result.outcome == "park"
    assert result.reply == (
        f"refusing to send the password for {HOST}:{server.port} in clear text: "
        "set security to 'starttls' or 'tls'"
    )
    assert server.received == []


def test_an_unreadable_ca_file_is_parked(tmp_path: Path) -> None:
    message, _ = failure_mail(tmp_path)
    missing = tmp_path / "site-ca.pem"
    result = send(message, settings(free_port(), security="starttls", ca_file=str(missing)))
    assert result.outcome == "park"
    assert result.reply.startswith(f"ca_file {missing} cannot be used: ")


def test_eml_mode_writes_one_file_per_message_id(tmp_path: Path) -> None:
    message, pdf = failure_mail(tmp_path)
    folder = tmp_path / "outbox"
    eml = SmtpSettings(host=None, sender=SENDER, eml_folder=folder)
    first = send(message, eml)
    second = send(message, eml)
    [path] = list(folder.iterdir())
    assert path.name == eml_file_name(str(message["Message-ID"]))
    assert path.name == str(message["Message-ID"])[1:-1] + ".eml"
    assert (first.outcome, first.reply) == ("sent", f"written to {path}")
    assert (second.outcome, second.reply) == ("sent", f"already written to {path}")
    parsed = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
    assert isinstance(parsed, EmailMessage)
    assert parsed["Message-ID"] == message["Message-ID"]
    assert parsed["To"] == ", ".join(TO)
    assert attachment_bytes(parsed) == pdf


def test_eml_file_names_stay_inside_the_folder() -> None:
    assert eml_file_name("<abc@station.example.com>") == "abc@station.example.com.eml"
    hostile = eml_file_name("<../../etc/passwd>")
    assert "/" not in hostile and not hostile.startswith(".")
    assert eml_file_name("<../../etc/passwd>") == hostile


def test_write_eml_needs_a_message_id(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="needs a Message-ID"):
        write_eml(EmailMessage(), tmp_path)


def test_settings_check_their_values_and_hide_the_password(tmp_path: Path) -> None:
    shown = repr(SmtpSettings(host="mail.example.com", sender=SENDER, password="s3cret"))
    assert "s3cret" not in shown
    with pytest.raises(ValueError, match="eml_folder must name the folder"):
        SmtpSettings(host=None, sender=SENDER)
    with pytest.raises(ValueError, match="security must be one of"):
        SmtpSettings(host="mail.example.com", sender=SENDER, security="ssl")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="port must be 1 to 65535"):
        SmtpSettings(host="mail.example.com", sender=SENDER, port=0)
    with pytest.raises(ValueError, match="timeout_s must be positive"):
        SmtpSettings(host="mail.example.com", sender=SENDER, timeout_s=0)


def test_backoff_doubles_from_the_base_and_stops_at_the_cap() -> None:
    assert [next_attempt_delay_s(n) for n in range(9)] == [
        0.0,
        30.0,
        60.0,
        120.0,
        240.0,
        480.0,
        960.0,
        1920.0,
        3600.0,
    ]
    assert next_attempt_delay_s(10_000) == 3600.0
    assert next_attempt_delay_s(3, base_s=1.0, cap_s=10.0) == 4.0
    with pytest.raises(ValueError):
        next_attempt_delay_s(-1)


@given(st.integers(min_value=0, max_value=10_000), st.floats(0.1, 1e3), st.floats(0.1, 1e5))
def test_backoff_never_shrinks_and_never_passes_the_cap(
    attempts: int, base_s: float, cap_s: float
) -> None:
    now = next_attempt_delay_s(attempts, base_s=base_s, cap_s=cap_s)
    later = next_attempt_delay_s(attempts + 1, base_s=base_s, cap_s=cap_s)
    assert 0.0 <= now <= later <= cap_s


def test_the_client_context_verifies_certificates_and_names() -> None:
    # What send() builds: the library default, which must check chain and host name.
    context = ssl.create_default_context(cafile=str(CA_FILE))
    assert context.verify_mode is ssl.CERT_REQUIRED
    assert context.check_hostname is True
