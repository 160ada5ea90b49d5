"""Composes formgate's mails: a letter per failed or held cell and station alerts, and what
every letter shares.

Pure apart from one read: values in, a :class:`Letter` or an
``email.message.EmailMessage`` out; no clock (the date is passed in) and no
network. ``build_message`` is the one function that reads a file, the certificate
it attaches. Every header value built from data-file text goes through
:func:`sanitize_header`, so a cell id cannot add a header or a recipient. Talking
SMTP and writing ``.eml`` files is smtp.py's job; the outbox is the ledger's.
The other letters (a lot's digest in digest.py, a cell's decision in cell_letters.py, a
review's in review_letters.py, a regrade's in regrade_letter.py) build on the pieces here,
so that all of them share one header cleaning and one wording of verdicts, cautions and
traceability.
"""

from __future__ import annotations

import datetime
import email.policy
import email.utils
import hashlib
import pathlib
import re
import textwrap
import unicodedata
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from email.message import EmailMessage
from typing import Literal

from pipeline.acceptance.results import CellResult, CheckResult, Outcome, VerdictKind
from pipeline.acceptance.rules import Hazard
from pipeline.errors import FormgateError
from pipeline.judge.evaluate import decision_line
from pipeline.judge.quantities import format_uncertain, format_window, precision
from pipeline.model import SourceRef
from pipeline.report.hazards import CAUTIONS, DATA_CHECK_NOTICE, HANDLING, general_caution

LetterKind = Literal["failure", "hold", "digest", "alert"]
KINDS: tuple[str, ...] = ("failure", "hold", "digest", "alert")
WIDTH = 72  # plain-text line length most mail readers show unwrapped -- common practice
ID_LEN = 64  # longest cell id or lot shown in a subject, so the hazard words always fit
# A plain ASCII addr-spec: enough for site mailboxes, and nothing that could end a header.
_ADDRESS = re.compile(r"[A-Za-z0-9.!#$%&'*+/=?^_`{|}~-]+@[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?")
_DOMAIN = re.compile(r"[A-Za-z0-9](?:[A-Za-z0-9.-]{0,251}[A-Za-z0-9])?")


class MailError(FormgateError):
    """A mail that cannot be built, e.g. because its certificate file is missing."""


@dataclass(frozen=True, slots=True)
class Letter:
    """One mail before it has a sender and a date: what the outbox keeps.

    ``message_id`` is deterministic (see :func:`message_id_for`), so a resend of the
    same letter carries the same Message-ID. ``attachment_path`` names a PDF read by
    :func:`build_message`. ``lot`` is shown in an ``X-Formgate-Lot`` header.
    ``waits_for``: the path of a file the body links (a cell's own certificate); the
    outbox holds the letter until that file is published.
    """

    kind: LetterKind
    message_id: str
    recipients: tuple[str, ...]
    subject: str
    body_text: str
    attachment_path: str | None = None
    lot: str | None = None
    waits_for: str | None = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"mail kind must be one of {KINDS}, got {self.kind!r}")
        object.__setattr__(self, "recipients", check_addresses(self.recipients))
        if not re.fullmatch(r"<[^<>@\s]+@[^<>@\s]+>", self.message_id) or "=?" in self.message_id:
            raise ValueError(f"not a Message-ID: {self.message_id!r}")
        if sanitize_header(self.subject, max_len=len(self.subject) or 1) != self.subject:
            raise ValueError(f"subject is not a clean single line: {self.subject!r}")


def sanitize_header(value: str, max_len: int = 200) -> str:
    """``value`` as one clean header line of at most ``max_len`` characters.

    Line breaks, tabs and other control characters become spaces; invisible format
    characters (bidirectional overrides, zero-width spaces) are dropped, as they could
    make a subject read differently from what it says; runs of white space collapse to
    one space; ``=?`` becomes ``= ?`` so that no encoded word can smuggle a line break
    in; a value that is too long is cut and ends in an ellipsis.

    >>> sanitize_header("X\\r\\nBcc: victim@example.com")
    'X Bcc: victim@example.com'
    >>> sanitize_header("DEMO-0001\\u202e", max_len=5)
    'DEMO…'
    """
    if max_len < 1:
        raise ValueError("max_len must be at least 1")
    kept = []
    for char in value:
        category = unicodedata.category(char)
        if category in ("Cc", "Zl", "Zp") or char.isspace():
            kept.append(" ")
        elif category == "Cs":
            kept.append("\N{REPLACEMENT CHARACTER}")  # a lone surrogate cannot be encoded
        elif category != "Cf":
            kept.append(char)
    # "=?" opens an RFC 2047 encoded word, which the email package decodes when the header is
    # set; before Python 3.11.10 an encoded line break then came out as a real one, i.e. a new
    # header (CPython issue gh-121650). Breaking the "=?" keeps any Python version safe.
    text = " ".join("".join(kept).split()).replace("=?", "= ?")
    if len(text) > max_len:
        text = text[: max_len - 1].rstrip() + "\N{HORIZONTAL ELLIPSIS}"
    return text


