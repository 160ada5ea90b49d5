"""Real mail servers on loopback for the mail tests: aiosmtpd in a thread, or a silent socket.

Each helper is a context manager that stops everything it started on exit, so no
thread or socket outlives its test. The TLS files are the test-only ones in certs/.
"""

from __future__ import annotations

import asyncio
import email
import email.policy
import socket
import ssl
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from email.message import EmailMessage
from pathlib import Path
from typing import Any, cast

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword

CERTS = Path(__file__).resolve().parent / "certs"
CA_FILE = CERTS / "ca.pem"
OTHER_CA_FILE = CERTS / "other-ca.pem"
HOST = "127.0.0.1"


@dataclass(frozen=True)
class Received:
    """One mail as the server took it: envelope and the exact bytes after DATA."""

    mail_from: str
    rcpt_tos: tuple[str, ...]
    content: bytes

    def parsed(self) -> EmailMessage:
        parsed = email.message_from_bytes(self.content, policy=email.policy.default)
        return cast(EmailMessage, parsed)


class RecordingHandler:
    """Accepts and records mail, or answers RCPT / DATA with a fixed reply such as 451 or 550.

    ``rcpt_reply`` may map single addresses to a reply; the others are accepted.
    ``data_delay_s``: a slow server, that takes this long over each message before it
    answers DATA (other conversations go on meanwhile). ``on_data`` is called (in the
    server's thread) as each message arrives, before the server answers it: a test does
    something while the sender waits for the reply.
    """

    def __init__(
        self,
        rcpt_reply: str | Mapping[str, str] | None = None,
        data_reply: str | None = None,
        data_delay_s: float = 0.0,
        on_data: Callable[[], None] | None = None,
    ) -> None:
        self.rcpt_reply = rcpt_reply
        self.data_reply = data_reply
        self.data_delay_s = data_delay_s
        self.on_data = on_data
        self.received: list[Received] = []

    async def handle_RCPT(
        self, server: Any, session: Any, envelope: Any, address: str, rcpt_options: list[str]
    ) -> str:
        reply = self.rcpt_reply
        if isinstance(reply, Mapping):
            reply = reply.get(address)
        if reply:
            return reply
        envelope.rcpt_tos.append(address)
        return "250 2.1.5 OK"

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        if self.on_data is not None:
            self.on_data()
        if self.data_delay_s:
            await asyncio.sleep(self.data_delay_s)
        if self.data_reply:
            return self.data_reply
        self.received.append(
            Received(envelope.mail_from, tuple(envelope.rcpt_tos), bytes(envelope.original_content))
        )
        return "250 2.0.0 accepted as TEST-QUEUE-1"


@dataclass
class Server:
    host: str
    port: int
    handler: RecordingHandler
    logins: list[tuple[str, bool]] = field(default_factory=list)

    @property
    def received(self) -> list[Received]:
        return self.handler.received


def free_port() -> int:
    """A loopback port nothing listens on right now (bound once by the kernel, then released)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((HOST, 0))
        return int(probe.getsockname()[1])


def server_tls_context() -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(CERTS / "server.pem", CERTS / "server.key")
    return context


@contextmanager
def smtp_server(
    *,
    port: int | None = None,
    rcpt_reply: str | Mapping[str, str] | None = None,
    data_reply: str | None = None,
    starttls: bool = False,
    implicit_tls: bool = False,
    login: tuple[str, str] | None = None,
    data_delay_s: float = 0.0,
    on_data: Callable[[], None] | None = None,
) -> Iterator[Server]:
    """An aiosmtpd server on 127.0.0.1 that records what it accepts.

    ``starttls`` offers STARTTLS with the test server certificate and refuses mail
    before it; ``implicit_tls`` speaks TLS from the first byte; ``login`` requires
    AUTH with that user name and password (offered only after TLS); ``data_delay_s``
    makes it slow and ``on_data`` runs as each message arrives (see RecordingHandler).
    """
    handler = RecordingHandler(rcpt_reply, data_reply, data_delay_s, on_data)
    server = Server(HOST, port or free_port(), handler)
    options: dict[str, Any] = {}
    if starttls:
        options.update(tls_context=server_tls_context(), require_starttls=True)
    if implicit_tls:
        options.update(ssl_context=server_tls_context())
    if login is not None:

        def authenticate(
            srv: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any
        ) -> AuthResult:
            ok = (
                isinstance(auth_data, LoginPassword)
                and (auth_data.login.decode(), auth_data.password.decode()) == login
            )
            server.logins.append((mechanism, ok))
            return AuthResult(success=ok, handled=False)  # aiosmtpd then sends 235 or 535

        options.update(authenticator=authenticate, auth_required=True)
    controller = Controller(
        handler, hostname=HOST, port=server.port, server_hostname="localhost", **options
    )
    controller.start()
    try:
        yield server
    finally:
        controller.stop()


@contextmanager
def silent_server() -> Iterator[int]:
    """A port that takes connections and never says a word; yields the port.

    The kernel completes the TCP handshake for a listening socket, so a client is
    connected at once and then waits for a greeting that never comes. No thread.
    """
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        listener.bind((HOST, 0))
        listener.listen(8)
        yield int(listener.getsockname()[1])
    finally:
        listener.close()
