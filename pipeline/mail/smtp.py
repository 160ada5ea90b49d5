"""Sends one built mail over SMTP with verified TLS, or writes it as an ``.eml`` file.

The edge of the mail path: a message and settings in, an outcome out: ``sent``,
``retry`` (a transient failure: 4xx reply, no connection, no answer in time) or
``park`` (a permanent one: 5xx reply, an untrusted certificate, a server that will
not encrypt). Nothing here raises for a mail server's behaviour; deciding when to
try again and whom to alert is the station loop's job, keeping the outbox the ledger's.
"""

from __future__ import annotations

import contextlib
import email.policy
import email.utils
import os
import pathlib
import re
import smtplib
import ssl
import tempfile
from dataclasses import dataclass, field
from email.message import EmailMessage
from typing import Literal

from pipeline.mail.letters import sanitize_header
from pipeline.names import safe_name

Security = Literal["starttls", "tls", "none"]
Outcome = Literal["sent", "retry", "park"]
SECURITY: tuple[str, ...] = ("starttls", "tls", "none")


@dataclass(frozen=True, slots=True, kw_only=True)
class SmtpSettings:
    """How to reach the mail server. ``host=None`` writes ``.eml`` files to ``eml_folder``.

    ``security``: ``starttls`` (upgrade on port 587, required), ``tls`` (TLS from the
    first byte, port 465) or ``none`` (clear text, for a relay on the same machine;
    refused together with a password). ``ca_file`` adds a site CA to the system's
    trusted ones; certificate and host name are always verified. ``password`` comes
    from an environment variable or a credential file, never from station.toml, and is
    left out of ``repr``. ``timeout_s`` bounds each network operation, in seconds.
    """

    host: str | None
    sender: str
    port: int = 587
    security: Security = "starttls"
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    timeout_s: float = 30.0
    ca_file: str | None = None
    eml_folder: pathlib.Path | None = None

    def __post_init__(self) -> None:
        if self.security not in SECURITY:
            raise ValueError(f"security must be one of {SECURITY}, not {self.security!r}")
        if self.host is None and self.eml_folder is None:
            raise ValueError("with no SMTP host, eml_folder must name the folder for .eml files")
        if not 0 < self.port < 65536:
            raise ValueError(f"port must be 1 to 65535, not {self.port}")
        if not self.timeout_s > 0:
            raise ValueError(f"timeout_s must be positive, not {self.timeout_s}")


@dataclass(frozen=True, slots=True)
class SendResult:
    """What became of one attempt.

    ``reply`` is the server's code and text, or what went wrong, on one line.
    ``refused`` lists recipients the server refused while it accepted others
    (``address: code text``): the mail went out, but not to them.
    """

    outcome: Outcome
    reply: str
    refused: tuple[str, ...] = ()


def next_attempt_delay_s(attempts: int, *, base_s: float = 30.0, cap_s: float = 3600.0) -> float:
    """Seconds to wait after ``attempts`` failed attempts: doubling from ``base_s``, capped.

    No jitter: one station talks to one server, and a fixed schedule is easy to read
    in the ledger.

    >>> [next_attempt_delay_s(n) for n in (0, 1, 2, 3, 8, 50)]
    [0.0, 30.0, 60.0, 120.0, 3600.0, 3600.0]
    """
    if attempts < 0:
        raise ValueError(f"attempts must not be negative, not {attempts}")
    if attempts == 0:
        return 0.0
    # 2.0 ** 1100 overflows a float; any exponent past 60 is far beyond the cap anyway.
    return float(min(cap_s, base_s * 2.0 ** min(attempts - 1, 60)))


def eml_file_name(message_id: str) -> str:
    """The ``.eml`` file name for a Message-ID: the same id always gives the same name.

    >>> eml_file_name("<1d15cc87@station-1.example.com>")
    '1d15cc87@station-1.example.com.eml'
    """
    core = message_id.strip().removeprefix("<").removesuffix(">")
    if re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._@-]{0,199}", core):
        return f"{core}.eml"
    return f"{safe_name(core)}.eml"


def write_eml(message: EmailMessage, folder: pathlib.Path) -> tuple[pathlib.Path, bool]:
    """Write ``message`` as ``<folder>/<message-id>.eml``; return the path and whether it is new.

    An existing file for the same Message-ID is left as it is (the mail counts as
    sent once). The file is written to a temporary name, fsynced and renamed, so a
    reader of the folder never sees half a mail.
    """
    message_id = message.get("Message-ID")
    if not message_id:
        raise ValueError("a mail to be written as .eml needs a Message-ID")
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / eml_file_name(str(message_id))
    if path.exists():
        return path, False
    data = message.as_bytes(policy=email.policy.SMTP)  # CRLF lines, as on the wire
    fd, temp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(temp_name, 0o644)
        os.replace(temp_name, path)
    except BaseException:
        pathlib.Path(temp_name).unlink(missing_ok=True)
        raise
    dir_fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)
    return path, True


def _text(reply: bytes | str) -> str:
    text = reply.decode("utf-8", "replace") if isinstance(reply, bytes) else reply
    return sanitize_header(text, 500)


def _by_code(code: int, text: str) -> SendResult:
    """5xx is permanent (park); 4xx and anything odd are worth another try (RFC 5321 4.2.1)."""
    return SendResult("park" if 500 <= code < 600 else "retry", _text(f"{code} {text}"))


class _Refused(Exception):
    """Every recipient was refused: carries the result to return."""

    def __init__(self, result: SendResult) -> None:
        super().__init__(result.reply)
        self.result = result


