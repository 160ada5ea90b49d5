"""A person's review of a cell the plant decides: release, reject, or a retest of one stage.

Edge module over the plant database; what a review may do and what it gives is the station's
own pure review logic (pipeline.judge.review: ``check``, ``given``, ``stands``). A cell whose
records are all at one station is reviewed there (`formgate review`); a cell of several
stations has no station that sees all of it, so it is reviewed here. The review and the plant
decision it gives are recorded in one transaction, beside the decision it answered; it
decides the cell until a file it did not see counts for the cell (cells.py). Its letter
goes out from the command that recorded it (letters.py).
"""

from __future__ import annotations

import datetime
import json

from pipeline.judge.review import Asked, Decided, ReviewRefused, check, given
from pipeline.plant.cells import (
    Conn,
    PlantDecision,
    across_stations,
    basis_of,
    cell_as_it_stands,
    decide_in_plant,
    fetch_cell,
    latest_plant_decision,
    latest_rule_set,
    rule_book,
)
from pipeline.plant.tables import SCHEMA


def _rejected_by(conn: Conn, decision: PlantDecision) -> str | None:
    """Who rejected the cell, when its standing plant decision is a person's reject."""
    if decision.review_id is None:
        return None
    row = conn.execute(f"SELECT action, reviewer FROM {SCHEMA}.plant_reviews WHERE id = %s",
                       (decision.review_id,)).fetchone()
    return str(row[1]) if row is not None and row[0] == "reject" else None


def record_plant_review(
    conn: Conn, lot: str, cell_id: str, asked: Asked, *, recorded_by: str, now: datetime.datetime
) -> tuple[PlantDecision, PlantDecision]:
    """Check ``asked`` against the cell's standing plant decision and record it with the decision
    it gives; (the decision it answered, the one it gave). Raises ReviewRefused with what to do."""
    with conn.transaction():
        conn.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", (f"{lot}\n{cell_id}",))
        cell = fetch_cell(conn, lot, cell_id)
        sha = latest_rule_set(cell)
        if sha is None or not across_stations(cell):
            where = ", ".join(cell.stations) or "no station"
            raise ReviewRefused(
                f"cell {cell_id} of lot {lot} is not decided in the plant: its records are at "
                f"one station ({where})",
                None,
                "Review it at that station: formgate review release|reject|retest FOLDER CELL.",
            )
        now_cell = cell_as_it_stands(cell, rule_book(conn, sha))
        made = decide_in_plant(conn, cell, decided_by=recorded_by, now=now)
        if now_cell is None or made is None:
            raise ReviewRefused(f"cell {cell_id} of lot {lot} names no cell type yet", None,
                                "Review it once a record of it has been forwarded.")
        standing = made[0]
        shown = Decided(standing.verdict, standing.reason, standing.hazards)
        rule_set = now_cell.rule_set
        check(asked, shown, now_cell.stages.records, cell=cell_id, needed=now_cell.needed,
              release_hazards=rule_set.release_hazards, counts=rule_set.record_counts,
              rejected_by=_rejected_by(conn, standing))
        out = given(asked, shown)
        seen = [[name, file_sha] for _, name, file_sha in now_cell.stages.files]
        row = conn.execute(
            f"INSERT INTO {SCHEMA}.plant_reviews (cell_id, lot, action, stage, accepts, reviewer, "
            "reason, reviewed_at, answers, seen, recorded_by) "
            "VALUES (%s, %s, %s, %s, %s::jsonb, %s, %s, %s, %s, %s::jsonb, %s) RETURNING id",
            (cell_id, lot, asked.action, asked.stage, json.dumps(list(asked.accepts)),
             asked.reviewer, asked.reason, now, standing.id, json.dumps(seen), recorded_by),
        ).fetchone()
        assert row is not None
        conn.execute(
            f"INSERT INTO {SCHEMA}.plant_decisions (cell_id, lot, verdict, reason, hazards, "
            "stations, basis, rule_set_sha256, decided_by, decided_at, supersedes, review_id) "
            "VALUES (%s, %s, %s, %s, %s::jsonb, %s::jsonb, %s::jsonb, %s, %s, %s, %s, %s)",
            (cell_id, lot, out.verdict, out.reason, json.dumps(list(out.hazards)),
             json.dumps(list(cell.stations)), json.dumps([*basis_of(cell), f"review:{row[0]}"]),
             sha, recorded_by, now, standing.id, row[0]),
        )
        gave = latest_plant_decision(conn, lot, cell_id)
    assert gave is not None
    return standing, gave
