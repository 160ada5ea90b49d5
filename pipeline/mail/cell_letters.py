"""Letters about a whole cell: a decision over its stages or its lot, and a decision superseded.

A cycle file's fail or hold letter (letters.py) goes out when that file is judged. A
cell's decision can also change later: its aging readings fail it, its closed lot's
screen holds it as an outlier, or a later record (a retest, a copy sent again)
supersedes a decision that was mailed. Each of these gets one short letter of its
own, with the cautions of a failed cell, so nobody acts on a decision that no longer
stands. Every header value built from data goes through sanitize_header.
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence

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

_WORDS = {
    "fail": "FAIL. Do not release this cell; handle it with care.",
    "hold": "HOLD. This cell must not be released until reviewed.",
    "pass": "PASS.",
}
_CAUSES = {
    "record": "a new record of the cell was judged",
    "readings": "the cell's aging readings came in",
    "lot closed": "its lot was closed and the lot's screens were applied",
    "rules": "the rules changed",
}


def _hazards(names: Sequence[str]) -> list[Hazard]:
    known = {h.value: h for h in Hazard}
    return [known[n] for n in names if n in known]


def _records(records: Sequence[tuple[str, str, str]]) -> str:
    """The files a decision rests on, each with its stage and SHA-256."""
    return "Records the decision rests on\n" + "\n".join(
        _item(f"{stage}: {name} (SHA-256 {sha or 'not recorded'})") for stage, name, sha in records
    )


def decision_letter(
    *,
    cell_id: str,
    lot: str,
    verdict: str,
    reasons: Sequence[str],
    hazards: Sequence[str],
    cause: str,
    records: Sequence[tuple[str, str, str]],
    family: str | None,
    recipients: Sequence[str],
    station: str,
    key: str,
    decided_at: datetime.datetime,
    domain: str | None = None,
    certificate: str = "",
) -> Letter:
    """The letter for a cell whose decision over its stages or lot became ``fail`` or ``hold``.

    ``records``: (stage, file name, SHA-256) of every record the decision rests on;
    ``key`` makes the Message-ID (one letter per decision); ``certificate``: the link of the
    cell's own certificate.
    """
    if verdict not in ("fail", "hold"):
        raise ValueError(f"a decision letter is for a fail or a hold, got {verdict!r}")
    cell = sanitize_header(cell_id, ID_LEN) or "(no cell id)"
    shown_lot = sanitize_header(lot, ID_LEN) or "(no lot)"
    named = _hazards(hazards)
    line = "; ".join(reasons) or "(no reason recorded)"
    head = _fields(
        [
            ("Cell", cell_id),
            ("Lot", lot),
            ("Station", station),
            ("Verdict", _WORDS[verdict]),
            ("Decided", decided_at.astimezone(datetime.UTC).isoformat(timespec="seconds")),
        ],
        11,
    )
    body = [
        head,
        _paragraph(f"Deciding: {line}"),
        _paragraph(
            f"The cell's decision changed because {_CAUSES.get(cause, cause)}. Keep the cell "
            "apart from released cells and follow your site's procedures."
        ),
        "Reasons\n" + "\n".join(_item(r) for r in reasons),
        *caution_sections(named, family, general=verdict == "fail" or bool(named)),
        _records(records),
        *([cell_certificate_paragraph(certificate)] if certificate else []),
    ]
    word = "FAIL" if verdict == "fail" else "HOLD"
    return Letter(
        kind="failure" if verdict == "fail" else "hold",
        message_id=message_id_for("cell", key, domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(
            f"formgate: {word} cell {cell}, lot {shown_lot} \N{EM DASH} {line}", 300
        ),
        body_text=_clean_text("\n\n".join(body) + "\n"),
        lot=lot,
    )


def superseded_letter(
    *,
    cell_id: str,
    lot: str,
    was: tuple[str, str, datetime.datetime],
    now: tuple[str, str],
    cause: str,
    records: Sequence[tuple[str, str, str]],
    family: str | None,
    recipients: Sequence[str],
    station: str,
    key: str,
    domain: str | None = None,
    certificate: str = "",
) -> Letter:
    """A short follow-up: the fail or hold mailed earlier no longer stands; what stands now.

    ``was``: (verdict, reason, when decided); ``now``: (verdict, reason); ``certificate``:
    the link of the cell's own certificate.
    """
    cell = sanitize_header(cell_id, ID_LEN) or "(no cell id)"
    shown_lot = sanitize_header(lot, ID_LEN) or "(no lot)"
    old_verdict, old_reason, old_at = was
    new_verdict, new_reason = now
    when = old_at.astimezone(datetime.UTC).isoformat(timespec="seconds")
    body = [
        _fields(
            [
                ("Cell", cell_id),
                ("Lot", lot),
                ("Station", station),
                ("Was", f"{old_verdict} ({when})"),
                ("Now", _WORDS.get(new_verdict, new_verdict)),
            ],
            11,
        ),
        _paragraph(
            f"The {old_verdict} decision mailed for this cell on {when} is superseded, "
            f"because {_CAUSES.get(cause, cause)}. It was: {old_reason or '(no reason)'}. "
            f"It is now {new_verdict}" + (f": {new_reason}." if new_reason else ".")
        ),
        _paragraph(
            "A cell that was failed stays apart until qualified personnel release it under "
            "your site's procedures: a later record does not by itself make it safe."
            if old_verdict == "fail"
            else "Review the cell against the decision that stands now."
        ),
        *([] if new_verdict != "fail" else caution_sections([], family, general=True)),
        _records(records),
        *([cell_certificate_paragraph(certificate)] if certificate else []),
    ]
    return Letter(
        kind="failure" if old_verdict == "fail" else "hold",
        message_id=message_id_for("update", key, domain=_domain(station, domain)),
        recipients=tuple(recipients),
        subject=sanitize_header(
            f"formgate: UPDATE cell {cell}, lot {shown_lot} \N{EM DASH} now {new_verdict}, "
            f"was {old_verdict}" + (f": {new_reason}" if new_reason else ""),
            300,
        ),
        body_text=_clean_text("\n\n".join(body) + "\n"),
        lot=lot,
    )
