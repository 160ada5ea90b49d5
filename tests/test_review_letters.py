"""The letter of a person's review: its own subject, the decisions before and after, the cautions kept.

Pure: facts in, a Letter out, built into a real message and read back as a mail reader would.
"""

from __future__ import annotations

import datetime
import email
import email.policy

import pytest

from pipeline.mail.letters import build_message
from pipeline.mail.review_letters import ReviewFacts, review_letter

AT = datetime.datetime(2026, 12, 2, 9, 20, tzinfo=datetime.UTC)
WAS_FAIL = ("fail", "grading_capacity_Ah 19.31 Ah < 19.60 Ah (reject)", AT - datetime.timedelta(hours=3))
WAS_HOLD = ("hold", "dcir_mOhm 3.41 mOhm > 3.20 mOhm (review)", AT - datetime.timedelta(hours=1))


def _facts(action: str, was: tuple[str, str, datetime.datetime], now: tuple[str, str],
           **kw: object) -> ReviewFacts:
    return ReviewFacts(
        cell_id=str(kw.pop("cell_id", "L04-021")), lot="DEMO-LOT-04", action=action,
        reviewer="quality engineer A", reason="customer concession 14", reviewed_at=AT,
        was=was, now=now, review_id=3, **kw,  # type: ignore[arg-type]
    )


def _text(facts: ReviewFacts) -> tuple[str, str, str]:
    letter = review_letter(facts, ["quality@example.com"], station="line-1")
    message = build_message(letter, sender="formgate <station@example.com>", date=AT)
    read = email.message_from_bytes(message.as_bytes(), policy=email.policy.default)
    body = read.get_body()
    assert body is not None
    # the subject as composed (a reader unfolds a long one with a space or two more)
    assert " ".join(str(read["Subject"]).split()) == letter.subject
    return letter.kind, letter.subject, " ".join(str(body.get_content()).split())  # type: ignore[attr-defined]


def test_a_concession_names_its_accepted_checks_and_keeps_every_caution() -> None:
    kind, subject, body = _text(_facts(
        "release", WAS_FAIL, ("pass", "released as a concession by quality engineer A accepting "
                              "capacity: customer concession 14"),
        accepts=("capacity",), hazards=("abnormal_capacity",), family="sodium-ion",
    ))
    assert kind == "failure"
    assert subject == ("formgate: RELEASED AS A CONCESSION cell L04-021, lot DEMO-LOT-04 \N{EM DASH} "
                       "by quality engineer A, accepting capacity: customer concession 14")
    assert "Failed checks accepted by the concession - capacity" in body
    assert "Was: fail (decided 2026-12-02T06:20:00+00:00)" in body and "Now: pass" in body
    assert "CAUTION: Capacity far from its nominal value" in body
    assert "GENERAL CAUTION" in body and "local codes" in body and "qualified personnel" in body
    assert "UN 3551" in body  # the family's transport words
    assert "does not make the cell good or safe" in body
    assert "ISO 9001:2015 clause 8.7" in body and "(review 3)" in body


def test_a_review_letter_links_the_cell_certificate_that_shows_the_review() -> None:
    link = "https://qa.example.com/certs/DEMO-LOT-04/L04-021~cell.pdf"
    _, _, body = _text(_facts("release", WAS_HOLD, ("pass", "released by quality engineer A: "
                                                    "customer concession 14"), certificate=link))
    assert f"The cell's own certificate shows its standing decision over all its stages, its " \
           f"lot's screens and any review, and is rewritten moments after each decision: {link}" \
           in body


@pytest.mark.parametrize(
    ("action", "was", "now", "kw", "head", "kind", "general"),
    [
        ("release", WAS_HOLD, ("pass", "released by quality engineer A: ok"), {},
         "formgate: RELEASED cell", "hold", False),
        ("reject", WAS_HOLD, ("fail", "rejected by quality engineer A: swollen"), {},
         "formgate: REJECTED cell", "failure", True),
        ("retest", WAS_FAIL, ("hold", "waiting for stage grading (retest asked by ...)"),
         {"stage": "grading"}, "formgate: RETEST (grading) cell", "failure", True),
    ],
)
def test_each_action_has_its_own_subject_and_the_cautions_of_a_failed_cell(
    action: str, was: tuple[str, str, datetime.datetime], now: tuple[str, str],
    kw: dict[str, object], head: str, kind: str, general: bool,
) -> None:
    got_kind, subject, body = _text(_facts(action, was, now, **kw))
    assert subject.startswith(head + " L04-021, lot DEMO-LOT-04 \N{EM DASH} by quality engineer A")
    assert got_kind == kind
    assert ("GENERAL CAUTION" in body) == general
    assert "not a safety assessment" in body  # the data-check notice, always


def test_a_rejected_cell_carries_the_cautions_of_its_hazards() -> None:
    _, _, body = _text(_facts("reject", WAS_FAIL, ("fail", "rejected by quality engineer A: x"),
                              hazards=("internal_short", "over_temperature")))
    assert "CAUTION: Possible internal short circuit" in body
    assert "HANDLING" in body and "GENERAL CAUTION" in body


def test_text_from_data_cannot_add_a_header() -> None:
    letter = review_letter(
        _facts("release", WAS_HOLD, ("pass", "x"), cell_id="C-1\r\nBcc: someone@example.com"),
        ["quality@example.com"], station="line-1",
    )
    assert "\n" not in letter.subject and "\r" not in letter.subject
    message = build_message(letter, sender="formgate <station@example.com>", date=AT)
    assert message["Bcc"] is None
