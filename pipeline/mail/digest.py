"""The lot digest: one mail listing a lot's cells with their verdicts, fails and holds first.

Pure, like letters.py, whose header cleaning, Message-IDs and paragraph layout it shares:
rows in, a :class:`~pipeline.mail.letters.Letter` out. A station queues a digest once a lot
has been quiet (pipeline/station/digests.py) and the lot's last one when it closes, with the
lot report attached (pipeline/station/lots.py); each failed or held cell also has a letter
of its own, with its cautions (letters.py).
"""

from __future__ import annotations

import pathlib
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass

from pipeline.acceptance.rules import Hazard
from pipeline.judge.quantities import format_value
from pipeline.mail.letters import (
    ID_LEN,
    WIDTH,
    Letter,
    _clean_text,
    _domain,
    _fields,
    _line,
    _paragraph,
    message_id_for,
    sanitize_header,
)
from pipeline.report.hazards import CAUTIONS


@dataclass(frozen=True, slots=True)
class DigestRow:
    """One cell in a lot digest: its id, verdict word (``pass``...), capacity and certificate.

    ``reason`` is the deciding line of a fail or hold (empty for a pass);
    ``certificate_path`` is a path or a link, as the station builds it; ``hazards``: the
    hazards its decision carries (values of :class:`pipeline.acceptance.rules.Hazard`), which a cell a
    person released keeps, and with them their cautions.
    """

    cell_id: str
    verdict: str
    grading_capacity_ah: float | None
    certificate_path: str
    reason: str = ""
    grade: str | None = None  # a passing cell's grade, once its lot is closed
    hazards: tuple[str, ...] = ()


# Closing words of a digest: what it is, and where the decisions stand (common practice).
DIGEST_NOTE = (
    "This digest lists the decisions formgate recorded for the lot: each cell's verdict with "
    "the check that decided a fail or a hold. Failed and held cells also get a mail of their "
    "own, with their cautions. The certificates and the station's ledger are the record; "
    "the verdicts are a check of cycler data against the rule set's windows, not a safety "
    "assessment."
)
# The order a digest lists verdicts in: what needs action first.
_DIGEST_ORDER = {"fail": 0, "hold": 1, "error": 2, "pass": 3}
# A verdict as the digest writes it: a cell whose file could not be judged is "not judged",
# as `formgate lot list` and `lot show` say (the lot report: "Not judged (error)").
_VERDICT_WORDS = {"error": "not judged"}


def _word(verdict: str) -> str:
    return _VERDICT_WORDS.get(verdict, verdict)


def _kept_caution(hazards: Sequence[str]) -> str:
    """What a passing cell released over a hazard keeps: the hazard named, and where its
    caution is (the cell certificate), deferring to the site and qualified personnel."""
    known = {h.value: h for h in Hazard}
    named = ", ".join(
        f"{h} ({CAUTIONS[known[h]].title})" if h in known else h for h in hazards
    )
    return (
        f"CAUTION: its record shows the hazard{'s' if len(hazards) > 1 else ''} {named}. A "
        "release does not clear a hazard: its caution stays with the cell (on its cell "
        "certificate), and the site's procedures and qualified personnel decide how it is "
        "handled."
    )


def _wrapped(text: str) -> str:
    return textwrap.fill(
        _line(text),
        WIDTH,
        initial_indent="    ",
        subsequent_indent="    ",
        break_long_words=False,
        break_on_hyphens=False,
    )


