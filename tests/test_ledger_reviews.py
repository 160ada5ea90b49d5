"""The ledger's reviews, published files and hash chain: real SQLite, migrations from schema 5."""

from __future__ import annotations

import datetime
import json
import sqlite3
from pathlib import Path

import pytest

from pipeline.ledger.chain import GENESIS, broken_links
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrate import migrate
from pipeline.ledger.migrations import MIGRATIONS
from pipeline.ledger.rows import ReviewRow
from pipeline.model import SourceRef

T0 = datetime.datetime(2026, 6, 1, 8, 0, tzinfo=datetime.UTC)


def at(minutes: float) -> datetime.datetime:
    return T0 + datetime.timedelta(minutes=minutes)


def _decide(ledger: Ledger, cell: str, verdict: str, reason: str, minute: float) -> int:
    row, _, _ = ledger.decisions.decide(
        cell_id=cell, lot="LOT-R", verdict=verdict, reason=reason, hazards=(), grade=None,
        cause="record", basis=[], now=at(minute),
    )
    return row.id


def _release(review: ReviewRow) -> tuple[str, str, list[str], str | None]:
    return "pass", f"released by {review.reviewer}: {review.reason}", [], None


def _chain(ledger: Ledger, table: str) -> tuple[list[str], str]:
    conn = ledger.db.conn
    names = [d[0] for d in conn.execute(f"SELECT * FROM {table} LIMIT 0").description]
    rows = [dict(zip(names, r, strict=True)) for r in conn.execute(f"SELECT * FROM {table} ORDER BY id")]
    return broken_links(table, rows)


def test_a_review_and_the_decision_it_gives_are_recorded_together_and_chained(tmp_path: Path) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        held = _decide(ledger, "C-1", "hold", "outlier in lot: dcir_mOhm 30 > lot limit 25", 1)
        _decide(ledger, "C-2", "hold", "waiting for stage grading", 2)
        _decide(ledger, "C-3", "fail", "grading_capacity_Ah 4.4 Ah < 5 Ah (reject)", 3)
        waiting = ledger.reviews.waiting()
        assert [(w[1], w[2]) for w in waiting] == [("C-1", "hold"), ("C-3", "fail")]
        review, given = ledger.reviews.record(
            cell_id="C-1", lot="LOT-R", action="release", stage=None, accepts=(),
            reviewer="quality engineer A", reason="DCIR within the customer's wider window",
            now=at(10), answers=held, decision=_release,
        )
        assert (given.verdict, given.cause, given.review_id) == ("pass", "review", review.id)
        assert ledger.decisions.latest("LOT-R", "C-1") == given
        assert [w[1] for w in ledger.reviews.waiting()] == ["C-3"]
        with pytest.raises(ValueError, match="changed since it was shown"):
            ledger.reviews.record(
                cell_id="C-1", lot="LOT-R", action="reject", stage=None, accepts=(),
                reviewer="B", reason="late", now=at(11), answers=held, decision=_release,
            )
        assert _chain(ledger, "decisions")[0] == [] and _chain(ledger, "reviews")[0] == []


def test_a_decision_row_edited_by_hand_breaks_the_chain(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    with Ledger(path, now=T0) as ledger:
        for n in range(4):
            _decide(ledger, f"C-{n}", "fail", "capacity low", n)
        assert _chain(ledger, "decisions")[0] == []
    raw = sqlite3.connect(path)
    raw.execute("UPDATE decisions SET verdict = 'pass', reason = '' WHERE id = 2")
    raw.execute("DELETE FROM decisions WHERE id = 4")
    raw.commit()
    raw.close()
    with Ledger(path, now=T0) as ledger:
        problems, _ = _chain(ledger, "decisions")
    assert problems == [
        "decisions row 2: its content does not match its hash (changed after it was recorded)",
    ]
    # (removing the last row leaves no trace in the chain itself: keep its last hash elsewhere)


def test_the_decisions_of_a_schema_5_ledger_are_kept_and_chained(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    migrate(conn, MIGRATIONS[:5], applied_at=T0.isoformat(), where=SourceRef(str(path)))
    for n in range(3):
        conn.execute(
            "INSERT INTO decisions (cell_id, lot, verdict, reason, hazards, grade, cause, basis, "
            "decided_at, supersedes) VALUES (?, 'L', 'hold', 'waiting for stage aging', '[]', "
            "NULL, 'record', '[]', ?, NULL)", (f"C-{n}", at(n).isoformat(timespec="microseconds")),
        )
    conn.close()
    with Ledger(path, now=T0) as ledger:
        assert [d.cell_id for d in ledger.decisions.latest_of_lot("L").values()] == ["C-0", "C-1", "C-2"]
        problems, last = _chain(ledger, "decisions")
        assert problems == [] and last != GENESIS
        assert ledger.integrity_ok()


def test_published_files_are_found_by_hash_prefix_and_path(tmp_path: Path) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        sha = "ab12" * 16
        ledger.published.record(path="c/L/C-1.pdf", sha256=sha, kind="certificate", now=T0,
                                lot="L", cell_id="C-1")
        ledger.published.record(path="c/L/C-1~record-1.pdf", sha256=sha, kind="certificate",
                                now=at(1), lot="L", cell_id="C-1")
        assert [r.path for r in ledger.published.by_sha("AB12ab12")] == [
            "c/L/C-1~record-1.pdf", "c/L/C-1.pdf"]
        assert ledger.published.by_path("c/L/C-1.pdf").sha256 == sha  # type: ignore[union-attr]
        assert ledger.published.by_sha("cd" * 32) == []
        with pytest.raises(ValueError, match="at least 8 hex digits"):
            ledger.published.by_sha("ab12")
        assert json.loads(json.dumps([r.kind for r in ledger.published.of_cell("L", "C-1")])) == [
            "certificate", "certificate"]
