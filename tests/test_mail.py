"""Composing mails: subjects, bodies with cautions, deterministic Message-IDs, clean headers."""

from __future__ import annotations

import dataclasses
import datetime
import email
import email.policy
import io
import textwrap
import unicodedata
from email.message import EmailMessage
from pathlib import Path
from typing import cast

import pytest
from hypothesis import given
from hypothesis import strategies as st
from pypdf import PdfWriter

from pipeline.acceptance.results import CellResult, CheckResult, Outcome, RuleSetRef, Verdict, VerdictKind
from pipeline.acceptance.rules import CellType, Hazard, Severity, Window
from pipeline.mail.digest import DIGEST_NOTE, DigestRow, digest_letter
from pipeline.mail.letters import (
    Letter,
    MailError,
    alert_letter,
    build_message,
    failure_letter,
    hold_letter,
    message_id_for,
    sanitize_header,
)
from pipeline.model import CellMetrics
from pipeline.report.hazards import CAUTIONS, DATA_CHECK_NOTICE, GENERAL_CAUTION, HANDLING

INPUT_SHA = "a" * 64
RULES_SHA = "b" * 64
TO = ("quality@example.com", "line-lead@example.org")
SENDER = "formgate station <station@example.com>"
WHEN = datetime.datetime(2026, 3, 2, 14, 30, tzinfo=datetime.UTC)
DEMO_TYPE = CellType("DEMO-LFP-20A", 20.0, 2.0, 3.65)


def make_result(
    kind: VerdictKind = VerdictKind.FAIL,
    hazards: tuple[Hazard, ...] = (Hazard.INTERNAL_SHORT, Hazard.OVER_TEMPERATURE),
    *,
    cell_id: str = "DEMO-0007",
    lot: str = "DEMO-LOT-01",
    rules_sha: str = RULES_SHA,
) -> CellResult:
    """An invented judged cell of type DEMO-LFP-20A with check rows matching ``kind``."""
    out = Outcome.OUT_OF_WINDOW
    severity = Severity.REVIEW if kind is VerdictKind.HOLD else Severity.REJECT
    checks = [
        CheckResult(
            "drift_max",
            "rest_voltage_drift_mV_per_h",
            -4.2,
            Window(-1.0, None),
            out,
            severity,
            Hazard.INTERNAL_SHORT if Hazard.INTERNAL_SHORT in hazards else None,
            "voltage falls during the final rest",
        ),
        CheckResult(
            "temp_max",
            "max_temperature_C",
            58.5,
            Window(None, 45.0),
            out,
            severity,
            Hazard.OVER_TEMPERATURE if Hazard.OVER_TEMPERATURE in hazards else None,
            "cell hotter than 45 C during formation",
        ),
        CheckResult(
            "capacity",
            "grading_capacity_Ah",
            20.31,
            Window(19.6, 21.0),
            Outcome.IN_WINDOW,
            Severity.REJECT,
            None,
            "grading capacity",
        ),
    ]
    if kind is VerdictKind.PASS:
        checks = checks[2:]
    reasons = tuple(c.message for c in checks if c.outcome is out)
    return CellResult(
        source_name=f"{lot}_{cell_id}.csv",
        input_sha256=INPUT_SHA,
        metadata={"cell_id": cell_id, "lot": lot, "cell_type": DEMO_TYPE.name},
        cell_type=DEMO_TYPE,
        rule_set=RuleSetRef("demo-lfp", "2026-02", rules_sha, "rules/demo_lfp.toml"),
        metrics=CellMetrics({"grading_capacity_Ah": 20.31}, (), (), ()),
        verdict=Verdict(kind, tuple(checks), hazards if kind is VerdictKind.FAIL else (), reasons),
        notes=(),
        analysed_at=WHEN,
        software_version="0.1.0",
    )


def make_pdf(path: Path) -> bytes:
    """Write a real one-page PDF (made with pypdf) to ``path`` and return its bytes."""
    writer = PdfWriter()
    writer.add_blank_page(width=595, height=842)
    buffer = io.BytesIO()
    writer.write(buffer)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(buffer.getvalue())
    return buffer.getvalue()


def flat(text: str) -> str:
    return " ".join(text.split())