def _table(rows: Sequence[DigestRow]) -> str:
    """Cell, verdict, capacity and certificate in columns; a fail's or hold's reason below it."""
    header = ("cell", "verdict", "grading capacity (Ah)", "certificate")
    cells = [
        (
            sanitize_header(r.cell_id, ID_LEN),
            sanitize_header(_word(r.verdict) + (f" {r.grade}" if r.grade else ""), 24),
            # as the certificate writes it; the column's header names the unit
            format_value("grading_capacity_Ah", r.grading_capacity_ah).removesuffix(" Ah"),
            sanitize_header(r.certificate_path, 300),
        )
        for r in rows
    ]
    widths = [max(len(line[i]) for line in [header, *cells]) for i in range(3)]

    def render(line: tuple[str, str, str, str]) -> str:
        return (
            f"{line[0]:<{widths[0]}}  {line[1]:<{widths[1]}}  {line[2]:>{widths[2]}}  {line[3]}"
        ).rstrip()

    rule = "  ".join("-" * w for w in widths) + "  " + "-" * len(header[3])
    lines = [render(header), rule]
    for row, cell in zip(rows, cells, strict=True):
        lines.append(render(cell))
        if row.reason:
            lines.append(_wrapped(row.reason))
        if row.verdict == "pass" and row.hazards:
            lines.append(_wrapped(_kept_caution(row.hazards)))
    return "\n".join(lines)


def digest_letter(
    lot: str,
    rows: Sequence[DigestRow],
    recipients: Sequence[str],
    *,
    station: str,
    digest_no: int,
    domain: str | None = None,
    report_path: str | None = None,
) -> Letter:
    """One mail listing the cells of ``lot`` with verdict and reason: fails, then holds, then passes.

    The head gives the counts by verdict (a cell whose file could not be judged, verdict
    ``error``, counts as "not judged") and the yield (passed / listed, as the lot report
    counts it). ``digest_no``
    counts the digests of this lot (1, 2, ...) and is part of the Message-ID key, so each
    digest is its own mail and a resend of one keeps its id. ``report_path``: the lot is
    closed, and this is its report (PDF), attached; its digest is the lot's last, one per lot.
    """
    if not rows:
        raise ValueError("a digest needs at least one cell")
    ordered = sorted(
        rows, key=lambda r: (_DIGEST_ORDER.get(r.verdict, len(_DIGEST_ORDER)), r.cell_id)
    )
    counts: dict[str, int] = {}
    for row in ordered:
        word = sanitize_header(_word(row.verdict), 12)
        counts[word] = counts.get(word, 0) + 1
    tally = ", ".join(f"{n} {word}" for word, n in counts.items())
    passed = counts.get("pass", 0)
    yield_text = f"{100.0 * passed / len(rows):.1f} % ({passed} of {len(rows)} passed)"
    shown_lot = sanitize_header(lot, ID_LEN) or "(no lot)"
    plural = "cell" if len(rows) == 1 else "cells"
    closing = (
        [_paragraph(
            "The lot is closed: its screens were applied, its passing cells graded, and its "
            f"report is attached ({pathlib.PurePath(report_path).name}), with the spread of "
            "every checked metric, the capability of each check and the lot's outliers."
        )]
        if report_path is not None
        else []
    )
    which = "closed" if report_path is not None else f"digest {digest_no}"
    body = (
        "\n\n".join(
            [
                _fields(
                    [
                        ("Lot", lot),
                        ("Digest", "lot closed" if report_path is not None else str(digest_no)),
                        ("Station", station),
                        ("Cells", f"{len(rows)} ({tally})"),
                        ("Yield", yield_text),
                    ],
                    11,
                ),
                *closing,
                _table(ordered),
                _paragraph(DIGEST_NOTE),
            ]
        )
        + "\n"
    )
    return Letter(
        kind="digest",
        message_id=message_id_for(
            "digest",
            f"{lot}\n{'closed' if report_path is not None else digest_no}",
            domain=_domain(station, domain),
        ),
        recipients=tuple(recipients),
        subject=sanitize_header(
            f"formgate: lot {shown_lot}, {which} \N{EM DASH} "
            f"{len(rows)} {plural}: {tally}; yield {100.0 * passed / len(rows):.1f} %",
            300,
        ),
        body_text=_clean_text(body),
        attachment_path=report_path,
        lot=lot,
    )
