"""The ledger's regrades: the migration that makes room for them, and applying one cell's change."""

from __future__ import annotations

import datetime
import hashlib
import json
import sqlite3
from pathlib import Path

import pytest

from pipeline.ledger.chain import broken_links, chained_rows
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrate import migrate
from pipeline.ledger.migrations import MIGRATIONS
from pipeline.ledger.regrades import Rejudged
from pipeline.ledger.rows import CheckRowData
from pipeline.model import SourceRef

T0 = datetime.datetime(2026, 3, 2, 6, 0, tzinfo=datetime.UTC)
CHECK = CheckRowData("cap", "grading_capacity_Ah", 19.0, 18.9, 21.0, "in_window", "reject")


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _judged(ledger: Ledger, cell: str, verdict: str = "pass", at: datetime.datetime = T0) -> int:
    row, _ = ledger.inputs.claim(sha256=_sha(cell + verdict), name=f"{cell}.csv", size=9,
                                 arrived_at=at, work_path=f"work/{cell}.csv")
    ledger.results.record(
        row.id, cell_id=cell, lot="L1", verdict=verdict, hazards=(),
        result_json=json.dumps({"verdict": verdict, "cell": {"cell_id": cell, "lot": "L1"}}),
        checks=[CHECK], rule_set_name="demo", rule_set_revision="1", rule_set_sha256=_sha("r1"),
        analysed_at=at, json_path=f"results/L1/{cell}.json", pdf_path=None, mails=(),
    )
    ledger.inputs.mark_published(row.id)
    ledger.inputs.mark_final(row.id, "archived", f"archive/{cell}.csv", now=at)
    return row.id


def _rejudged(input_id: int, verdict: str) -> Rejudged:
    check = CheckRowData("cap", "grading_capacity_Ah", 19.0, 19.1, 21.0, "out_of_window", "reject")
    return Rejudged(input_id, verdict, (), json.dumps({"verdict": verdict}), (check,), "demo",
                    "2", _sha("r2"), T0, "results/L1/x.json")


def test_a_version_6_ledger_keeps_its_rows_references_and_chain_through_the_regrade_migration(
    tmp_path: Path,
) -> None:
    path = tmp_path / "ledger.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA foreign_keys = ON")
    migrate(conn, MIGRATIONS[:6], applied_at=T0.isoformat(), where=SourceRef(str(path)))
    conn.close()
    conn = sqlite3.connect(path, isolation_level=None)  # rows as version 6 wrote them
    conn.execute(
        "INSERT INTO inputs (id, sha256, name, size, arrived_at, work_path, state, final_path, "
        "final_at, version) VALUES (1, ?, 'c1.csv', 9, ?, 'work/c1.csv', 'archived', "
        "'archive/c1.csv', ?, 1)", (_sha("c1"), T0.isoformat(), T0.isoformat()),
    )
    conn.execute(
        "INSERT INTO results (id, input_id, cell_id, lot, verdict, hazards, result_json, "
        "rule_set_name, rule_set_revision, rule_set_sha256, analysed_at, json_path) "
        "VALUES (1, 1, 'C1', 'L1', 'pass', '[]', '{}', 'demo', '1', ?, ?, 'r.json')",
        (_sha("r1"), T0.isoformat()),
    )
    conn.execute(
        "INSERT INTO checks (result_id, position, rule_id, metric, value, low, high, outcome, "
        "severity) VALUES (1, 0, 'cap', 'grading_capacity_Ah', 19.0, 18.9, 21.0, 'in_window', "
        "'reject')"
    )
    conn.close()
    with Ledger(path, now=T0) as ledger:  # migrates to this code's version
        ledger.decisions.decide(cell_id="C1", lot="L1", verdict="pass", reason="", hazards=(),
                                grade=None, cause="record", basis=["c1.csv"], now=T0)
        assert ledger.results.of_input(1) is not None
        assert ledger.results.checks(1) == [CHECK]
        assert ledger.integrity_ok()
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA foreign_key_check").fetchall() == []
    assert broken_links("decisions", chained_rows(conn, "decisions"))[0] == []
    with pytest.raises(sqlite3.IntegrityError):  # still one result of its own per input
        conn.execute(
            "INSERT INTO results (input_id, cell_id, lot, verdict, hazards, result_json, "
            "rule_set_name, rule_set_revision, rule_set_sha256, analysed_at, json_path) "
            "VALUES (1, 'C1', 'L1', 'pass', '[]', '{}', 'demo', '1', ?, ?, 'r.json')",
            (_sha("r1"), T0.isoformat()),
        )
    conn.close()