def reparse(message: EmailMessage) -> EmailMessage:
    return cast(
        EmailMessage, email.message_from_bytes(message.as_bytes(), policy=email.policy.default)
    )


def test_failure_subject_names_cell_lot_the_deciding_checks_and_hazards(tmp_path: Path) -> None:
    letter = failure_letter(make_result(), str(tmp_path / "DEMO-0007.pdf"), TO, station="line-1")
    assert letter.subject == (
        "formgate: FAIL cell DEMO-0007, lot DEMO-LOT-01 \N{EM DASH} "
        "rest_voltage_drift_mV_per_h \N{MINUS SIGN}4.20 mV/h < \N{MINUS SIGN}1.00 mV/h (reject); "
        "max_temperature_C 58.5 °C > 45.0 °C (reject) "
        "[possible internal short circuit; over-temperature during formation]"
    )
    # and the body's first lines say it too
    assert flat(letter.body_text).startswith(
        "Cell: DEMO-0007 Lot: DEMO-LOT-01 Cell type: DEMO-LFP-20A Station: line-1 "
        "Verdict: FAIL. Do not release this cell; handle it with care. "
        "Deciding: rest_voltage_drift_mV_per_h \N{MINUS SIGN}4.20 mV/h < \N{MINUS SIGN}1.00 mV/h (reject); "
        "max_temperature_C 58.5 °C > 45.0 °C (reject)"
    )
    assert letter.kind == "failure"
    assert letter.recipients == TO
    assert letter.lot == "DEMO-LOT-01"


def test_failure_body_has_every_caution_notice_and_traceability(tmp_path: Path) -> None:
    letter = failure_letter(make_result(), str(tmp_path / "DEMO-0007.pdf"), TO, station="line-1")
    body = flat(letter.body_text)
    for hazard in (Hazard.INTERNAL_SHORT, Hazard.OVER_TEMPERATURE):
        assert f"CAUTION: {CAUTIONS[hazard].title}" in body
        assert flat(CAUTIONS[hazard].text) in body
    assert flat(GENERAL_CAUTION) in body
    assert flat(DATA_CHECK_NOTICE) in body
    assert "Verdict: FAIL. Do not release this cell; handle it with care." in body
    assert "- voltage falls during the final rest" in body
    deg = "\N{DEGREE SIGN}C"
    assert (
        f"- temp_max: max_temperature_C = 58.5 {deg}, window \N{LESS-THAN OR EQUAL TO} 45.0 {deg}"
        " (out of window, reject, hazard: over-temperature during formation)"
    ) in body
    assert f"Input SHA-256: {INPUT_SHA}" in body
    assert "Rule set: demo-lfp, revision 2026-02" in body
    assert f"Rule set SHA-256: {RULES_SHA}" in body
    assert "Analysed at: 2026-03-02T14:30:00+00:00" in body
    assert "certificate is attached (DEMO-0007.pdf)" in body
    # Cautions come before the notice and the traceability block.
    assert body.index("GENERAL CAUTION") < body.index("Traceability")


def test_handling_of_a_hazardous_cell_is_said_once_however_many_hazards(tmp_path: Path) -> None:
    two = failure_letter(make_result(), str(tmp_path / "c.pdf"), TO, station="s")
    assert flat(two.body_text).count(flat(HANDLING)) == 1
    assert two.body_text.index("HANDLING") > two.body_text.rindex("CAUTION: ")
    held = hold_letter(make_result(VerdictKind.HOLD, (Hazard.OVER_TEMPERATURE,)), "c.pdf", TO,
                       station="s")
    assert flat(held.body_text).count(flat(HANDLING)) == 1
    none = failure_letter(make_result(hazards=()), str(tmp_path / "c.pdf"), TO, station="s")
    assert "HANDLING" not in none.body_text


def test_failure_without_a_hazard_still_carries_the_general_caution(tmp_path: Path) -> None:
    letter = failure_letter(make_result(hazards=()), str(tmp_path / "c.pdf"), TO, station="s")
    assert letter.subject.endswith("max_temperature_C 58.5 °C > 45.0 °C (reject)")
    assert flat(GENERAL_CAUTION) in flat(letter.body_text)
    assert "CAUTION:" not in letter.body_text


