"""Every record can be verified: the station records each file it publishes with its SHA-256,
certificates carry their result's verification code, and `formgate verify` tells published
files from changed ones and checks the whole ledger.

Real stations, real files, real SQLite: one station judges two failed cells, a passed one and
a passing retest of the first (whose earlier files move to ``~record-1`` names), and its lot is
reported;
tests that change files or the ledger work on a copy of that station folder.
"""

from __future__ import annotations

import datetime
import hashlib
import io
import json
import shutil
import sqlite3
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pypdf import PdfReader

from pipeline.audit.verify import Verifier, codes_in_pdf
from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from pipeline.report.certificate import build_context
from pipeline.report.result import to_json
from pipeline.report.verification import parse_code, spaced, verification_code
from pipeline.rulebook.book import load_rules_dir
from pipeline.station.lots import close_and_report
from pipeline.station.settings import Settings, read_settings
from pipeline.writing import TEMP_SUFFIX
from tests.golden import cases
from tests.station_kit import (
    REPO,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    start_watch,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow

NOW = datetime.datetime(2026, 12, 4, 12, 0, tzinfo=datetime.UTC)


@dataclass(frozen=True)
class Judged:
    """A station whose cells were judged, published and reported; never changed by a test."""

    settings: Settings

    def outputs(self) -> list[Path]:
        s = self.settings
        return sorted(p for folder in (s.results, s.certificates) for p in folder.rglob("*")
                      if p.is_file())


@pytest.fixture(scope="module")
def judged(tmp_path_factory: pytest.TempPathFactory) -> Judged:
    s = make_station(tmp_path_factory.mktemp("verify") / "st")
    inbox = s.inboxes[0].folder
    with running(s):
        drop(inbox, "k1.csv", cycle_file("K-1", capacity_ah=1.5, seed=1))
        drop(inbox, "k2.csv", cycle_file("K-2", capacity_ah=1.5, seed=2))
        drop(inbox, "k3.csv", cycle_file("K-3", seed=3))
        wait_until(lambda: settled(s, 3), what="three cells judged")
        # a retest that passes: the cell's earlier files move aside, a new decision is chained
        drop(inbox, "k1-retest.csv", cycle_file("K-1", seed=7))
        wait_until(lambda: settled(s, 4), what="the retest judged")
    with Ledger(s.ledger) as ledger:
        close_and_report(s, ledger, load_rules_dir(s.rules_dir), "LOT-A", by="test", now=NOW)
    return Judged(s)


def copy_of(judged: Judged, where: Path) -> Settings:
    """The judged station copied elsewhere, to be changed by one test."""
    shutil.copytree(judged.settings.root, where / "st")
    return read_settings(where / "st")


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def verify(*args: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, str]:
    code = main(["verify", *args])
    out = capsys.readouterr()
    return code, out.out + out.err


def findings(settings: Settings, path: Path, data: bytes) -> tuple[bool, str]:
    with Ledger(settings.ledger) as ledger:
        found = Verifier(settings, ledger).file(path, data)
    return found.verified, "\n".join(f.text for f in found.findings)


# ---- recording ----------------------------------------------------------------------------------


def test_every_published_file_is_recorded_with_the_hash_of_its_bytes(judged: Judged) -> None:
    s = judged.settings
    names = {p.name for p in judged.outputs()}
    assert {"K-1.json", "K-1.pdf", "K-1~record-1.json", "K-1~record-1.pdf", "K-2.json",
            "K-2.pdf", "_lot-report.pdf", "_lot-cells.csv"} <= names
    with Ledger(s.ledger) as ledger:
        for path in judged.outputs():
            row = ledger.published.by_path(str(path.resolve()))
            assert row is not None, f"{path.name} is not recorded as published"
            assert row.sha256 == sha(path), path.name
        kinds = sorted(r.kind for r in ledger.published.every())
        charts = [p for p in judged.outputs() if p.name.startswith("_chart-")]
        assert charts  # the lot report's charts beside it, recorded with it
        assert kinds.count("lot report") == 1 + len(charts) and kinds.count("lot export") == 2  # CSV, Parquet
        # the earlier record's files are recorded again where they moved, under its own result
        first, retest = ledger.results.of_cell("LOT-A", "K-1")
        kept = ledger.published.by_path(str((s.results / "LOT-A" / "K-1~record-1.json").resolve()))
        assert kept is not None and kept.result_id == first.id
        assert kept.sha256 == hashlib.sha256(first.result_json.encode()).hexdigest()
        now = ledger.published.by_path(str((s.certificates / "LOT-A" / "K-1.pdf").resolve()))
        assert now is not None and now.result_id == retest.id and now.kind == "certificate"


def test_a_certificate_carries_the_code_of_the_json_published_with_it(judged: Judged) -> None:
    s = judged.settings
    for cell in ("K-1", "K-2", "K-1~record-1"):
        code = sha(s.results / "LOT-A" / f"{cell}.json")[:16]
        pdf = (s.certificates / "LOT-A" / f"{cell}.pdf").read_bytes()
        text = " ".join("".join(p.extract_text() for p in PdfReader(io.BytesIO(pdf)).pages).split())
        assert f"Verification code {spaced(code)}" in text
        assert f"formgate verify STATION {code}" in text
        assert codes_in_pdf(pdf) == [code]  # in its metadata too, for a changed copy


def test_the_code_is_a_function_of_the_json_alone() -> None:
    result = cases.fail_result()
    context = build_context(result)
    assert context["verification"] == {
        "code": verification_code(to_json(result)),
        "spaced": spaced(verification_code(to_json(result))),
    }
    assert build_context(result, "00112233aabbccdd")["verification"] == {
        "code": "00112233aabbccdd", "spaced": "0011 2233 aabb ccdd",
    }
    assert parse_code("0011 2233 AABB ccdd") == "00112233aabbccdd"


def test_formgate_check_certificates_carry_the_code_and_stay_reproducible(tmp_path: Path) -> None:
    source = tmp_path / "c.csv"
    source.write_bytes(cycle_file("CH-1"))
    rules = make_station(tmp_path / "st").rules_dir  # the station kit's small rule set
    runs = []
    for n in (1, 2):
        out = tmp_path / f"out{n}"
        assert main(["check", str(source), "--rules", str(rules), "--out", str(out),
                     "--analysed-at", "2026-12-04T08:00:00+00:00"]) == 0
        runs.append((out / "results" / "LOT-A" / "CH-1.json", out / "certificates" / "LOT-A" / "CH-1.pdf"))
    (json_1, pdf_1), (_, pdf_2) = runs
    assert pdf_1.read_bytes() == pdf_2.read_bytes()
    assert codes_in_pdf(pdf_1.read_bytes()) == [sha(json_1)[:16]]


# ---- verifying files and codes ------------------------------------------------------------------


def test_verify_accepts_every_published_file(judged: Judged, capsys: pytest.CaptureFixture[str]) -> None:
    files = [str(p) for p in judged.outputs()]
    code, out = verify(str(judged.settings.root), *files, capsys=capsys)
    assert code == 0, out
    assert out.count(": verified") == len(files) and "NOT VERIFIED" not in out
    pdf = judged.settings.certificates / "LOT-A" / "K-2.pdf"
    section = out.split(f"{pdf}: verified")[1].split(": verified")[0]
    assert "the certificate of cell K-2 (lot LOT-A), as published" in section
    assert "its result JSON results/LOT-A/K-2.json: same bytes as recorded" in section
    assert "judged from k2.csv" in section and "archived as archive/" in section
    assert "rule set test-cells revision 1" in section and "its exact text is in the ledger" in section


def test_a_station_copied_elsewhere_verifies_its_files_at_their_place(
    judged: Judged, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The ledger records where the station published each file; a station folder copied for an
    audit (or restored to another disk) still verifies its own files as at their place, not as
    copies of the files at the old paths."""
    copied = copy_of(judged, tmp_path)
    pdf = copied.certificates / "LOT-A" / "K-2.pdf"
    code, out = verify(str(copied.root), str(pdf), capsys=capsys)
    assert code == 0, out
    assert "a copy of" not in out
    # a copy outside the station's folders is still named as one
    elsewhere = tmp_path / "mailed" / "K-2.pdf"
    elsewhere.parent.mkdir()
    shutil.copy(pdf, elsewhere)
    code, out = verify(str(copied.root), str(elsewhere), capsys=capsys)
    assert code == 0 and "a copy of certificates/LOT-A/K-2.pdf" in out, out


def test_a_verification_code_finds_the_result_and_its_certificate(
    judged: Judged, capsys: pytest.CaptureFixture[str]
) -> None:
    s = judged.settings
    code = sha(s.results / "LOT-A" / "K-2.json")[:16]
    status, out = verify(str(s.root), spaced(code), capsys=capsys)
    assert status == 0, out
    assert "its result JSON results/LOT-A/K-2.json: same bytes as recorded" in out
    assert "its certificate certificates/LOT-A/K-2.pdf: same bytes as recorded" in out
    assert "fail for cell K-2 of lot LOT-A" in out
    status, out = verify(str(s.root), "0123456789abcdef", capsys=capsys)
    assert status == 1 and "no file this station published has this verification code" in out


def test_one_flipped_byte_in_a_certificate_is_caught_and_named(judged: Judged, tmp_path: Path) -> None:
    s = judged.settings
    pdf = s.certificates / "LOT-A" / "K-2.pdf"
    data = bytearray(pdf.read_bytes())
    data[10] ^= 0x01  # in the header's comment line: the file still reads as a PDF
    verified, text = findings(s, pdf, bytes(data))
    assert not verified
    assert "its bytes are not those of any file this station published" in text
    assert "the station published the certificate of cell K-2 (lot LOT-A) at this path" in text
    assert f"with SHA-256 {sha(pdf)}: this file was changed since" in text
    # a changed copy elsewhere is named by the verification code in its metadata
    copy = tmp_path / "mailed.pdf"
    copy.write_bytes(bytes(data))
    verified, text = findings(s, copy, bytes(data))
    assert not verified
    assert f"it carries verification code {spaced(sha(s.results / 'LOT-A' / 'K-2.json')[:16])}" in text
    assert "the certificate published with it is certificates/LOT-A/K-2.pdf" in text
    assert "this file differs from it" in text


def test_an_edited_value_in_a_result_json_is_caught_and_listed(judged: Judged, tmp_path: Path) -> None:
    s = judged.settings
    path = s.results / "LOT-A" / "K-2.json"
    doc = json.loads(path.read_text(encoding="utf-8"))
    published_capacity = doc["metrics"]["grading_capacity_Ah"]
    assert json.dumps(doc, indent=2, ensure_ascii=False) + "\n" == path.read_text(encoding="utf-8")
    doc["verdict"], doc["metrics"]["grading_capacity_Ah"] = "pass", 2.0
    edited = json.dumps(doc, indent=2, ensure_ascii=False) + "\n"  # laid out as published
    verified, text = findings(s, path, edited.encode())
    assert not verified and "this file was changed since" in text
    assert "verdict: \"pass\" in this file, \"fail\" as published" in text
    assert f"metrics.grading_capacity_Ah: 2.0 in this file, {published_capacity} as published" in text
    # elsewhere, it still names its cell and input, and so the result it claims to be
    copy = tmp_path / "K-2.json"
    copy.write_text(edited, encoding="utf-8")
    verified, text = findings(s, copy, edited.encode())
    assert not verified
    assert "it names cell K-2 of lot LOT-A and its input: the result published for it is " \
           "results/LOT-A/K-2.json" in text


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(which=st.sampled_from(["K-2.json", "K-2.pdf", "K-1~record-1.pdf", "_lot-cells.csv"]),
       where=st.floats(min_value=0.0, max_value=1.0, exclude_max=True),
       flip=st.integers(min_value=1, max_value=255))
def test_any_single_byte_change_of_a_published_file_is_not_verified(
    judged: Judged, which: str, where: float, flip: int
) -> None:
    s = judged.settings
    folder = s.results if which.endswith((".json", ".csv")) else s.certificates
    path = folder / "LOT-A" / which
    data = bytearray(path.read_bytes())
    data[int(where * len(data))] ^= flip
    verified, text = findings(s, path, bytes(data))
    assert not verified
    assert "this file was changed since" in text  # at its own path: named as that file


# ---- the whole ledger ---------------------------------------------------------------------------


def test_the_whole_ledger_verifies_and_prints_its_last_hashes(
    judged: Judged, capsys: pytest.CaptureFixture[str]
) -> None:
    status, out = verify(str(judged.settings.root), "--ledger", capsys=capsys)
    assert status == 0, out
    assert "decisions: " in out and "the hash chain is unbroken" in out
    assert f"published files: {len(judged.outputs())}, each on disk with the bytes recorded" in out
    assert "archived inputs: 4, each with the SHA-256 the ledger recorded" in out
    with Ledger(judged.settings.ledger) as ledger:
        last = ledger.db.one("SELECT id, row_hash FROM decisions ORDER BY id DESC LIMIT 1")
    assert last is not None and f"decisions: last hash {last['row_hash']} (row {last['id']})" in out
    assert "cannot be seen from inside the ledger" in out


def test_a_decision_row_edited_or_removed_by_hand_is_named(
    judged: Judged, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = copy_of(judged, tmp_path)
    with sqlite3.connect(s.ledger) as db:
        ids = [r[0] for r in db.execute("SELECT id FROM decisions ORDER BY id")]
        failed, cell = db.execute(
            "SELECT id, cell_id FROM decisions WHERE verdict = 'fail' ORDER BY id"
        ).fetchone()
        assert len(ids) == 4 and failed != ids[-1]
        db.execute("UPDATE decisions SET verdict = 'pass' WHERE id = ?", (failed,))
    status, out = verify(str(s.root), "--ledger", capsys=capsys)
    assert status == 1
    assert (f"decisions row {failed}: its content does not match its hash (changed after it was "
            f"recorded) [it now says: cell {cell} of lot LOT-A, verdict pass]") in out
    middle = next(i for i in ids[1:-1] if i != failed)
    with sqlite3.connect(s.ledger) as db:
        db.execute("UPDATE decisions SET verdict = 'fail' WHERE id = ?", (failed,))
        db.execute("PRAGMA foreign_keys = OFF")
        db.execute("DELETE FROM decisions WHERE id = ?", (middle,))
    status, out = verify(str(s.root), "--ledger", capsys=capsys)
    assert status == 1
    assert f"decisions: no row {middle} between rows" in out
    assert "it does not follow the row before it" in out
    assert f"row {failed}: its content" not in out  # the edit was undone: only the removal shows


def test_changed_and_missing_files_and_a_changed_archived_input_are_listed(
    judged: Judged, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = copy_of(judged, tmp_path)
    archived = next(s.archive.rglob("*_k2.csv"))
    recorded = sha(archived)
    with archived.open("ab") as fh:
        fh.write(b"0,0,0,0\n")
    (s.results / "LOT-A" / "K-1.json").unlink()
    report = s.certificates / "LOT-A" / "_lot-report.pdf"
    report.write_bytes(report.read_bytes() + b"\n")
    status, out = verify(str(s.root), "--ledger", capsys=capsys)
    assert status == 1
    assert "its result JSON results/LOT-A/K-1.json: missing" in out
    assert "its lot report certificates/LOT-A/_lot-report.pdf: changed (its SHA-256 is now" in out
    assert f"(k2.csv), archived as {archived.relative_to(s.root)}: changed" in out
    # and the certificate judged from that input no longer verifies, for that reason alone
    status, out = verify(str(s.root), str(s.certificates / "LOT-A" / "K-2.pdf"), capsys=capsys)
    assert status == 1
    assert "ok  the certificate of cell K-2 (lot LOT-A), as published" in out
    assert f"!!  judged from k2.csv (SHA-256 {recorded}), archived as" in out
    assert ": changed (its SHA-256 is now" in out


def test_usage_problems_exit_2(judged: Judged, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert verify(str(tmp_path / "nowhere"), "--ledger", capsys=capsys)[0] == 2
    status, out = verify(str(judged.settings.root), "not-a-file.pdf", capsys=capsys)
    assert status == 2 and "not-a-file.pdf" in out and "verification code" in out
    assert verify(str(judged.settings.root), capsys=capsys)[0] == 2
    assert verify(str(judged.settings.root), str(tmp_path), capsys=capsys)[0] == 2  # a folder


def test_the_command_runs_as_a_program(judged: Judged) -> None:
    pdf = judged.settings.certificates / "LOT-A" / "K-1.pdf"
    done = subprocess.run(
        [sys.executable, "-m", "pipeline", "verify", str(judged.settings.root), str(pdf)],
        cwd=REPO, capture_output=True, text=True, check=False,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert done.stdout.startswith(f"{pdf}: verified\n")


# ---- a crash between writing and recording ------------------------------------------------------


def test_a_crash_between_writing_and_recording_is_recorded_by_the_restart(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    drop(s.inboxes[0].folder, "c.csv", cycle_file("CR-1", capacity_ah=1.5))
    proc = start_watch(s.root, {"FORMGATE_FAULT": "after_write"})
    try:
        proc.wait(120)
    finally:
        stop_watch(proc)
    assert proc.returncode == -9, "the station did not reach the fault point"
    json_path, pdf_path = s.results / "LOT-A" / "CR-1.json", s.certificates / "LOT-A" / "CR-1.pdf"
    assert json_path.exists() and not pdf_path.exists()  # its certificate is rendered later
    with Ledger(s.ledger) as ledger:
        assert ledger.published.every() == []  # written, not yet recorded
        assert [r.state for r in ledger.inputs.in_state("judged")] == ["judged"]
        assert ledger.certificates.backlog().waiting == 1  # promised in the same transaction
    again = start_watch(s.root)
    try:
        wait_until(lambda: settled(s, 1), timeout_s=120, what="recovery after the write")
    finally:
        assert stop_watch(again) == 0
    with Ledger(s.ledger) as ledger:
        rows = ledger.published.every()
        for row in rows:  # the record's files, and the cell's own certificate and JSON
            assert row.sha256 == sha(Path(row.path)) and row.cell_id == "CR-1"
        record = [r for r in rows if r.kind in ("result", "certificate")]
        assert sorted((r.kind, Path(r.path)) for r in record) == [
            ("certificate", pdf_path), ("result", json_path)
        ]
        assert {r.result_id for r in record} == {ledger.results.of_cell("LOT-A", "CR-1")[0].id}
    code = main(["verify", str(s.root), str(pdf_path), str(json_path), "--ledger"])
    assert code == 0


@pytest.mark.parametrize("fault", ["mid_render", "after_certificate"])
def test_a_crash_while_a_queued_certificate_is_written_renders_it_again_at_the_restart(
    tmp_path: Path, fault: str
) -> None:
    s = make_station(tmp_path / "st")
    drop(s.inboxes[0].folder, "c.csv", cycle_file("CQ-1", capacity_ah=1.5))
    proc = start_watch(s.root, {"FORMGATE_FAULT": fault})
    try:
        proc.wait(120)
    finally:
        stop_watch(proc)
    assert proc.returncode == -9, "the station did not reach the fault point"
    pdf_path = s.certificates / "LOT-A" / "CQ-1.pdf"
    with Ledger(s.ledger) as ledger:
        assert ledger.certificates.backlog().waiting == 1  # the verdict is out, its PDF not done
        assert [r.state for r in ledger.inputs.in_state("archived")] == ["archived"]
    again = start_watch(s.root)
    try:
        wait_until(lambda: settled(s, 1), timeout_s=120, what="the certificate rendered again")
    finally:
        assert stop_watch(again) == 0
    assert not [p for p in s.certificates.rglob("*") if p.name.endswith(TEMP_SUFFIX)]  # cleaned
    with Ledger(s.ledger) as ledger:
        (result,) = ledger.results.of_cell("LOT-A", "CQ-1")
        assert ledger.certificates.outcome(result.id)[0] == "rendered"
        latest = ledger.published.by_path(str(pdf_path.resolve()))
        assert latest is not None and latest.sha256 == sha(pdf_path)
        assert latest.kind == "certificate" and latest.result_id == result.id
    assert main(["verify", str(s.root), str(pdf_path), "--ledger"]) == 0


def test_a_cell_certificate_is_verified_with_the_decision_it_shows(
    judged: Judged, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cell_pdf = next(judged.settings.certificates.rglob("K-2~cell.pdf"))
    with Ledger(judged.settings.ledger) as ledger:
        row = ledger.published.by_path(str(cell_pdf.resolve()))
    assert row is not None and row.kind == "cell certificate" and row.decision_id is not None
    status, out = verify(str(judged.settings.root), str(cell_pdf), capsys=capsys)
    assert status == 0, out
    assert f"it shows decision {row.decision_id}: fail" in out
    assert f"ok  decisions row {row.decision_id} holds its place in the ledger's hash chain" in out
    # the input bytes the decision rests on, re-hashed in the archive, and the rule set's text
    k2 = sha(next(judged.settings.archive.rglob("*_k2.csv")))
    assert f"ok  it rests on formation and grading: k2.csv (SHA-256 {k2}), archived as archive/" in out
    cell_json = json.loads(next(judged.settings.results.rglob("K-2~cell.json")).read_text("utf-8"))
    rules = cell_json["rule_set"]
    assert (f"ok  rule set {rules['name']} revision {rules['revision']} (SHA-256 {rules['sha256']}): "
            "its exact text is in the ledger") in out
    status, shown = verify(str(judged.settings.root), str(next(
        judged.settings.results.rglob("K-2~cell.json"))), capsys=capsys)
    assert status == 0 and f"k2.csv (SHA-256 {k2}), archived as" in shown, shown
    # an archived input changed since: the cell certificate resting on it is not verified
    s = copy_of(judged, tmp_path / "input")
    archived = next(s.archive.rglob("*_k2.csv"))
    archived.write_bytes(archived.read_bytes() + b"\n")
    status, out = verify(str(s.root), str(s.certificates / "LOT-A" / "K-2~cell.pdf"), capsys=capsys)
    assert status == 1 and "k2.csv" in out and ": changed (its SHA-256 is now" in out, out
    s = copy_of(judged, tmp_path)
    with sqlite3.connect(s.ledger) as db:
        db.execute("UPDATE decisions SET reason = 'released' WHERE id = ?", (row.decision_id,))
    status, out = verify(str(s.root), str(s.certificates / "LOT-A" / "K-2~cell.pdf"), capsys=capsys)
    assert status == 1
    assert f"!!  decisions row {row.decision_id}: its content does not match its hash" in out