def _clean_text(text: str) -> str:
    """Multi-line text with line breaks and spacing kept, every other control character gone."""
    kept = []
    for char in text.replace("\r\n", "\n").replace("\r", "\n").expandtabs(4):
        category = unicodedata.category(char)
        if char == "\n" or category in ("Zl", "Zp"):
            kept.append("\n")
        elif category == "Cc":
            kept.append(" ")
        elif category == "Cs":
            kept.append("\N{REPLACEMENT CHARACTER}")
        elif category != "Cf":
            kept.append(char)
    return "\n".join(line.rstrip() for line in "".join(kept).split("\n"))


def check_addresses(addresses: Iterable[str]) -> tuple[str, ...]:
    """The addresses as a tuple, each a plain ``local@domain``; ValueError if one is not.

    >>> check_addresses(["quality@example.com"])
    ('quality@example.com',)
    """
    result = tuple(a.strip() for a in addresses)
    if not result:
        raise ValueError("a letter needs at least one recipient")
    for address in result:
        if not _ADDRESS.fullmatch(address) or "=?" in address:
            raise ValueError(f"not a plain mail address (local@domain): {address!r}")
    return result


def message_id_for(kind: str, key: str, *, domain: str) -> str:
    """A Message-ID that depends only on ``kind``, ``key`` and ``domain``.

    For a cell letter the key is its input SHA-256 and its rule set SHA-256, so a
    rare resend of the same letter is recognisable as such by every mail reader.

    >>> message_id_for("failure", "ab:cd", domain="station-1.example.com")
    '<1d15cc8708b7715f55e9f8ea4cf7769e@station-1.example.com>'
    """
    if not kind or not key:
        raise ValueError("kind and key must not be empty")
    if not _DOMAIN.fullmatch(domain):
        raise ValueError(f"not a domain for a Message-ID: {domain!r}")
    digest = hashlib.sha256(f"formgate\n{kind}\n{key}".encode("utf-8", "surrogatepass"))
    return f"<{digest.hexdigest()[:32]}@{domain}>"


def _domain(station: str, domain: str | None) -> str:
    """The Message-ID domain: the one given, else one made from the station's name."""
    if domain is not None:
        return domain
    label = re.sub(r"[^a-z0-9-]+", "-", station.lower()).strip("-")[:63] or "station"
    # .invalid is reserved and never resolves (RFC 2606), so the id cannot collide with a real host.
    return f"{label}.formgate.invalid"


def _paragraph(text: str) -> str:
    return textwrap.fill(text, WIDTH, break_long_words=False, break_on_hyphens=False)


def _line(text: str) -> str:
    return sanitize_header(text, max_len=500)


def _item(text: str) -> str:
    """A list item: ``- text`` cleaned to one line, then wrapped with a hanging indent."""
    return textwrap.fill(
        _line(f"- {text}"),
        WIDTH,
        subsequent_indent="  ",
        break_long_words=False,
        break_on_hyphens=False,
    )


def _fields(rows: Sequence[tuple[str, str]], width: int) -> str:
    """Aligned ``Label:  value`` lines; only the values are cleaned, so the padding stays."""
    return "\n".join(f"{label + ':':<{width}}{_line(value)}" for label, value in rows)


def _check_line(check: CheckResult) -> str:
    # value and window written as the certificate and the reasons write them (quantities.py)
    extra = precision(check.metric, check.value, check.window)
    value = (
        "not measured" if check.value is None
        else format_uncertain(check.metric, check.value, check.uncertainty, extra)
    )
    window = format_window(check.metric, check.window, extra)
    if check.too_close:
        words = f"too close to the limit to decide, {check.decision}"
    else:
        words = "out of window" if check.outcome is Outcome.OUT_OF_WINDOW else "not judged"
    hazard = f", hazard: {CAUTIONS[check.hazard].title.lower()}" if check.hazard else ""
    return _item(
        f"{check.rule_id}: {check.metric} = {value}, window {window}"
        f" ({words}, {check.severity.value}{hazard})"
    )


def caution_sections(hazards: Sequence[Hazard], family: str | None, *, general: bool) -> list[str]:
    """Each hazard's caution, the handling words, the family's general caution, the notice.

    Every letter about a cell ends its decision with these, in this order.
    """
    parts = [f"CAUTION: {CAUTIONS[h].title}\n" + _paragraph(CAUTIONS[h].text) for h in hazards]
    if hazards:
        parts.append("HANDLING\n" + _paragraph(HANDLING))
    if general:
        parts.append("GENERAL CAUTION\n" + _paragraph(general_caution(family)))
    parts.append(_paragraph(DATA_CHECK_NOTICE))
    return parts