def test_body_lines_stay_readable_in_plain_text(tmp_path: Path) -> None:
    letter = failure_letter(make_result(), str(tmp_path / "c.pdf"), TO, station="line-1")
    prose = [
        line
        for line in letter.body_text.splitlines()
        if not line.startswith(("- ", "Input", "Rule set"))
    ]
    assert max(len(line) for line in prose) <= 72


def test_letters_refuse_the_wrong_verdict(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="failure_letter needs a failed cell, got hold"):
        failure_letter(make_result(VerdictKind.HOLD, ()), "c.pdf", TO, station="s")
    with pytest.raises(ValueError, match="hold_letter needs a held cell, got fail"):
        hold_letter(make_result(), "c.pdf", TO, station="s")


def test_hold_letter_says_not_released_until_reviewed(tmp_path: Path) -> None:
    result = make_result(VerdictKind.HOLD, (Hazard.OVER_TEMPERATURE,))
    letter = hold_letter(result, str(tmp_path / "DEMO-0007.pdf"), TO, station="line-1")
    assert letter.subject == (
        "formgate: HOLD cell DEMO-0007, lot DEMO-LOT-01 \N{EM DASH} "
        "rest_voltage_drift_mV_per_h \N{MINUS SIGN}4.20 mV/h < \N{MINUS SIGN}1.00 mV/h (review); "
        "max_temperature_C 58.5 °C > 45.0 °C (review)"
    )
    body = flat(letter.body_text)
    assert "Verdict: HOLD. This cell must not be released until reviewed." in body
    # A review check naming a hazard is out of window: its caution is shown too.
    assert flat(CAUTIONS[Hazard.OVER_TEMPERATURE].text) in body
    assert flat(GENERAL_CAUTION) in body
    assert letter.attachment_path == str(tmp_path / "DEMO-0007.pdf")


def test_hold_letter_without_hazards_has_no_caution(tmp_path: Path) -> None:
    letter = hold_letter(make_result(VerdictKind.HOLD, ()), "c.pdf", TO, station="line-1")
    assert "CAUTION" not in letter.body_text
    assert flat(DATA_CHECK_NOTICE) in flat(letter.body_text)


def test_message_id_is_deterministic_per_result_and_rule_set() -> None:
    first = failure_letter(make_result(), "c.pdf", TO, station="line-1")
    again = failure_letter(make_result(), "other/c.pdf", ("x@example.org",), station="line-1")
    other_rules = failure_letter(make_result(rules_sha="c" * 64), "c.pdf", TO, station="line-1")
    held = hold_letter(make_result(VerdictKind.HOLD, ()), "c.pdf", TO, station="line-1")
    assert first.message_id == again.message_id
    assert first.message_id != other_rules.message_id
    assert len({first.message_id, held.message_id, other_rules.message_id}) == 3
    assert first.message_id == message_id_for(
        "failure", f"{INPUT_SHA}:{RULES_SHA}", domain="line-1.formgate.invalid"
    )


def test_message_id_shape_and_domain() -> None:
    assert message_id_for("alert", "k", domain="station.example.com") == (
        message_id_for("alert", "k", domain="station.example.com")
    )
    mid = message_id_for("digest", "DEMO-LOT-01\n3", domain="station.example.com")
    assert mid.startswith("<") and mid.endswith("@station.example.com>")
    assert len(mid.split("@")[0]) == 33  # "<" and 32 hex digits
    with pytest.raises(ValueError, match="not a domain"):
        message_id_for("alert", "k", domain="evil>\r\nBcc: x@example.com")
    letter = alert_letter("t", "x", TO, station="Line 3 / Hall B!", key="k")
    assert letter.message_id.endswith("@line-3-hall-b.formgate.invalid>")
    explicit = alert_letter("t", "x", TO, station="line-1", key="k", domain="example.com")
    assert explicit.message_id.endswith("@example.com>")