def _recipients(message: EmailMessage) -> list[str]:
    pairs = email.utils.getaddresses(
        [str(v) for v in message.get_all("To", []) + message.get_all("Cc", [])]
    )
    addresses = [address for _, address in pairs if address]
    if not addresses:
        raise ValueError("the mail has no recipient in To or Cc")
    return addresses


def _deliver(client: smtplib.SMTP, message: EmailMessage, settings: SmtpSettings) -> SendResult:
    """MAIL, RCPT per recipient, DATA; SMTP errors propagate as smtplib's exceptions."""
    sender = email.utils.parseaddr(settings.sender)[1]
    code, text = client.mail(sender)
    if code != 250:
        raise smtplib.SMTPSenderRefused(code, text, sender)
    refused: dict[str, tuple[int, bytes]] = {}
    recipients = _recipients(message)
    for address in recipients:
        code, text = client.rcpt(address)
        if code not in (250, 251):
            refused[address] = (code, text)
    if len(refused) == len(recipients):
        # The refusal is what counts; the connection is closed next anyway.
        with contextlib.suppress(smtplib.SMTPException, OSError):
            client.rset()
        codes = [code for code, _ in refused.values()]
        outcome: Outcome = "park" if all(500 <= c < 600 for c in codes) else "retry"
        reply = "; ".join(f"{a}: {c} {_text(t)}" for a, (c, t) in refused.items())
        raise _Refused(SendResult(outcome, _text(f"every recipient refused: {reply}")))
    code, text = client.data(message.as_bytes(policy=email.policy.SMTP))
    if code != 250:  # smtplib raises for a refused DATA command, but returns the final reply
        raise smtplib.SMTPDataError(code, text)
    return SendResult(
        "sent",
        _text(f"{code} {_text(text)}"),
        tuple(_text(f"{a}: {c} {_text(t)}") for a, (c, t) in refused.items()),
    )


def _converse(settings: SmtpSettings, message: EmailMessage, context: ssl.SSLContext) -> SendResult:
    host = str(settings.host)
    where = f"{host}:{settings.port}"
    client: smtplib.SMTP
    if settings.security == "tls":
        client = smtplib.SMTP_SSL(host, settings.port, timeout=settings.timeout_s, context=context)
    else:
        client = smtplib.SMTP(host, settings.port, timeout=settings.timeout_s)
    try:
        client.ehlo()
        if settings.security == "starttls":
            if not client.has_extn("starttls"):
                return SendResult(
                    "park",
                    f"{where} does not offer STARTTLS: refusing to send in "
                    "clear text. Use a server that offers it, or "
                    "security = 'tls' for one that speaks TLS from the start",
                )
            client.starttls(context=context)
            client.ehlo()
        if settings.username is not None:
            try:
                client.login(settings.username, settings.password or "")
            except (smtplib.SMTPResponseException, smtplib.SMTPServerDisconnected):
                raise  # classified by code or as a lost connection
            except smtplib.SMTPException as exc:  # no AUTH offered, or no method in common
                return SendResult("park", _text(f"cannot log in to {where}: {exc}"))
        return _deliver(client, message, settings)
    finally:
        # The mail is accepted or not by now: a failing QUIT changes nothing.
        with contextlib.suppress(smtplib.SMTPException, OSError):
            client.quit()
        client.close()


def send(message: EmailMessage, settings: SmtpSettings) -> SendResult:
    """Send ``message`` (or write it as ``.eml`` when ``settings.host`` is None).

    Never raises for the server's behaviour; the outcome says what to do next.
    """
    if settings.host is None:
        assert settings.eml_folder is not None  # SmtpSettings guarantees it
        path, new = write_eml(message, settings.eml_folder)
        return SendResult("sent", f"{'written to' if new else 'already written to'} {path}")
    where = f"{settings.host}:{settings.port}"
    if settings.security == "none" and settings.password is not None:
        return SendResult(
            "park",
            f"refusing to send the password for {where} in clear text: "
            "set security to 'starttls' or 'tls'",
        )
    try:
        # Verifies the certificate chain and the host name; ca_file adds a site CA.
        context = ssl.create_default_context(cafile=settings.ca_file)
    except (OSError, ssl.SSLError) as exc:
        return SendResult("park", _text(f"ca_file {settings.ca_file} cannot be used: {exc}"))
    try:
        return _converse(settings, message, context)
    except _Refused as exc:
        return exc.result
    except smtplib.SMTPResponseException as exc:  # 4xx/5xx at greeting, MAIL, DATA or AUTH
        return _by_code(exc.smtp_code, _text(exc.smtp_error))
    except smtplib.SMTPNotSupportedError as exc:
        return SendResult("park", _text(f"{where}: {exc}"))
    except smtplib.SMTPServerDisconnected as exc:
        if "timed out" in str(exc):
            return SendResult(
                "retry", _text(f"no answer from {where} within {settings.timeout_s:g} s ({exc})")
            )
        return SendResult("retry", _text(f"{where} closed the connection: {exc}"))
    except smtplib.SMTPException as exc:
        return SendResult("retry", _text(f"{where}: {exc}"))
    except ssl.SSLCertVerificationError as exc:
        return SendResult(
            "park",
            _text(
                f"the TLS certificate of {where} could not be verified "
                f"({exc.verify_message or exc}). If the server uses a site CA, set ca_file to that "
                "CA's certificate file; verification is never switched off"
            ),
        )
    except ssl.SSLError as exc:
        return SendResult(
            "retry",
            _text(f"TLS with {where} failed: {exc}. If this persists, check port and security"),
        )
    except TimeoutError as exc:
        return SendResult(
            "retry", _text(f"no answer from {where} within {settings.timeout_s:g} s ({exc})")
        )
    except OSError as exc:  # refused, unreachable, name not resolved
        return SendResult("retry", _text(f"cannot connect to {where}: {exc}"))