def _cell_sections(result: CellResult, hazards: Sequence[Hazard], general: bool) -> list[str]:
    """Reasons, checks, cautions, notice and traceability: the body shared by cell letters."""
    parts: list[str] = []
    reasons = [_item(r) for r in result.verdict.reasons] or ["- (no reason recorded)"]
    parts.append("Reasons\n" + "\n".join(reasons))
    rows = [
        _check_line(c)
        for c in result.verdict.checks
        if c.outcome in (Outcome.OUT_OF_WINDOW, Outcome.NOT_JUDGED)
    ]
    if rows:
        parts.append("Checks out of window or not judged\n" + "\n".join(rows))
    parts += caution_sections(hazards, result.rule_set.family, general=general)
    rule_set = result.rule_set
    trace = [
        ("Input file", result.source_name),
        ("Input SHA-256", result.input_sha256),
        ("Rule set", f"{rule_set.name}, revision {rule_set.revision}"),
        ("Rule set SHA-256", rule_set.sha256),
        ("Rule set file", rule_set.source),
        ("Software", f"formgate {result.software_version}"),
        ("Analysed at", result.analysed_at.astimezone(datetime.UTC).isoformat()),
    ]
    parts.append("Traceability\n" + _fields(trace, 18))
    return parts


def _identity(result: CellResult, station: str, verdict_line: str) -> str:
    rows = [
        ("Cell", result.cell_id),
        ("Lot", result.lot),
        ("Cell type", result.cell_type.name),
        ("Station", station),
        ("Verdict", verdict_line),
    ]
    # what decided it, on the first lines a reader sees, wrapped like the other paragraphs
    deciding = _paragraph("Deciding: " + decision_line(result.verdict, result.notes))
    return _fields(rows, 11) + "\n\n" + deciding


def _cell_key(result: CellResult) -> str:
    return f"{result.input_sha256}:{result.rule_set.sha256}"


def _subject_ids(result: CellResult) -> tuple[str, str]:
    return (
        sanitize_header(result.cell_id, ID_LEN) or "(no cell id)",
        sanitize_header(result.lot, ID_LEN) or "(no lot)",
    )


def cell_certificate_paragraph(link: str) -> str:
    """Where the cell's own certificate is (a station's ``<cell>~cell.pdf``): '' for no link."""
    if not link:
        return ""
    return _paragraph(
        f"The cell's own certificate shows its standing decision over all its stages, its "
        f"lot's screens and any review, and is rewritten moments after each decision: {link}"
    )


