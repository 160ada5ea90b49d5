"""The letter a person's review of a held or failed cell sends: who decided what about it, and why.

One letter per review (release, reject, or retest of a stage), to the people who were told
of the cell's hold or fail, with its own subject naming the action, the reviewer and the
reason (and a concession's accepted checks), so that nobody acts on a hold or fail a
person has since closed. A failed cell keeps its cautions whatever was decided: a release
of one keeps the general caution that defers to the site's procedures, local codes and
qualified personnel, and a hazard's caution stays with the hazard. A station's letter links
the cell's own certificate, rewritten to show the review (the outbox holds the letter until it
is published). Pure: values in, a Letter out; every header value from data goes through
sanitize_header.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.acceptance.rules import Hazard
from pipeline.mail.letters import (
    ID_LEN,
    Letter,
    _clean_text,
    _domain,
    _fields,
    _item,
    _paragraph,
    caution_sections,
    cell_certificate_paragraph,
    message_id_for,
    sanitize_header,
)


@dataclass(frozen=True, slots=True)
class ReviewFacts:
    """What a review letter says: the cell, the review, and the decisions before and after it.

    ``was``: (verdict, reason, when decided) of the decision the review answered; ``now``:
    (verdict, reason) of the decision it gave; ``hazards``: the cell's hazards (values of
    :class:`pipeline.acceptance.rules.Hazard`); ``review_id``: its row in ``kept_in`` (a station's ledger,
    or the plant database for a review made there); ``certificate``: the link of the cell's
    own certificate, which shows the review ('' for none).
    """

    cell_id: str
    lot: str
    action: str  # release, reject, retest
    reviewer: str
    reason: str
    reviewed_at: datetime.datetime
    was: tuple[str, str, datetime.datetime]
    now: tuple[str, str]
    review_id: int
    stage: str | None = None
    accepts: tuple[str, ...] = ()
    hazards: tuple[str, ...] = ()
    family: str | None = None
    kept_in: str = "the station's ledger"  # where the review is recorded
    certificate: str = ""


def _hazards(names: Sequence[str]) -> list[Hazard]:
    known = {h.value: h for h in Hazard}
    return [known[n] for n in names if n in known]


def _what(facts: ReviewFacts) -> tuple[str, str, str]:
    """(subject word, the action in words, the paragraph saying what it means)."""
    who, was = facts.reviewer, facts.was[0]
    if facts.action == "release" and was == "fail":
        return (
            "RELEASED AS A CONCESSION",
            f"released as a concession accepting {', '.join(facts.accepts)}",
            f"{who} released this failed cell as a concession that accepts the failed checks "
            "listed below. The cell still failed those checks: the concession allows its use "
            "as your site's procedures for concessions say, it does not make the cell good or "
            "safe, and the cautions below stay with it. Where a caution and the concession "
            "disagree, your site's procedures and qualified personnel decide.",
        )
    if facts.action == "release":
        return (
            "RELEASED",
            "released",
            f"{who} released this held cell: it is no longer held. A new record or reading of "
            "the cell decides it again.",
        )
    if facts.action == "reject":
        return (
            "REJECTED",
            "rejected",
            f"{who} rejected this cell: it is failed. Keep it apart from released cells and "
            "follow your site's procedures for failed cells; only a new record of it (a "
            "retest) decides it again.",
        )
    return (
        f"RETEST ({facts.stage})",
        f"retest of stage {facts.stage} asked",
        f"{who} asked for the {facts.stage} stage of this cell to be tested again. The cell is "
        f"held until a record of that stage arrives, and that record decides it again; keep it "
        "apart from released cells until then.",
    )


def review_letter(
    facts: ReviewFacts,
    recipients: Sequence[str],
    *,
    station: str,
    domain: str | None = None,
) -> Letter:
    """The letter of one review: its own subject (action, who, why), the decision before and
    after it, a concession's accepted checks, and the cautions the cell keeps."""
    cell = sanitize_header(facts.cell_id, ID_LEN) or "(no cell id)"
    lot = sanitize_header(facts.lot, ID_LEN) or "(no lot)"
    word, action, meaning = _what(facts)
    old_verdict, old_reason, old_at = facts.was
    new_verdict, new_reason = facts.now
    when = old_at.astimezone(datetime.UTC).isoformat(timespec="seconds")
    head = _fields(
        [
            ("Cell", facts.cell_id),
            ("Lot", facts.lot),
            ("Station", station),
            ("Action", action),
            ("By", facts.reviewer),
            ("At", facts.reviewed_at.astimezone(datetime.UTC).isoformat(timespec="seconds")),
            ("Was", f"{old_verdict} (decided {when})"),
            ("Now", new_verdict),
        ],
        9,
    )
    body = [
        head,
        _paragraph(meaning),
        "Reason given\n" + _item(facts.reason),
        "Decision it answered\n" + _item(f"{old_verdict}: {old_reason or '(no reason recorded)'}"),
        "Decision now\n" + _item(f"{new_verdict}: {new_reason or '(no reason recorded)'}"),
    ]
    if facts.accepts:
        body.append("Failed checks accepted by the concession\n"
                    + "\n".join(_item(c) for c in facts.accepts))
    failed = old_verdict == "fail" or new_verdict == "fail"
    body += caution_sections(_hazards(facts.hazards), facts.family, general=failed)
    if facts.certificate:
        body.append(cell_certificate_paragraph(facts.certificate))
    body.append(_paragraph(
        f"The review is kept in {facts.kept_in} (review {facts.review_id}) with the "
        "decision it answered and the one it gave, as ISO 9001:2015 clause 8.7 asks of the "
        "control of nonconforming outputs."
    ))
    subject = (
        f"formgate: {word} cell {cell}, lot {lot} \N{EM DASH} by {facts.reviewer}"
        + (f", accepting {', '.join(facts.accepts)}" if facts.accepts else "")
        + f": {facts.reason}"
    )
    key = (f"{facts.lot}\n{facts.cell_id}\n{facts.review_id}\n"
           f"{facts.reviewed_at.astimezone(datetime.UTC).isoformat()}")
    return Letter(
        kind="failure" if failed else "hold",
        message_id=message_id_for("review", key, domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(subject, 300),
        body_text=_clean_text("\n\n".join(body) + "\n"),
        lot=facts.lot,
    )
