"""The ledger on real SQLite files: states, duplicates, versions, atomic records, mail, digests."""

from __future__ import annotations

import datetime
import hashlib
import json
import multiprocessing
import os
import sqlite3
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, precondition, rule

from pipeline.acceptance.results import CheckResult, Outcome
from pipeline.acceptance.rules import Hazard, Severity, Window
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrate import LedgerError, applied_migrations, migrate, sql_migration
from pipeline.ledger.migrations import MIGRATIONS, SCHEMA_VERSION
from pipeline.ledger.rows import CheckRowData, InputRow
from pipeline.mail.letters import Letter
from pipeline.model import SourceRef

T0 = datetime.datetime(2026, 3, 2, 6, 0, tzinfo=datetime.UTC)
LOT = "DEMO-LOT-07"
QUALITY = ("quality@example.com",)
CHECKS = (
    CheckRowData("capacity", "grading_capacity_Ah", 2.01, 1.9, 2.2, "in_window", "reject"),
    CheckRowData("ice", "first_cycle_efficiency", 0.91, 0.8, 0.96, "in_window", "review"),
    CheckRowData(
        "drift",
        "rest_voltage_drift_mV_per_h",
        -4.0,
        -1.0,
        None,
        "out_of_window",
        "reject",
        "internal_short",
    ),
)


ME = "sender-1"  # the owner id of the claims these tests make
LEASE = datetime.timedelta(minutes=10)


def minutes(n: float) -> datetime.datetime:
    return T0 + datetime.timedelta(minutes=n)


def sha(content: str) -> str:
    return hashlib.sha256(content.encode()).hexdigest()


def claim(
    ledger: Ledger, content: str, name: str, *, work: str | None = None, at: datetime.datetime = T0
) -> tuple[InputRow, InputRow | None]:
    return ledger.inputs.claim(
        sha256=sha(content),
        name=name,
        size=len(content),
        arrived_at=at,
        work_path=work or f"work/{name}",
    )


def mail(message_id: str, kind: str = "failure", lot: str | None = None) -> Letter:
    return Letter(kind, message_id, QUALITY, f"{kind} {message_id}", "text", None, lot)


def record(
    ledger: Ledger,
    input_id: int,
    *,
    verdict: str = "pass",
    lot: str = LOT,
    cell: str = "DEMO-0001",
    mails: Sequence[Letter] = (),
    checks: Sequence[CheckRowData] = CHECKS,
    at: datetime.datetime = T0,
) -> int:
    return ledger.results.record(
        input_id,
        cell_id=cell,
        lot=lot,
        verdict=verdict,
        hazards=(),
        result_json=json.dumps({"verdict": verdict, "cell": cell}),
        checks=checks,
        rule_set_name="demo_lfp",
        rule_set_revision="3",
        rule_set_sha256=sha("rules"),
        analysed_at=at,
        json_path=f"results/{lot}/{cell}.json",
        pdf_path=f"certificates/{lot}/{cell}.pdf",
        mails=mails,
    )


def finish(ledger: Ledger, input_id: int, at: datetime.datetime = T0) -> None:
    """Publish and archive a judged input, as the station does after writing its outputs."""
    ledger.inputs.mark_published(input_id)
    ledger.inputs.mark_final(input_id, "archived", f"archive/2026-03-02/{input_id}.csv", now=at)


@pytest.fixture
def ledger(tmp_path: Path) -> Iterator[Ledger]:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as opened:
        yield opened


def count(path: Path, table: str) -> int:
    conn = sqlite3.connect(path)
    try:
        return int(conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0])
    finally:
        conn.close()


# ---- opening, pragmas, migrations ----------------------------------------------------------


def test_new_ledger_uses_wal_full_sync_foreign_keys_and_records_its_migration(
    tmp_path: Path,
) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        conn = ledger.db.conn
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
        assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert conn.execute("PRAGMA busy_timeout").fetchone()[0] == 30_000
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert applied_migrations(conn) == [(m.name, "2026-03-02T06:00:00.000000+00:00") for m in MIGRATIONS]
    # opening again applies nothing and keeps the record as it was
    with Ledger(path, now=minutes(60)) as again:
        assert applied_migrations(again.db.conn) == [
            (m.name, "2026-03-02T06:00:00.000000+00:00") for m in MIGRATIONS
        ]