def failure_letter(
    result: CellResult,
    pdf_path: str,
    recipients: Sequence[str],
    *,
    station: str,
    domain: str | None = None,
    cell_certificate: str = "",
    channel_note: str = "",
) -> Letter:
    """The mail for a failed cell: subject names cell, lot and hazards; PDF attached.

    The body gives the verdict, the reasons, the caution for each hazard and the
    general caution, the data-check notice and the traceability of the decision.
    ``domain`` is the Message-ID's right-hand side (default: made from ``station``).
    ``cell_certificate``: the link of the cell's own certificate, named in the body.
    ``channel_note``: when the channel that tested the cell is suspect, the words that say so
    (after the FAIL paragraphs; every caution still follows in full).
    """
    if result.verdict.kind is not VerdictKind.FAIL:
        raise ValueError(f"failure_letter needs a failed cell, got {result.verdict.kind.value}")
    cell, lot = _subject_ids(result)
    hazards = result.verdict.hazards
    # the deciding check first (what failed, by how much), then the hazards to beware of
    words = decision_line(result.verdict, result.notes)
    if hazards:
        words += " [" + "; ".join(CAUTIONS[h].title.lower() for h in hazards) + "]"
    head = [
        _identity(result, station, "FAIL. Do not release this cell; handle it with care."),
        _paragraph(
            "This cell failed at least one reject check. Read the cautions below before "
            "anyone handles it, and follow your site's procedures for failed cells. The "
            f"certificate is attached ({pathlib.PurePath(pdf_path).name})."
        ),
        *([cell_certificate_paragraph(cell_certificate)] if cell_certificate else []),
        *([_paragraph(channel_note)] if channel_note else []),
    ]
    body = "\n\n".join(head + _cell_sections(result, hazards, general=True)) + "\n"
    return Letter(
        kind="failure",
        message_id=message_id_for("failure", _cell_key(result), domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(f"formgate: FAIL cell {cell}, lot {lot} \N{EM DASH} {words}", 300),
        body_text=_clean_text(body),
        attachment_path=pdf_path,
        lot=result.lot,
    )


def hold_letter(
    result: CellResult,
    pdf_path: str,
    recipients: Sequence[str],
    *,
    station: str,
    domain: str | None = None,
    cell_certificate: str = "",
) -> Letter:
    """The mail for a held cell: it must not be released until reviewed; PDF attached.

    Cautions are added for any hazard named by a check that is out of its window.
    ``cell_certificate``: the link of the cell's own certificate, named in the body.
    """
    if result.verdict.kind is not VerdictKind.HOLD:
        raise ValueError(f"hold_letter needs a held cell, got {result.verdict.kind.value}")
    cell, lot = _subject_ids(result)
    hazards = list(result.verdict.hazards)
    for check in result.verdict.checks:
        if check.outcome is Outcome.OUT_OF_WINDOW and check.hazard and check.hazard not in hazards:
            hazards.append(check.hazard)
    head = [
        _identity(result, station, "HOLD. This cell must not be released until reviewed."),
        _paragraph(
            "This cell was held for review: a review check is out of its window, or the data "
            "were not good enough to judge a check. Keep it apart from released cells until "
            "qualified personnel have reviewed it. The certificate is attached "
            f"({pathlib.PurePath(pdf_path).name})."
        ),
        *([cell_certificate_paragraph(cell_certificate)] if cell_certificate else []),
    ]
    body = "\n\n".join(head + _cell_sections(result, hazards, general=bool(hazards))) + "\n"
    return Letter(
        kind="hold",
        message_id=message_id_for("hold", _cell_key(result), domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(
            f"formgate: HOLD cell {cell}, lot {lot} \N{EM DASH} "
            f"{decision_line(result.verdict, result.notes)}",
            300,
        ),
        body_text=_clean_text(body),
        attachment_path=pdf_path,
        lot=result.lot,
    )


def alert_letter(
    subject_tail: str,
    text: str,
    recipients: Sequence[str],
    *,
    station: str,
    key: str,
    domain: str | None = None,
) -> Letter:
    """A station alert (a broken rules edit, a parked mail, a quarantined file).

    ``text`` may span lines and should name the file and line where it applies;
    ``key`` identifies the event, so the same alert raised twice has one Message-ID.
    """
    body = (
        "\n\n".join(
            [
                _clean_text(text.strip()),
                _paragraph(
                    f"Raised by formgate on station {_line(station)}. It needs the attention "
                    "of whoever looks after the station."
                ),
            ]
        )
        + "\n"
    )
    return Letter(
        kind="alert",
        message_id=message_id_for("alert", key, domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(f"formgate: ALERT \N{EM DASH} {subject_tail}", 300),
        body_text=body,
    )


def _check_sender(sender: str) -> str:
    _, address = email.utils.parseaddr(sender)
    if sanitize_header(sender, 300) != sender.strip() or not _ADDRESS.fullmatch(address):
        raise ValueError(f"not a sender address: {sender!r}")
    return sender.strip()


def build_message(letter: Letter, *, sender: str, date: datetime.datetime) -> EmailMessage:
    """The mail for ``letter``, dated ``date`` (timezone-aware), with its PDF attached.

    Reads ``letter.attachment_path`` when it is set; a missing or unreadable file, or
    one that is not a PDF, raises :class:`MailError` naming the file.
    """
    if date.tzinfo is None:
        raise ValueError("the date of a mail must be timezone-aware")
    message = EmailMessage(policy=email.policy.default)
    message["From"] = _check_sender(sender)
    message["To"] = ", ".join(letter.recipients)
    message["Subject"] = sanitize_header(letter.subject, 300)
    message["Date"] = email.utils.format_datetime(date)
    message["Message-ID"] = letter.message_id
    # Tells mail servers and out-of-office responders not to answer (RFC 3834).
    message["Auto-Submitted"] = "auto-generated"
    message["X-Formgate-Kind"] = letter.kind
    if letter.lot:
        message["X-Formgate-Lot"] = sanitize_header(letter.lot, ID_LEN)
    # Quoted-printable keeps the body 7-bit, so any server relays it unchanged.
    message.set_content(letter.body_text, subtype="plain", charset="utf-8", cte="quoted-printable")
    if letter.attachment_path is not None:
        path = pathlib.Path(letter.attachment_path)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise MailError(
                f"the certificate for mail {letter.message_id} cannot be read "
                f"({exc.strerror or exc})",
                SourceRef(str(path)),
                hint="Publish the cell again so its certificate is rewritten; "
                "the mail stays in the outbox until then.",
            ) from exc
        if not data.startswith(b"%PDF-"):
            raise MailError(
                f"the certificate for mail {letter.message_id} is not a PDF "
                f"(it starts with {data[:8]!r})",
                SourceRef(str(path)),
                hint="Publish the cell again so its certificate is rewritten.",
            )
        name = sanitize_header(path.name, 120) or "certificate.pdf"
        message.add_attachment(data, maintype="application", subtype="pdf", filename=name)
    return message