def test_sanitize_header_examples() -> None:
    assert sanitize_header("X\r\nBcc: victim@example.com") == "X Bcc: victim@example.com"
    assert sanitize_header("  DEMO-\t0001 \x00\x1b[31m ") == "DEMO- 0001 [31m"
    assert sanitize_header("cell\u202eDI\u200b-7") == "cellDI-7"  # bidi override, zero width
    assert sanitize_header("a\u2028b\x85c") == "a b c"  # Unicode line and next-line breaks
    assert sanitize_header("x" * 300) == "x" * 199 + "\N{HORIZONTAL ELLIPSIS}"
    assert sanitize_header("abc def", max_len=5) == "abc\N{HORIZONTAL ELLIPSIS}"
    assert sanitize_header("=?utf-8?q?=0A?=") == "= ?utf-8?q?=0A?="
    with pytest.raises(ValueError):
        sanitize_header("x", max_len=0)


@given(st.text(), st.integers(min_value=1, max_value=400))
def test_sanitize_header_gives_one_clean_line(value: str, max_len: int) -> None:
    clean = sanitize_header(value, max_len)
    assert len(clean) <= max_len
    assert clean == clean.strip()
    assert "  " not in clean
    assert not any(unicodedata.category(c) in ("Cc", "Cf", "Cs", "Zl", "Zp") for c in clean)
    assert len(clean.splitlines()) <= 1
    assert "=?" not in clean
    assert sanitize_header(clean, max_len) == clean  # idempotent


@given(st.text(min_size=1, max_size=300))
def test_any_cell_id_gives_a_buildable_single_line_subject(cell_id: str) -> None:
    letter = failure_letter(make_result(cell_id=cell_id), "c.pdf", TO, station="line-1")
    message = build_message(
        Letter(letter.kind, letter.message_id, letter.recipients, letter.subject, letter.body_text),
        sender=SENDER,
        date=WHEN,
    )
    back = reparse(message)
    assert sorted(back.keys()) == sorted(message.keys())
    assert back["To"] == ", ".join(TO)
    assert "\n" not in str(back["Subject"]) and "\r" not in str(back["Subject"])


def test_header_injection_from_a_cell_id_stays_inside_the_subject(tmp_path: Path) -> None:
    result = make_result(
        cell_id="X\r\nBcc: victim@example.com", lot="DEMO-LOT-01\nCc: a@example.org"
    )
    make_pdf(tmp_path / "c.pdf")
    letter = failure_letter(result, str(tmp_path / "c.pdf"), TO, station="line-1")
    back = reparse(build_message(letter, sender=SENDER, date=WHEN))
    assert "Bcc" not in back and "Cc" not in back
    assert back["Subject"].startswith(
        "formgate: FAIL cell X Bcc: victim@example.com, lot DEMO-LOT-01 Cc: a@example.org "
        "\N{EM DASH}"
    )
    assert back["X-Formgate-Lot"] == "DEMO-LOT-01 Cc: a@example.org"
    assert back["To"] == "quality@example.com, line-lead@example.org"


@pytest.mark.parametrize("field", ["cell_id", "lot"])
def test_an_encoded_word_cannot_smuggle_a_line_break_into_a_header(field: str) -> None:
    # The email package decodes RFC 2047 encoded words in a header value it is given, so
    # "=0D=0A" inside one would otherwise come out as a real line break.
    hostile = "=?utf-8?q?X=0D=0ABcc=3A_victim@example.com?="
    letter = failure_letter(make_result(**{field: hostile}), "c.pdf", TO, station="s")
    message = build_message(
        Letter(
            letter.kind,
            letter.message_id,
            letter.recipients,
            letter.subject,
            letter.body_text,
            lot=letter.lot,
        ),
        sender=SENDER,
        date=WHEN,
    )
    back = reparse(message)
    assert "Bcc" not in back
    assert sorted(back.keys()) == sorted(message.keys())
    assert "= ?utf-8?q?X=0D=0ABcc=3A_victim@example.com?=" in back["Subject"]
    with pytest.raises(ValueError, match="not a plain mail address"):
        alert_letter("t", "x", ["=?utf-8?q?a=0A?=@example.com"], station="s", key="k")


def test_letter_refuses_an_address_that_is_not_plain() -> None:
    with pytest.raises(ValueError, match="not a plain mail address"):
        alert_letter(
            "t", "x", ["quality@example.com\r\nBcc: victim@example.com"], station="s", key="k"
        )
    with pytest.raises(ValueError, match="at least one recipient"):
        alert_letter("t", "x", [], station="s", key="k")
    with pytest.raises(ValueError, match="not a clean single line"):
        Letter("alert", "<a@example.com>", TO, "two\nlines", "body")