def test_database_at_version_1_upgrades_and_is_then_too_new_for_this_code(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        claim(ledger, "cell one", "c1.csv")
    second = sql_migration("0099_inputs_operator_note", "ALTER TABLE inputs ADD COLUMN note TEXT")
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        done = migrate(
            conn,
            (*MIGRATIONS, second),
            applied_at="2026-04-01T00:00:00.000000+00:00",
            where=SourceRef(str(path)),
        )
        assert done == ["0099_inputs_operator_note"]
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION + 1
        assert [name for name, _ in applied_migrations(conn)] == [
            *(m.name for m in MIGRATIONS),
            "0099_inputs_operator_note",
        ]
        assert conn.execute("SELECT name, note FROM inputs").fetchall() == [("c1.csv", None)]
    finally:
        conn.close()
    with pytest.raises(LedgerError) as caught:
        Ledger(path, now=T0)
    assert str(caught.value) == (
        f"{path}: the ledger was written by a newer formgate (schema version {SCHEMA_VERSION + 1}, "
        "migrations this formgate does not know: 0099_inputs_operator_note; this formgate knows up "
        f"to version {SCHEMA_VERSION}).\n"
        "  Run the newer formgate, or upgrade this installation; a ledger is never downgraded."
    )


def test_a_failing_migration_leaves_the_database_at_the_previous_version(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    Ledger(path, now=T0).close()
    broken = sql_migration(
        "0099_broken", "CREATE TABLE half_done (x TEXT)", "SELECT * FROM no_such_table"
    )
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        with pytest.raises(sqlite3.OperationalError):
            migrate(conn, (*MIGRATIONS, broken), applied_at="x", where=SourceRef(str(path)))
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_schema WHERE type = 'table'")}
        assert "half_done" not in tables
        assert [name for name, _ in applied_migrations(conn)] == [m.name for m in MIGRATIONS]
    finally:
        conn.close()
    Ledger(path, now=T0).close()  # still opens with the code it was made by


def test_a_current_ledger_opens_and_reads_while_another_process_holds_its_write_lock(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A real lock: a second connection holds ``BEGIN IMMEDIATE`` (a backup, a manual sqlite3
    session, the station in a long write). With the busy timeout lowered, a wait for the lock
    shows at once instead of after 30 s."""
    from pipeline.ledger import connection

    path, older = tmp_path / "ledger.sqlite", tmp_path / "older.sqlite"
    with Ledger(path, now=T0) as ledger:
        ledger.outbox.queue(Letter("alert", "<lock-1@demo.example>", QUALITY, "alert", "text"), now=T0)
    conn = sqlite3.connect(older, isolation_level=None)
    migrate(conn, MIGRATIONS[:-1], applied_at="x", where=SourceRef(str(older)))
    conn.close()
    monkeypatch.setattr(connection, "BUSY_TIMEOUT_MS", 200)
    holders = [sqlite3.connect(p, isolation_level=None) for p in (path, older)]
    for holder in holders:
        holder.execute("BEGIN IMMEDIATE")
    try:
        # the schema is current: checking it needs no write lock, and reading goes on
        with Ledger(path, now=minutes(5)) as ledger:
            assert ledger.outbox.counts()["pending"] == 1
            assert [name for name, _ in applied_migrations(ledger.db.conn)] == [
                m.name for m in MIGRATIONS
            ]
            with pytest.raises(sqlite3.OperationalError, match="locked"):  # writing still waits
                ledger.outbox.queue(Letter("alert", "<lock-2@demo.example>", QUALITY, "a", "t"),
                                    now=minutes(5))
        # a ledger a migration behind needs the lock to migrate: refused once the wait is over
        with pytest.raises(LedgerError, match="another process kept the ledger locked"):
            Ledger(older, now=minutes(5))
    finally:
        for holder in holders:
            holder.execute("ROLLBACK")
            holder.close()
    with Ledger(older, now=minutes(6)) as ledger:  # the lock gone, it migrates
        assert ledger.db.conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION


def test_a_ledger_claiming_a_future_version_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    Ledger(path, now=T0).close()
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    conn.close()
    with pytest.raises(LedgerError) as caught:
        Ledger(path, now=T0)
    assert str(caught.value) == (
        f"{path}: the ledger was written by a newer formgate (schema version {SCHEMA_VERSION + 1}, migrations this "
        f"formgate does not know: none recorded; this formgate knows up to version {SCHEMA_VERSION}).\n"
        "  Run the newer formgate, or upgrade this installation; a ledger is never downgraded."
    )


def test_a_file_that_is_not_a_database_is_refused_with_what_to_do(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    path.write_bytes(b"cell_id,lot\n" * 200)
    with pytest.raises(LedgerError) as caught:
        Ledger(path, now=T0)
    assert str(caught.value) == (
        f"{path}: the ledger is damaged or not an SQLite database (file is not a database).\n"
        "  Move the file aside and restore the latest backup; formgate starts a new empty ledger "
        "if none is there."
    )


def test_another_programs_database_is_not_taken_for_a_ledger(tmp_path: Path) -> None:
    path = tmp_path / "other.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE inputs (x)")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerError) as caught:
        Ledger(path, now=T0)
    assert str(caught.value) == (
        f"{path}: this file is an SQLite database but not a formgate ledger.\n"
        "  Point the station at a new file name; formgate creates its ledger itself."
    )


def test_times_without_a_time_zone_are_refused(ledger: Ledger) -> None:
    with pytest.raises(ValueError, match="timezone-aware"):
        claim(ledger, "x", "x.csv", at=datetime.datetime(2026, 3, 2, 6, 0))


def test_a_folder_that_does_not_exist_is_refused_with_what_to_do(tmp_path: Path) -> None:
    path = tmp_path / "no-such-folder" / "ledger.sqlite"
    with pytest.raises(LedgerError) as caught:
        Ledger(path, now=T0)
    assert str(caught.value) == (
        f"{path}: cannot open the ledger (unable to open database file).\n"
        "  Check that the folder exists and is writable."
    )


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (
            lambda lg: lg.inputs.claim(
                sha256="ABC", name="a.csv", size=1, arrived_at=T0, work_path="w"
            ),
            "sha256 must be 64 lowercase hex digits",
        ),
        (
            lambda lg: lg.inputs.claim(
                sha256=sha("a"), name="in/a.csv", size=1, arrived_at=T0, work_path="w"
            ),
            "name must be a file's base name as text",
        ),
        (lambda lg: lg.inputs.in_state("done"), "unknown input states"),
        (lambda lg: lg.inputs.mark_final(1, "deleted", "x"), "final state must be one of"),
        (lambda lg: lg.inputs.mark_published(99), "no input with id 99"),
        (lambda lg: lg.inputs.record_error(1, ""), "record_error needs a reason"),
        (lambda lg: lg.outbox.mark_sent(99, owner=ME, now=T0, reply="250"), "no mail with id 99"),
        (lambda lg: lg.outbox.requeue(99, now=T0), "mail 99 is not parked"),
        (lambda lg: lg.digests.mark(LOT, [], 99), "mail 99 is not a digest"),
    ],
)
def test_wrong_arguments_are_refused(ledger: Ledger, call: object, message: str) -> None:
    claim(ledger, "a", "a.csv")
    with pytest.raises(ValueError, match=message):
        call(ledger)  # type: ignore[operator]


# ---- inputs: duplicates, versions, restarts -------------------------------------------------


def test_same_bytes_again_are_a_duplicate_pointing_to_the_first(ledger: Ledger) -> None:
    first, earlier = claim(ledger, "cell A bytes", "a.csv")
    assert (first.state, first.version, earlier) == ("claimed", 1, None)
    record(ledger, first.id)
    finish(ledger, first.id)
    again, earlier = claim(ledger, "cell A bytes", "a.csv")  # same work path, first one is final
    copy, earlier_copy = claim(ledger, "cell A bytes", "copy of a.csv")
    assert again.id != first.id and copy.id not in (first.id, again.id)
    for row, pointed in ((again, earlier), (copy, earlier_copy)):
        assert row.state == "duplicate"
        assert row.duplicate_of == first.id
        assert pointed is not None and pointed.id == first.id
        assert row.result_id is None and row.supersedes is None
    assert again.version == 1 and copy.version == 1
    ledger.inputs.mark_final(again.id, "duplicate", "archive/2026-03-02/a.csv.dup1", now=minutes(5))
    final = ledger.inputs.get(again.id)
    assert final is not None
    assert (final.state, final.final_path) == ("duplicate", "archive/2026-03-02/a.csv.dup1")
    assert ledger.outbox.due(minutes(10)) == []  # nothing mailed for a duplicate


def test_same_name_new_bytes_is_a_new_version_superseding_the_old_result(ledger: Ledger) -> None:
    v1, _ = claim(ledger, "first test of cell A", "a.csv")
    r1 = record(ledger, v1.id, verdict="fail")
    finish(ledger, v1.id)
    v2, earlier = claim(ledger, "retest of cell A", "a.csv")
    assert earlier is None
    assert (v2.state, v2.version, v2.supersedes) == ("claimed", 2, v1.id)
    r2 = record(ledger, v2.id, verdict="pass", at=minutes(30))
    old, new = ledger.results.get(r1), ledger.results.get(r2)
    assert old is not None and new is not None
    assert old.superseded_by == r2
    assert new.superseded_by is None
    v3, _ = claim(ledger, "third test of cell A", "a.csv")
    assert (v3.version, v3.supersedes) == (3, v2.id)


def test_a_superseding_result_recorded_first_still_leaves_one_current_result(
    ledger: Ledger,
) -> None:
    v1, _ = claim(ledger, "v1 bytes", "b.csv")
    v2, _ = claim(ledger, "v2 bytes", "b.csv")
    r2 = record(ledger, v2.id)
    r1 = record(ledger, v1.id)  # a slow worker finishes the older version last
    assert ledger.results.get(r1).superseded_by == r2  # type: ignore[union-attr]
    assert ledger.results.get(r2).superseded_by is None  # type: ignore[union-attr]


def _staged(ledger: Ledger, input_id: int, cell: str, stage: str | None) -> int:
    doc = {"cell": cell} | ({"stages": [stage]} if stage else {})
    return ledger.results.record(
        input_id, cell_id=cell, lot=LOT, verdict="pass", hazards=(), result_json=json.dumps(doc),
        checks=CHECKS, rule_set_name="demo_lfp", rule_set_revision="3",
        rule_set_sha256=sha("rules"), analysed_at=T0, json_path="r.json", pdf_path=None, mails=(),
    )


def test_a_retest_under_another_file_name_supersedes_the_record_of_its_stage_only(
    ledger: Ledger,
) -> None:
    formation = _staged(ledger, claim(ledger, "f", "S-1_formation.csv")[0].id, "S-1", "formation")
    grading = _staged(ledger, claim(ledger, "g", "S-1_grading.csv")[0].id, "S-1", "grading")
    retest_in = claim(ledger, "g2", "S-1_grading_retest.csv")[0]
    other_in = claim(ledger, "w", "S-2.csv")[0]  # another cell, whole program
    retest = _staged(ledger, retest_in.id, "S-1", "grading")
    whole = _staged(ledger, other_in.id, "S-2", None)
    superseded = {r: ledger.results.get(r).superseded_by for r in (formation, grading, retest, whole)}  # type: ignore[union-attr]
    assert superseded == {formation: None, grading: retest, retest: None, whole: None}


def test_bytes_seen_only_in_quarantine_are_judged_again_as_a_new_version(ledger: Ledger) -> None:
    bad, _ = claim(ledger, "cell C bytes", "c.csv")
    ledger.inputs.record_error(bad.id, "c.csv: no rule set covers cell type 'DEMO-X9'")
    ledger.inputs.mark_final(bad.id, "quarantined", "quarantine/c.csv", now=minutes(1))
    retry, earlier = claim(ledger, "cell C bytes", "c.csv", at=minutes(60))
    assert earlier is None
    assert (retry.state, retry.version, retry.supersedes) == ("claimed", 2, bad.id)
    # and a copy arriving while the retry is in flight is a duplicate of the retry
    copy, earlier = claim(ledger, "cell C bytes", "c.csv", work="work/c (2).csv")
    assert copy.state == "duplicate" and earlier is not None and earlier.id == retry.id


def test_claiming_the_same_file_again_after_a_restart_returns_the_same_row(ledger: Ledger) -> None:
    row, _ = claim(ledger, "cell D", "d.csv")
    again, earlier = claim(ledger, "cell D", "d.csv")
    assert again == row and earlier is None
    assert ledger.inputs.by_work_path("work/d.csv") == row
    dup, first = claim(ledger, "cell D", "d.csv", work="work/d-copy.csv")
    dup_again, first_again = claim(ledger, "cell D", "d.csv", work="work/d-copy.csv")
    assert dup_again == dup and first_again == first
    assert [r.id for r in ledger.inputs.in_state("claimed", "duplicate")] == [row.id, dup.id]


def test_states_only_move_forward(ledger: Ledger) -> None:
    row, _ = claim(ledger, "cell E", "e.csv")
    with pytest.raises(ValueError, match="only a judged input can be published"):
        ledger.inputs.mark_published(row.id)
    with pytest.raises(ValueError, match="cannot become 'archived'"):
        ledger.inputs.mark_final(row.id, "archived", "archive/e.csv")
    with pytest.raises(ValueError, match="without a reason"):
        ledger.inputs.mark_final(row.id, "quarantined", "quarantine/e.csv")
    record(ledger, row.id)
    ledger.inputs.mark_published(row.id)
    ledger.inputs.mark_published(row.id)  # again after a restart: no-op
    ledger.inputs.mark_final(row.id, "archived", "archive/e.csv", now=minutes(2))
    ledger.inputs.mark_final(row.id, "archived", "archive/e.csv", now=minutes(3))  # no-op
    with pytest.raises(ValueError, match="already final"):
        ledger.inputs.mark_final(row.id, "archived", "archive/elsewhere.csv")
    dup, _ = claim(ledger, "cell E", "e.csv")
    with pytest.raises(ValueError, match="only a claimed input can be judged"):
        record(ledger, dup.id)
    assert ledger.inputs.get(row.id).final_at == minutes(2)  # type: ignore[union-attr]


# ---- results ---------------------------------------------------------------------------------


def test_record_result_is_all_or_nothing(ledger: Ledger) -> None:
    row, _ = claim(ledger, "cell F", "f.csv")
    broken = (*CHECKS, CheckRowData("dcir", "dcir_mOhm", 31.0, None, 40.0, "mostly fine", "reject"))
    with pytest.raises(sqlite3.IntegrityError, match="CHECK constraint failed"):
        record(ledger, row.id, verdict="fail", mails=[mail("<f-1@demo.example>")], checks=broken)
    path = ledger.path
    assert [count(path, t) for t in ("results", "checks", "outbox")] == [0, 0, 0]
    assert ledger.inputs.get(row.id).state == "claimed"  # type: ignore[union-attr]
    result_id = record(ledger, row.id, verdict="fail", mails=[mail("<f-1@demo.example>")])
    assert ledger.results.checks(result_id) == list(CHECKS)
    assert [count(path, t) for t in ("results", "checks", "outbox")] == [1, 3, 1]


def _die_while_recording(path: str) -> None:
    """Child process: start record_result and end the process abruptly inside its transaction."""

    class Fatal:
        @property
        def rule_id(self) -> str:
            os._exit(9)  # no rollback, no close: as if the station were killed here

    with Ledger(Path(path), now=T0) as ledger:
        row, _ = claim(ledger, "cell killed", "killed.csv")
        record(
            ledger,
            row.id,
            verdict="fail",
            mails=[mail("<killed@demo.example>")],
            checks=[*CHECKS, Fatal()],  # type: ignore[list-item]
        )


def test_a_process_killed_inside_record_result_leaves_no_trace_of_it(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    child = multiprocessing.get_context("spawn").Process(
        target=_die_while_recording, args=(str(path),)
    )
    child.start()
    child.join(60)
    assert child.exitcode == 9
    with Ledger(path, now=T0) as ledger:
        assert ledger.integrity_ok()
        (row,) = ledger.inputs.in_state("claimed")  # the claim had committed; the result had not
        assert row.result_id is None
        assert [count(path, t) for t in ("results", "checks", "outbox")] == [0, 0, 0]
        result_id = record(ledger, row.id, verdict="fail", mails=[mail("<killed@demo.example>")])
        assert ledger.inputs.get(row.id).result_id == result_id  # type: ignore[union-attr]


def test_check_rows_are_taken_from_the_judge_s_check_results() -> None:
    check = CheckResult(
        "ocv_drift",
        "rest_voltage_drift_mV_per_h",
        -3.5,
        Window(-1.0, None),
        Outcome.OUT_OF_WINDOW,
        Severity.REJECT,
        Hazard.INTERNAL_SHORT,
        "falls too fast",
    )
    assert CheckRowData.from_check(check) == CheckRowData(
        "ocv_drift",
        "rest_voltage_drift_mV_per_h",
        -3.5,
        -1.0,
        None,
        "out_of_window",
        "reject",
        "internal_short",
    )


def test_record_result_twice_keeps_one_result(ledger: Ledger) -> None:
    row, _ = claim(ledger, "cell G", "g.csv")
    first = record(ledger, row.id, verdict="hold", mails=[mail("<g-1@demo.example>", "hold")])
    second = record(ledger, row.id, verdict="hold", mails=[mail("<g-1@demo.example>", "hold")])
    assert first == second
    assert [count(ledger.path, t) for t in ("results", "checks", "outbox")] == [1, 3, 1]
    stored = ledger.results.of_input(row.id)
    assert stored is not None
    assert (stored.verdict, stored.cell_id, stored.lot, stored.analysed_at) == (
        "hold",
        "DEMO-0001",
        LOT,
        T0,
    )
    assert stored.pdf_path == f"certificates/{LOT}/DEMO-0001.pdf"
    assert json.loads(stored.result_json) == {"verdict": "hold", "cell": "DEMO-0001"}
    assert ledger.inputs.get(row.id).result_id == first  # type: ignore[union-attr]


def test_a_message_id_used_by_another_result_is_refused(ledger: Ledger) -> None:
    a, _ = claim(ledger, "cell H1", "h1.csv")
    b, _ = claim(ledger, "cell H2", "h2.csv")
    record(ledger, a.id, verdict="fail", mails=[mail("<same@demo.example>")])
    with pytest.raises(ValueError, match="already in the outbox"):
        record(ledger, b.id, verdict="fail", mails=[mail("<same@demo.example>")])
    assert ledger.inputs.get(b.id).state == "claimed"  # type: ignore[union-attr]


def test_errors_queue_alerts_once_and_quarantine_parks_unsent_mail(ledger: Ledger) -> None:
    row, _ = claim(ledger, "cell J", "j.csv")
    alert = mail("<j-alert@demo.example>", "alert")
    ledger.inputs.record_error(row.id, "j.csv, line 3: no column for voltage", [alert], now=minutes(1))
    ledger.inputs.record_error(row.id, "j.csv, line 3: no column for voltage", [alert], now=minutes(2))
    assert ledger.outbox.counts() == {"pending": 1, "sent": 0, "parked": 0}
    assert [r.id for r in ledger.inputs.recent_errors()] == [row.id]
    ledger.inputs.mark_final(row.id, "quarantined", "quarantine/j.csv", now=minutes(3))
    assert ledger.inputs.get(row.id).reason == "j.csv, line 3: no column for voltage"  # type: ignore[union-attr]
    # a judged cell whose certificate cannot be written goes to quarantine; its mail is not sent
    judged, _ = claim(ledger, "cell K", "k.csv")
    record(ledger, judged.id, verdict="fail", mails=[mail("<k-1@demo.example>")])
    ledger.inputs.mark_final(
        judged.id, "quarantined", "quarantine/k.csv", "certificate could not be written"
    )
    parked = ledger.outbox.get(2)
    assert parked is not None and parked.state == "parked"
    assert [m.message_id for m in ledger.outbox.due(minutes(60))] == ["<j-alert@demo.example>"]


# ---- outbox ----------------------------------------------------------------------------------


def test_queue_mail_is_idempotent_on_message_id(ledger: Ledger) -> None:
    first = ledger.outbox.queue(mail("<alert-1@demo.example>", "alert"), now=T0)
    again = ledger.outbox.queue(mail("<alert-1@demo.example>", "alert"), now=minutes(5))
    assert first == again
    assert ledger.outbox.counts() == {"pending": 1, "sent": 0, "parked": 0}
    with pytest.raises(ValueError, match="mail kind"):
        ledger.outbox.queue(mail("<x@demo.example>", "newsletter"), now=T0)


def test_due_mail_is_oldest_first_and_waits_for_the_certificate(ledger: Ledger) -> None:
    a, _ = claim(ledger, "cell L1", "l1.csv")
    b, _ = claim(ledger, "cell L2", "l2.csv")
    record(ledger, a.id, verdict="fail", mails=[mail("<l1@demo.example>")], at=minutes(1))
    record(ledger, b.id, verdict="hold", mails=[mail("<l2@demo.example>", "hold")], at=minutes(2))
    ledger.outbox.queue(mail("<alert@demo.example>", "alert"), now=minutes(3))
    ledger.outbox.queue(mail("<later@demo.example>", "alert"), now=minutes(90))
    assert [m.message_id for m in ledger.outbox.due(minutes(10))] == ["<alert@demo.example>"]
    ledger.inputs.mark_published(b.id)
    ledger.inputs.mark_published(a.id)
    due = ledger.outbox.due(minutes(10))
    assert [m.message_id for m in due] == [
        "<l1@demo.example>",
        "<l2@demo.example>",
        "<alert@demo.example>",
    ]
    assert [m.cell_result_id for m in due] == [1, 2, None]
    assert due[0].lot == LOT and due[0].recipients == QUALITY
    assert len(ledger.outbox.due(minutes(10), limit=2)) == 2
    ledger.inputs.mark_final(a.id, "archived", "archive/l1.csv")
    assert len(ledger.outbox.due(minutes(100))) == 4


def take(ledger: Ledger, mail_id: int, at: datetime.datetime, owner: str = ME) -> None:
    """Claim a mail for ``owner`` for ten minutes, as a sender does before it speaks to the server."""
    claimed = ledger.outbox.claim(mail_id, owner=owner, now=at, until=at + LEASE)
    assert claimed is not None and claimed.claimed_by == owner


def test_retry_and_park_bookkeeping(ledger: Ledger) -> None:
    first = ledger.outbox.queue(mail("<m1@demo.example>", "alert"), now=T0)
    second = ledger.outbox.queue(mail("<m2@demo.example>", "alert"), now=T0)
    take(ledger, first, minutes(1))
    ledger.outbox.mark_retry(
        first, owner=ME, now=minutes(1), next_attempt_at=minutes(6), error="421 try later"
    )
    assert [m.id for m in ledger.outbox.due(minutes(2))] == [second]
    row = ledger.outbox.get(first)
    assert row is not None
    assert (row.state, row.attempts, row.next_attempt_at, row.last_error) == (
        "pending",
        1,
        minutes(6),
        "421 try later",
    )
    assert [m.id for m in ledger.outbox.due(minutes(6))] == [first, second]
    take(ledger, first, minutes(7))
    take(ledger, second, minutes(7))
    ledger.outbox.mark_sent(first, owner=ME, now=minutes(7), reply="250 queued as 4F2A")
    # again: a no-op
    ledger.outbox.mark_sent(first, owner=ME, now=minutes(8), reply="250 queued as 4F2A")
    ledger.outbox.park(second, owner=ME, now=minutes(7), reply="550 no such user")
    sent, parked = ledger.outbox.get(first), ledger.outbox.get(second)
    assert sent is not None and parked is not None
    assert (sent.state, sent.attempts, sent.sent_at, sent.reply) == (
        "sent",
        2,
        minutes(7),
        "250 queued as 4F2A",
    )
    assert (parked.state, parked.attempts, parked.last_error) == ("parked", 1, "550 no such user")
    assert ledger.outbox.due(minutes(60)) == []
    assert ledger.outbox.counts() == {"pending": 0, "sent": 1, "parked": 1}
    with pytest.raises(ValueError, match="not pending"):
        ledger.outbox.mark_retry(
            second, owner=ME, now=minutes(9), next_attempt_at=minutes(10), error="x"
        )
    ledger.outbox.requeue(second, now=minutes(20))
    assert [m.id for m in ledger.outbox.due(minutes(20))] == [second]


# ---- lot digests -----------------------------------------------------------------------------


def test_each_passed_cell_is_in_exactly_one_digest(ledger: Ledger) -> None:
    ids = []
    for n in range(4):
        row, _ = claim(ledger, f"pass cell {n}", f"p{n}.csv")
        ids.append(record(ledger, row.id, cell=f"DEMO-{n:04d}", at=minutes(n)))
        if n < 3:
            ledger.inputs.mark_published(row.id)  # the fourth has no certificate yet
    failed, _ = claim(ledger, "failed cell", "x.csv")
    record(ledger, failed.id, verdict="fail", cell="DEMO-0099")
    ledger.inputs.mark_published(failed.id)
    other, _ = claim(ledger, "other lot", "o.csv")
    record(ledger, other.id, lot="DEMO-LOT-08")
    ledger.inputs.mark_published(other.id)

    assert ledger.digests.pending_lots() == [LOT, "DEMO-LOT-08"]
    cells = ledger.digests.passed_cells(LOT)
    assert [c.id for c in cells] == ids[:3]
    # crash between queuing and marking: the digest is queued but covers nothing, so not due
    digest = ledger.outbox.queue(mail("<digest-1@demo.example>", "digest", LOT), now=minutes(10))
    assert ledger.outbox.due(minutes(11)) == []
    ledger.digests.mark(LOT, [c.id for c in cells], digest)
    ledger.digests.mark(LOT, [c.id for c in cells], digest)  # again after a restart: no-op
    assert [m.id for m in ledger.outbox.due(minutes(11))] == [digest]
    assert ledger.digests.passed_cells(LOT) == []
    with pytest.raises(ValueError, match=f"already in digest mail {digest}"):
        ledger.digests.queue(
            mail("<digest-2@demo.example>", "digest", LOT), [ids[0]], now=minutes(12)
        )
    assert ledger.outbox.get(digest + 1) is None  # refused as a whole: the second digest was not queued

    ledger.inputs.mark_published(ledger.results.get(ids[3]).input_id)  # type: ignore[union-attr]
    assert [c.id for c in ledger.digests.passed_cells(LOT)] == [ids[3]]
    second = ledger.digests.queue(
        mail("<digest-2@demo.example>", "digest", LOT), [ids[3]], now=minutes(13)
    )
    assert ledger.digests.pending_lots() == ["DEMO-LOT-08"]
    covered = {i: ledger.results.get(i).digest_mail_id for i in ids}  # type: ignore[union-attr]
    assert covered == {ids[0]: digest, ids[1]: digest, ids[2]: digest, ids[3]: second}
    with pytest.raises(ValueError, match="not a passed cell"):
        ledger.digests.mark(LOT, [ledger.results.of_input(failed.id).id], second)  # type: ignore[union-attr]


def test_a_superseded_pass_is_not_digested(ledger: Ledger) -> None:
    v1, _ = claim(ledger, "first", "s.csv")
    record(ledger, v1.id)
    finish(ledger, v1.id)
    v2, _ = claim(ledger, "second", "s.csv")
    r2 = record(ledger, v2.id)
    ledger.inputs.mark_published(v2.id)
    assert [c.id for c in ledger.digests.passed_cells(LOT)] == [r2]


def test_a_digest_lists_the_whole_lot_as_it_stands(ledger: Ledger) -> None:
    passed, _ = claim(ledger, "pass", "p.csv")
    record(ledger, passed.id, cell="DEMO-0002")
    ledger.inputs.mark_published(passed.id)
    failed, _ = claim(ledger, "fail", "f.csv")
    record(ledger, failed.id, cell="DEMO-0001", verdict="fail")
    ledger.inputs.mark_published(failed.id)
    unpublished, _ = claim(ledger, "not yet published", "u.csv")
    record(ledger, unpublished.id, cell="DEMO-0003")
    other, _ = claim(ledger, "other lot", "o.csv")
    record(ledger, other.id, lot="DEMO-LOT-08")
    ledger.inputs.mark_published(other.id)
    listed = ledger.results.current_of_lot(LOT)
    assert [(c.cell_id, c.verdict) for c in listed] == [("DEMO-0001", "fail"), ("DEMO-0002", "pass")]


# ---- status ----------------------------------------------------------------------------------


def test_counts_since_counts_inputs_that_became_final_in_the_window(ledger: Ledger) -> None:
    verdicts = ["pass", "pass", "fail", "hold"]
    for n, verdict in enumerate(verdicts):
        row, _ = claim(ledger, f"cell {n}", f"n{n}.csv")
        record(ledger, row.id, verdict=verdict)
        finish(ledger, row.id, at=minutes(10 * n))  # finals at 0, 10, 20, 30 min
    bad, _ = claim(ledger, "unreadable", "bad.csv")
    ledger.inputs.record_error(bad.id, "bad.csv, line 1: not a cycle file")
    ledger.inputs.mark_final(bad.id, "quarantined", "quarantine/bad.csv", now=minutes(40))
    dup, _ = claim(ledger, "cell 0", "n0.csv")
    ledger.inputs.mark_final(dup.id, "duplicate", "archive/n0.csv.dup", now=minutes(50))
    claim(ledger, "still in work", "w.csv")  # not final: not counted
    assert ledger.inputs.counts_since(T0) == {
        "pass": 2, "fail": 1, "hold": 1, "error": 1, "duplicate": 1, "readings": 0
    }
    assert ledger.inputs.counts_since(minutes(15)) == {
        "pass": 0,
        "fail": 1,
        "hold": 1,
        "error": 1,
        "duplicate": 1,
        "readings": 0,
    }
    assert ledger.inputs.counts_since(minutes(60)) == {
        "pass": 0,
        "fail": 0,
        "hold": 0,
        "error": 0,
        "duplicate": 0,
        "readings": 0,
    }


def test_recent_results_are_newest_first(ledger: Ledger) -> None:
    for n in range(3):
        row, _ = claim(ledger, f"r{n}", f"r{n}.csv")
        record(ledger, row.id, cell=f"DEMO-{n}", at=minutes(n))
    assert [r.cell_id for r in ledger.results.recent(limit=2)] == ["DEMO-2", "DEMO-1"]


def test_integrity_check_passes_on_a_good_ledger_and_fails_on_a_damaged_index(
    tmp_path: Path,
) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        for n in range(20):
            claim(ledger, f"cell {n}", f"i{n}.csv")
        assert ledger.integrity_ok()
    # damage: make the state index believe it indexes another column than it holds
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA writable_schema = ON")
    conn.execute(
        "UPDATE sqlite_schema SET sql = replace(sql, '(state)', '(name)') "
        "WHERE name = 'inputs_by_state'"
    )
    conn.close()
    with Ledger(path, now=T0) as damaged:
        assert not damaged.integrity_ok()


# ---- many processes --------------------------------------------------------------------------


def _claim_many(path: str, prefix: str, start: object, report: str) -> None:
    """Child process: open the ledger, claim and judge 40 files, write any error to ``report``."""
    try:
        start.wait(30)  # type: ignore[attr-defined]
        with Ledger(Path(path), now=T0) as ledger:
            for n in range(40):
                row, _ = claim(ledger, f"{prefix} {n}", f"{prefix}-{n}.csv")
                record(
                    ledger,
                    row.id,
                    cell=f"{prefix}-{n}",
                    mails=[mail(f"<{prefix}-{n}@demo.example>")],
                    verdict="fail",
                )
                ledger.inputs.mark_published(row.id)
    except BaseException as exc:  # reported to the parent, which fails the test
        Path(report).write_text(f"{type(exc).__name__}: {exc}")
        raise


def test_two_processes_open_and_write_the_same_new_ledger_at_once(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    ctx = multiprocessing.get_context("spawn")
    start = ctx.Event()
    children = [
        ctx.Process(target=_claim_many, args=(str(path), p, start, str(tmp_path / f"{p}.err")))
        for p in ("LINE-A", "LINE-B")
    ]
    for child in children:
        child.start()
    start.set()
    for child in children:
        child.join(120)
    errors = [f.read_text() for f in tmp_path.glob("*.err")]
    assert errors == []
    assert [c.exitcode for c in children] == [0, 0]
    with Ledger(path, now=T0) as ledger:
        assert len(ledger.inputs.in_state("published")) == 80
        assert ledger.outbox.counts()["pending"] == 80
        assert applied_migrations(ledger.db.conn) == [
            (m.name, "2026-03-02T06:00:00.000000+00:00") for m in MIGRATIONS
        ]
        assert ledger.integrity_ok()


# ---- invariants under random operation sequences ---------------------------------------------


CONTENTS = ("bytes-a", "bytes-b", "bytes-c")  # few, so that bytes and names meet again often
NAMES = ("x.csv", "y.csv")


class LedgerMachine(RuleBasedStateMachine):
    """Random claim/record/publish/final/mail sequences, with a restart (reopen) now and then."""

    def __init__(self) -> None:
        super().__init__()
        self.dir = tempfile.TemporaryDirectory()
        self.path = Path(self.dir.name) / "ledger.sqlite"
        self.ledger = Ledger(self.path, now=T0)
        self.clock = 0
        self.expected: dict[int, str] = {}
        self.work_serial = 0

    def teardown(self) -> None:
        self.ledger.close()
        self.dir.cleanup()

    def _ids(self, state: str) -> list[int]:
        return sorted(i for i, s in self.expected.items() if s == state)

    def _tick(self) -> datetime.datetime:
        self.clock += 1
        return minutes(self.clock)

    @rule(content=st.sampled_from(CONTENTS), name=st.sampled_from(NAMES), reuse=st.booleans())
    def claim(self, content: str, name: str, reuse: bool) -> None:
        if not reuse:
            self.work_serial += 1
        work = f"work/{self.work_serial}-{name}"
        row, earlier = claim(self.ledger, content, name, work=work, at=self._tick())
        if row.id in self.expected:  # the same in-flight file claimed again: same row
            assert row.state == self.expected[row.id]
        else:
            self.expected[row.id] = row.state
        assert (earlier is not None) == (row.state == "duplicate")

    @precondition(lambda self: self._ids("claimed"))
    @rule(data=st.data(), verdict=st.sampled_from(["pass", "fail", "hold"]), twice=st.booleans())
    def record(self, data: st.DataObject, verdict: str, twice: bool) -> None:
        input_id = data.draw(st.sampled_from(self._ids("claimed")))
        kind = {"pass": (), "fail": ("failure",), "hold": ("hold",)}[verdict]
        mails = [mail(f"<{input_id}-{k}@demo.example>", k) for k in kind]
        result_id = record(
            self.ledger,
            input_id,
            verdict=verdict,
            lot=f"LOT-{input_id % 2}",
            mails=mails,
            at=self._tick(),
        )
        if twice:
            assert record(self.ledger, input_id, verdict=verdict, mails=mails) == result_id
        self.expected[input_id] = "judged"

    @precondition(lambda self: self._ids("judged"))
    @rule(data=st.data())
    def publish(self, data: st.DataObject) -> None:
        input_id = data.draw(st.sampled_from(self._ids("judged")))
        self.ledger.inputs.mark_published(input_id)
        self.expected[input_id] = "published"

    @precondition(lambda self: self._ids("published"))
    @rule(data=st.data())
    def archive(self, data: st.DataObject) -> None:
        input_id = data.draw(st.sampled_from(self._ids("published")))
        self.ledger.inputs.mark_final(input_id, "archived", f"archive/{input_id}", now=self._tick())
        self.expected[input_id] = "archived"

    @precondition(lambda self: self._ids("claimed") + self._ids("judged"))
    @rule(data=st.data())
    def quarantine(self, data: st.DataObject) -> None:
        input_id = data.draw(st.sampled_from(self._ids("claimed") + self._ids("judged")))
        self.ledger.inputs.record_error(
            input_id, "cannot be read", [mail(f"<{input_id}-alert@demo.example>", "alert")]
        )
        self.ledger.inputs.mark_final(input_id, "quarantined", f"quarantine/{input_id}", now=self._tick())
        self.expected[input_id] = "quarantined"

    @precondition(lambda self: self._ids("duplicate"))
    @rule(data=st.data())
    def set_duplicate_aside(self, data: st.DataObject) -> None:
        input_id = data.draw(st.sampled_from(self._ids("duplicate")))
        self.ledger.inputs.mark_final(input_id, "duplicate", f"archive/{input_id}.dup", now=self._tick())

    @rule(lot=st.sampled_from(["LOT-0", "LOT-1"]))
    def digest(self, lot: str) -> None:
        cells = [c.id for c in self.ledger.digests.passed_cells(lot)]
        if cells:
            message = mail(f"<digest-{lot}-{min(cells)}@demo.example>", "digest", lot)
            self.ledger.digests.queue(message, cells, now=self._tick())

    @rule(outcome=st.sampled_from(["sent", "retry", "park"]))
    def deliver(self, outcome: str) -> None:
        now = self._tick()
        for due in self.ledger.outbox.due(now, limit=2):
            assert self.ledger.outbox.claim(due.id, owner=ME, now=now, until=now + LEASE)
            if outcome == "sent":
                self.ledger.outbox.mark_sent(due.id, owner=ME, now=now, reply="250 ok")
            elif outcome == "retry":
                self.ledger.outbox.mark_retry(
                    due.id, owner=ME, now=now, next_attempt_at=minutes(self.clock + 2), error="421"
                )
            else:
                self.ledger.outbox.park(due.id, owner=ME, now=now, reply="550 no")

    @rule()
    def restart(self) -> None:
        self.ledger.close()
        self.ledger = Ledger(self.path, now=T0)

    @invariant()
    def states_match_and_relations_hold(self) -> None:
        conn = self.ledger.db.conn
        rows = {
            r.id: r
            for r in self.ledger.inputs.in_state(
                "claimed", "judged", "published", "archived", "quarantined", "duplicate"
            )
        }
        assert {i: r.state for i, r in rows.items()} == self.expected  # each input: one known state
        for row in rows.values():
            final = row.final_path is not None
            assert final == (row.state in ("archived", "quarantined")) or row.state == "duplicate"
            if row.state == "duplicate":
                first = rows[row.duplicate_of]  # type: ignore[index]
                assert first.sha256 == row.sha256 and first.state != "duplicate"
                assert row.result_id is None
            if row.state in ("judged", "published", "archived"):
                assert row.result_id is not None
        # each result belongs to exactly one input, and only inputs that were judged have one
        results, owners = conn.execute(
            "SELECT count(*), count(DISTINCT input_id) FROM results"
        ).fetchone()
        assert results == owners == sum(r.result_id is not None for r in rows.values())
        # message ids are unique
        total, distinct = conn.execute(
            "SELECT count(*), count(DISTINCT message_id) FROM outbox"
        ).fetchone()
        assert total == distinct
        # per name, versions of judged-or-not inputs run 1..n and at most one result is current
        for name in NAMES:
            versions = sorted(
                r.version for r in rows.values() if r.name == name and r.state != "duplicate"
            )
            assert versions == list(range(1, len(versions) + 1))
            current = conn.execute(
                "SELECT count(*) FROM results r JOIN inputs i ON i.id = r.input_id "
                "WHERE i.name = ? AND r.superseded_by IS NULL",
                (name,),
            ).fetchone()[0]
            assert current <= 1
        # a digest covers only passed cells; no failure/hold mail is due before its certificate
        assert (
            conn.execute(
                "SELECT count(*) FROM results WHERE digest_mail_id IS NOT NULL "
                "AND verdict <> 'pass'"
            ).fetchone()[0]
            == 0
        )
        for due in self.ledger.outbox.due(minutes(10_000), limit=1000):
            if due.kind in ("failure", "hold"):
                owner = conn.execute(
                    "SELECT input_id FROM results WHERE id = ?", (due.cell_result_id,)
                ).fetchone()[0]
                assert rows[owner].state in ("published", "archived")
        assert self.ledger.integrity_ok()


TestLedgerMachine = LedgerMachine.TestCase
TestLedgerMachine.settings = settings(
    max_examples=50,
    stateful_step_count=30,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)


def test_a_version_1_ledger_is_upgraded_in_place_and_keeps_its_rows(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    try:
        migrate(conn, MIGRATIONS[:1], applied_at="2026-01-01T00:00:00.000000+00:00", where=SourceRef(str(path)))
        conn.execute("PRAGMA journal_mode = WAL")
    finally:
        conn.close()
    with Ledger(path, now=T0) as ledger:
        assert [name for name, _ in applied_migrations(ledger.db.conn)] == [m.name for m in MIGRATIONS]
        claim(ledger, "cell one", "c1.csv")
        sha = "a" * 64
        ledger.facts.remember_text(kind="rule_set", sha256=sha, name="x.toml", text="[rule_set]", now=T0)
        ledger.facts.remember_text(kind="rule_set", sha256=sha, name="x.toml", text="[rule_set]", now=T0)
        assert ledger.facts.text_by_sha(sha) == ("x.toml", "[rule_set]")
        assert ledger.integrity_ok()
