"""What a worker learns of a cell's other records before it renders the cell's certificate.

A worker judges one file and cannot know the cell's other files, so once it has read
the cell id it looks them up in the ledger, read-only (SQLite's write-ahead log lets a
reader in beside the station's writer; nothing here writes): which record of its cell
and stage the file is and what it supersedes, and the latest record of each other
stage, with the aging readings' files. The certificate lists them with their SHA-256.
Two files of one cell judged at the same moment may not see each other: each
certificate says what was recorded when it was made.
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import sqlite3
from pathlib import Path

from pipeline.acceptance.results import CellResult, OtherRecord, RecordPlace
from pipeline.acceptance.rules import WHOLE_PROGRAM


def _connect(ledger: Path) -> sqlite3.Connection | None:
    try:
        conn = sqlite3.connect(f"{ledger.resolve().as_uri()}?mode=ro", uri=True, timeout=5.0)
    except sqlite3.Error:
        return None
    conn.row_factory = sqlite3.Row
    return conn


def with_history(result: CellResult, ledger: Path, input_id: int) -> CellResult:
    """``result`` with its record place and the cell's other records, as the ledger has them.

    A ledger that cannot be read (not there yet, busy past the wait, an older schema)
    leaves the result as it is: the history is a courtesy of the certificate, and the
    cell's decision over its stages is recorded by the station whatever it shows.
    """
    conn = _connect(ledger)
    if conn is None:
        return result
    try:
        with conn:
            rows = conn.execute(
                "SELECT r.result_json, r.verdict, r.analysed_at, i.name, i.sha256 FROM results r "
                "JOIN inputs i ON i.id = r.input_id WHERE r.lot = ? AND r.cell_id = ? "
                "AND r.input_id <> ? AND i.state IN ('judged', 'published', 'archived') "
                # judged again after a crash: only the records from before its own
                "AND r.id < coalesce((SELECT id FROM results WHERE input_id = ? "
                "AND regrade_id IS NULL), 9e18) "
                # of an input a regrade judged again, its latest judgement only
                "AND NOT EXISTS (SELECT 1 FROM results n WHERE n.input_id = r.input_id "
                "AND n.id > r.id AND n.id < coalesce((SELECT id FROM results WHERE input_id = ? "
                "AND regrade_id IS NULL), 9e18)) "
                "ORDER BY r.analysed_at, r.id",
                (result.lot, result.cell_id, input_id, input_id, input_id),
            ).fetchall()
            readings = conn.execute(
                "SELECT DISTINCT i.name, i.sha256 FROM readings g JOIN inputs i "
                "ON i.id = g.input_id WHERE g.lot = ? AND g.cell_id = ? "
                "AND i.state <> 'quarantined' ORDER BY i.id",
                (result.lot, result.cell_id),
            ).fetchall()
    except sqlite3.Error:
        return result
    finally:
        conn.close()
    same, others = [], {}
    for row in rows:
        stages = tuple(json.loads(row["result_json"]).get("stages") or WHOLE_PROGRAM)
        if stages == result.stages:
            same.append(row)
        else:
            others[stages] = row  # the latest of each other stage
    place = None
    if same:
        last = same[-1]
        place = RecordPlace(
            len(same) + 1, len(same) + 1, last["name"], last["verdict"],
            datetime.datetime.fromisoformat(last["analysed_at"]),
        )
    history = tuple(
        OtherRecord(stages, row["name"], row["sha256"], row["verdict"])
        for stages, row in others.items()
    ) + tuple(OtherRecord(("aging",), r["name"], r["sha256"], "") for r in readings)
    return dataclasses.replace(result, record=place, other_records=history)