def test_build_message_headers_and_attachment(tmp_path: Path) -> None:
    pdf = make_pdf(tmp_path / "certificates" / "DEMO-LOT-01" / "DEMO-0007.pdf")
    letter = failure_letter(
        make_result(),
        str(tmp_path / "certificates/DEMO-LOT-01/DEMO-0007.pdf"),
        TO,
        station="line-1",
    )
    back = reparse(build_message(letter, sender=SENDER, date=WHEN))
    assert back["From"] == SENDER
    assert back["Date"] == "Mon, 02 Mar 2026 14:30:00 +0000"
    assert back["Message-ID"] == letter.message_id
    assert back["Auto-Submitted"] == "auto-generated"
    assert back["X-Formgate-Kind"] == "failure"
    assert back["Subject"] == letter.subject
    body = back.get_body(("plain",))
    assert body is not None and body.get_content() == letter.body_text
    [attachment] = list(back.iter_attachments())
    assert attachment.get_content_type() == "application/pdf"
    assert attachment.get_filename() == "DEMO-0007.pdf"
    assert attachment.get_content() == pdf
    assert all(b < 128 for b in back.as_bytes())  # 7-bit clean: any server relays it


def test_build_message_with_a_missing_certificate_says_what_to_do(tmp_path: Path) -> None:
    path = tmp_path / "DEMO-0007.pdf"
    letter = failure_letter(make_result(), str(path), TO, station="line-1")
    with pytest.raises(MailError) as caught:
        build_message(letter, sender=SENDER, date=WHEN)
    assert str(caught.value) == (
        f"{path}: the certificate for mail {letter.message_id} cannot be read "
        "(No such file or directory).\n"
        "  Publish the cell again so its certificate is rewritten; "
        "the mail stays in the outbox until then."
    )


def test_build_message_refuses_a_file_that_is_not_a_pdf(tmp_path: Path) -> None:
    path = tmp_path / "DEMO-0007.pdf"
    path.write_text("<html>")
    letter = failure_letter(make_result(), str(path), TO, station="line-1")
    with pytest.raises(MailError, match=r"is not a PDF \(it starts with b'<html>'\)"):
        build_message(letter, sender=SENDER, date=WHEN)


def test_build_message_needs_an_aware_date_and_a_plain_sender() -> None:
    letter = alert_letter("t", "x", TO, station="s", key="k")
    with pytest.raises(ValueError, match="timezone-aware"):
        build_message(letter, sender=SENDER, date=datetime.datetime(2026, 3, 2))
    with pytest.raises(ValueError, match="not a sender address"):
        build_message(letter, sender="station@example.com\r\nBcc: x@example.org", date=WHEN)


def test_digest_is_one_plain_text_table() -> None:
    rows = [
        DigestRow("DEMO-0001", "pass", 20.3124, "certificates/DEMO-LOT-01/DEMO-0001.pdf"),
        DigestRow("DEMO-0002", "pass", 20.1, "certificates/DEMO-LOT-01/DEMO-0002.pdf"),
        DigestRow("DEMO-0003\x1b", "pass", None, "certificates/DEMO-LOT-01/DEMO-0003.pdf"),
    ]
    letter = digest_letter("DEMO-LOT-01", rows, TO, station="line-1", digest_no=3)
    assert letter.subject == (
        "formgate: lot DEMO-LOT-01, digest 3 \N{EM DASH} 3 cells: 3 pass; yield 100.0 %"
    )
    assert letter.attachment_path is None
    assert letter.body_text == (
        "Lot:       DEMO-LOT-01\n"
        "Digest:    3\n"
        "Station:   line-1\n"
        "Cells:     3 (3 pass)\n"
        "Yield:     100.0 % (3 of 3 passed)\n"
        "\n"
        "cell       verdict  grading capacity (Ah)  certificate\n"
        "---------  -------  ---------------------  -----------\n"
        "DEMO-0001  pass                     20.31  certificates/DEMO-LOT-01/DEMO-0001.pdf\n"
        "DEMO-0002  pass                     20.10  certificates/DEMO-LOT-01/DEMO-0002.pdf\n"
        "DEMO-0003  pass                         \N{EM DASH}  certificates/DEMO-LOT-01/DEMO-0003.pdf\n"
        "\n" + textwrap.fill(DIGEST_NOTE, 72) + "\n"
    )
    again = digest_letter("DEMO-LOT-01", rows[:1], TO, station="line-1", digest_no=3)
    later = digest_letter("DEMO-LOT-01", rows, TO, station="line-1", digest_no=4)
    assert again.message_id == letter.message_id != later.message_id
    with pytest.raises(ValueError, match="at least one cell"):
        digest_letter("DEMO-LOT-01", [], TO, station="line-1", digest_no=5)


