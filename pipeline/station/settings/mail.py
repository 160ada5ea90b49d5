"""The [smtp] and [mail] tables of station.toml: their cross-key checks and their records.

Checks values that already passed the schema, reports into a Collector, and builds
SmtpConfig and MailRouting once the whole file is clean. Looking the password up is
files.py's job; sending is pipeline.mail's.
"""

from __future__ import annotations

import email.utils
import ipaddress
import re
from collections.abc import Mapping
from pathlib import Path
from typing import cast

from pipeline.mail.letters import check_addresses, message_id_for, sanitize_header
from pipeline.mail.smtp import Security
from pipeline.rulebook.tables import Collector, Values
from pipeline.rulebook.toml_lines import KeyPath
from pipeline.station.settings.folders import shown
from pipeline.station.settings.records import MailRouting, SmtpConfig
from pipeline.station.settings.schema import DEFAULT_PORTS, LOCAL_SENDER

_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# A base address for certificate links: a web server with a host, or a file URL.
_LINK_BASE = re.compile(r"(?:https?://[^/\s]+|file://)[^\s\x00-\x1f\x7f]*")


def _host_problem(host: str) -> str | None:
    if not host.strip():
        return "Give the mail server's name, or remove the line to write mails as .eml files."
    if any(c.isspace() or ord(c) < 32 for c in host) or "/" in host:
        return 'Give only the server\'s name or address, e.g. host = "mail.example.com".'
    if ":" in host:
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            return 'Give the port in its own key: host = "mail.example.com" and port = 587.'
    return None


def _check_sender(sender: str) -> bool:
    address = email.utils.parseaddr(sender)[1]
    if sanitize_header(sender, 300) != sender.strip() or not address:
        return False
    try:
        check_addresses([address])
    except ValueError:
        return False
    return True


def check_smtp(out: Collector, smtp: Values, routing: Values, password_written: bool) -> None:
    """The rules between the [smtp] keys (and the [mail] ones a mail server needs)."""
    path: KeyPath = ("smtp",)
    host, username = smtp.get("host"), smtp.get("username")
    env, file = smtp.get("password_env"), smtp.get("password_file")
    if isinstance(host, str) and (hint := _host_problem(host)) is not None:
        out.add(f"[smtp] host = {shown(host)} is not a server name", path, "host", hint)
    if username is not None and smtp.get("security") == "none":
        out.add(
            '[smtp] security = "none" with a username would send the password in clear text',
            path,
            "security",
            'Set security = "starttls" (port 587) or "tls" (port 465), or remove username '
            "for a relay that needs no log-in.",
        )
    if username is not None and env is None and file is None and not password_written:
        out.add(
            "[smtp] username is set but neither password_env nor password_file",
            path,
            "username",
            'Add password_env = "FORMGATE_SMTP_PASSWORD" (an environment variable that holds '
            'the password) or password_file = "smtp-password" (a file only the station\'s user '
            "can read).",
        )
    elif env is not None and file is not None:
        out.add(
            "[smtp] gives both password_env and password_file",
            path,
            "password_file",
            "Keep one of them, so that it is clear where the password comes from.",
        )
    for key, value in (("password_env", env), ("password_file", file)):
        if value is not None and username is None:
            out.add(
                f"[smtp] {key} is set but username is not",
                path,
                key,
                f'Add username = "formgate" (the log-in name), or remove {key} for a server '
                "that needs no log-in.",
            )
    if isinstance(env, str) and not _ENV_NAME.fullmatch(env):
        out.add(  # the value is not shown: it may be the password itself
            "[smtp] password_env is not an environment variable name",
            path,
            "password_env",
            "Give the variable's name (letters, digits and _), not its value, e.g. "
            'password_env = "FORMGATE_SMTP_PASSWORD".',
        )
    sender = smtp.get("sender")
    if isinstance(sender, str) and not _check_sender(sender):
        out.add(
            f"[smtp] sender = {shown(sender)} is not a mail address",
            path,
            "sender",
            'Write it as local@domain, optionally with a name: sender = "formgate@example.com" '
            'or "Formation line 1 <formgate@example.com>".',
        )
    if host is not None:
        if "sender" not in smtp:
            out.add(
                "[smtp] host is set but sender is not",
                path,
                "host",
                'Add sender = "formgate@example.com" with an address the mail server accepts as '
                "the From of the station's mails.",
            )
        if routing.get("failures_to") == ():
            out.add(
                "[smtp] host is set but [mail] failures_to is empty",
                path,
                "host",
                'Add failures_to = ["quality@example.com"] under [mail]: a failed cell may be '
                "dangerous, and its letter must reach someone at once.",
            )