def test_applying_a_cell_records_beside_the_old_and_a_second_time_records_nothing(
    tmp_path: Path,
) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        first = _judged(ledger, "C1")
        other = _judged(ledger, "C2")
        ledger.decisions.decide(cell_id="C1", lot="L1", verdict="pass", reason="", hazards=(),
                                grade=None, cause="record", basis=["record:C1.csv:x"], now=T0)
        regrade = ledger.regrades.begin(run_by="qa", reason="capacity window tightened",
                                        rules_digest=_sha("bundle"), rule_sets=[("demo", "2", _sha("r2"))],
                                        selection="lots L1", now=T0)
        again = ledger.regrades.begin(run_by="qa", reason="again", rules_digest=_sha("bundle"),
                                      rule_sets=[], selection="lots L1", now=T0)
        assert again.id == regrade.id  # unfinished: a rerun carries on under the same row
        for _ in range(2):
            row, _ = ledger.regrades.apply_cell(
                regrade.id, lot="L1", cell_id="C1", rejudged=[_rejudged(first, "fail")],
                verdict="fail", reason="grading capacity out of window", hazards=(),
                basis=["record:C1.csv:x"], now=T0 + datetime.timedelta(hours=1),
            )
        assert (row.verdict, row.cause, row.basis[-1]) == ("fail", "regrade", f"regrade:{regrade.id}")
        assert len(ledger.decisions.of_cell("L1", "C1")) == 2
        own = ledger.results.of_input(first)
        assert own is not None and own.regrade_id is None and own.verdict == "pass"
        counted = ledger.results.of_cell("L1", "C1")
        assert [(r.verdict, r.regrade_id) for r in counted] == [("fail", regrade.id)]
        assert own.superseded_by == counted[0].id
        assert ledger.results.checks(counted[0].id)[0].outcome == "out_of_window"
        assert sorted(r.cell_id for r in ledger.results.of_lot("L1")) == ["C1", "C2"]
        assert ledger.results.of_input(other) is not None
        ledger.regrades.finish(regrade.id, {"pass → fail": 1}, T0)
        assert ledger.regrades.get(regrade.id).summary == {"pass → fail": 1}  # type: ignore[union-attr]
        later = ledger.regrades.begin(run_by="qa", reason="again", rules_digest=_sha("bundle"),
                                      rule_sets=[], selection="lots L1", now=T0)
        assert later.id != regrade.id


def test_a_regrade_cut_short_shows_what_it_recorded_and_what_that_superseded(tmp_path: Path) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        first = _judged(ledger, "C1")
        _judged(ledger, "C2")
        for cell in ("C1", "C2"):
            ledger.decisions.decide(cell_id=cell, lot="L1", verdict="pass", reason="", hazards=(),
                                    grade=None, cause="record", basis=[f"record:{cell}.csv:x"],
                                    now=T0)
        assert ledger.regrades.unfinished(_sha("bundle"), "lots L1") is None
        regrade = ledger.regrades.begin(run_by="qa", reason="capacity window tightened",
                                        rules_digest=_sha("bundle"), rule_sets=[("demo", "2", _sha("r2"))],
                                        selection="lots L1", now=T0)
        assert ledger.regrades.unfinished(_sha("bundle"), "lots L1") == regrade
        assert ledger.regrades.unfinished(_sha("bundle"), "lots L2") is None
        assert ledger.regrades.judged_before(regrade.id) == {}
        assert ledger.regrades.decided(regrade.id) == {}
        own = ledger.results.of_input(first)
        standing = ledger.decisions.latest("L1", "C1")
        decision, _ = ledger.regrades.apply_cell(
            regrade.id, lot="L1", cell_id="C1", rejudged=[_rejudged(first, "fail")],
            verdict="fail", reason="grading capacity out of window", hazards=(),
            basis=["record:C1.csv:x"], now=T0 + datetime.timedelta(hours=1),
        )
        # the cell's judgement and decision before the regrade, beside the regrade's own
        [(input_id, before)] = ledger.regrades.judged_before(regrade.id).items()
        assert input_id == first and before.id == own.id and before.verdict == "pass"  # type: ignore[union-attr]
        assert ledger.regrades.decided(regrade.id) == {("L1", "C1"): (standing, decision)}
        assert ledger.regrades.decided(regrade.id + 1) == {}
        ledger.regrades.finish(regrade.id, {"pass → fail": 1}, T0)
        assert ledger.regrades.unfinished(_sha("bundle"), "lots L1") is None