def test_a_digest_lists_fails_and_holds_first_each_with_its_reason_and_the_yield() -> None:
    rows = [
        DigestRow("L-001", "pass", 20.3, "c/L-001.pdf"),
        DigestRow("L-002", "hold", 20.2, "c/L-002.pdf", "dcir_mOhm not measured"),
        DigestRow("L-003", "fail", 17.9, "c/L-003.pdf", "grading_capacity_Ah 17.9 Ah < 20 Ah (reject)"),
        DigestRow("L-004", "pass", 20.4, "c/L-004.pdf"),
    ]
    letter = digest_letter("L", rows, TO, station="s", digest_no=1)
    assert letter.subject == (
        "formgate: lot L, digest 1 \N{EM DASH} 4 cells: 1 fail, 1 hold, 2 pass; yield 50.0 %"
    )
    table = letter.body_text.split("\n\n")[1].splitlines()
    assert [line.split()[0] for line in table[2:]] == [
        "L-003", "grading_capacity_Ah", "L-002", "dcir_mOhm", "L-001", "L-004"
    ]
    assert "Yield:     50.0 % (2 of 4 passed)" in letter.body_text
    assert DATA_CHECK_NOTICE not in letter.body_text


def test_a_digest_says_a_passed_cell_released_over_a_hazard_keeps_its_caution() -> None:
    rows = [
        DigestRow("L-001", "pass", 20.3, "c/L-001~cell.pdf"),
        DigestRow("L-005", "pass", 20.1, "c/L-005~cell.pdf",
                  "released as a concession by quality engineer A accepting temperature_limit: "
                  "thermocouple misread", hazards=("over_temperature",)),
    ]
    body = " ".join(digest_letter("L", rows, TO, station="s", digest_no=1).body_text.split())
    assert ("L-005 pass 20.10 c/L-005~cell.pdf released as a concession by quality engineer A "
            "accepting temperature_limit: thermocouple misread CAUTION: its record shows the "
            "hazard over_temperature (Over-temperature during formation)") in body
    assert "qualified personnel" in body and "cell certificate" in body
    assert body.count("CAUTION") == 1  # the clean pass has none


def test_alert_letter_keeps_lines_and_indents_but_drops_control_characters() -> None:
    text = "rules/demo_lfp.toml, line 14: high is below low.\r\n  Swap the two values.\x07"
    letter = alert_letter(
        "rules edit refused\r\nBcc: x@example.org",
        text,
        TO,
        station="line-1",
        key="rules:demo_lfp:1",
    )
    assert letter.subject == "formgate: ALERT \N{EM DASH} rules edit refused Bcc: x@example.org"
    assert letter.body_text == (
        "rules/demo_lfp.toml, line 14: high is below low.\n"
        "  Swap the two values.\n"
        "\n"
        "Raised by formgate on station line-1. It needs the attention of whoever\n"
        "looks after the station.\n"
    )
    assert letter.kind == "alert" and letter.lot is None


@pytest.mark.parametrize("family", ["lithium-ion", "sodium-ion"])
def test_a_failure_mail_gives_the_general_caution_of_the_rule_sets_family(
    tmp_path: Path, family: str
) -> None:
    from pipeline.report.hazards import general_caution

    base = make_result()
    result = dataclasses.replace(
        base, rule_set=dataclasses.replace(base.rule_set, family=family)
    )
    body = flat(failure_letter(result, str(tmp_path / "c.pdf"), TO, station="line-1").body_text)
    assert flat(general_caution(family)) in body
    assert ("UN 3551" in body) == (family == "sodium-ion")