def check_routing(out: Collector, routing: Values) -> None:
    """Every [mail] address and the Message-ID domain."""
    path: KeyPath = ("mail",)
    for key in ("failures_to", "holds_to", "digests_to", "alerts_to"):
        addresses = routing.get(key, ())
        assert isinstance(addresses, tuple)
        for address in addresses:
            try:
                check_addresses([address])
            except ValueError:
                several = any(c in address for c in ",; ")
                out.add(
                    f"[mail] {key} holds {shown(address)}, which is not a mail address",
                    path,
                    key,
                    f'Give each address as its own text: {key} = ["quality@example.com", '
                    '"line-lead@example.com"].'
                    if several and "@" in address
                    else 'Write it as local@domain, e.g. "quality@example.com", without a name '
                    "or angle brackets.",
                )
    url = routing.get("certificates_url")
    if isinstance(url, str) and not _LINK_BASE.fullmatch(url):
        out.add(
            f"[mail] certificates_url = {shown(url)} is not a web or file address",
            path,
            "certificates_url",
            'Give the address the certificates folder is shared at, starting with https://, '
            'http:// or file://, e.g. "https://quality.example.com/formgate/certificates/", '
            "or remove the line to show paths on the station.",
        )
    domain = routing.get("message_id_domain")
    if isinstance(domain, str):
        try:
            message_id_for("check", "check", domain=domain)
        except ValueError:
            out.add(
                f"[mail] message_id_domain = {shown(domain)} is not a domain name",
                path,
                "message_id_domain",
                'Give a domain such as "example.com" (letters, digits, dots and hyphens), or '
                "remove the line to use the sender's domain.",
            )


def smtp_config(smtp: Values, paths: Mapping[str, Path | None]) -> SmtpConfig:
    """The [smtp] record from checked values; ``paths``: its path keys joined to the root."""
    security = cast(Security, smtp["security"])
    sender = str(smtp.get("sender", LOCAL_SENDER)).strip()
    return SmtpConfig(
        host=cast("str | None", smtp.get("host")),
        port=int(cast(int, smtp.get("port", DEFAULT_PORTS[security]))),
        security=security,
        username=cast("str | None", smtp.get("username")),
        password_env=cast("str | None", smtp.get("password_env")),
        password_file=paths["password_file"],
        sender=sender,
        timeout_s=cast(float, smtp["timeout_s"]),
        ca_file=paths["ca_file"],
    )


def mail_routing(routing: Values, sender: str) -> MailRouting:
    """The [mail] record from checked values; the Message-ID domain defaults to ``sender``'s."""

    def addresses(key: str) -> tuple[str, ...]:
        return tuple(a.strip() for a in cast(tuple[str, ...], routing[key]))

    domain = routing.get("message_id_domain")
    url = routing.get("certificates_url")
    return MailRouting(
        failures_to=addresses("failures_to"),
        holds_to=addresses("holds_to"),
        digests_to=addresses("digests_to"),
        alerts_to=addresses("alerts_to"),
        digest_quiet_s=cast(float, routing["digest_quiet_s"]),
        outage_alert_s=cast(float, routing["outage_alert_s"]),
        certificates_url=str(url) if url is not None else None,
        domain=str(domain)
        if domain is not None
        else email.utils.parseaddr(sender)[1].rsplit("@", 1)[1],
    )
