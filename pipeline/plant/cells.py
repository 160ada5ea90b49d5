"""A cell's records across stations, and the plant's decision on a cell that ran at several.

Edge module over the plant database; the deciding itself is the station's own pure logic
(pipeline.judge.lotclose.cell_now and pipeline.judge.cellverdict.decide): per stage the
record that counts, the aging stage judged on all the cell's readings, the worst of its
stages, held while a stage its rule set needs is missing, a person's review deciding the cell
while it stands (it saw every file that counts now). Only the records are gathered
from every station instead of one: a cell formed at one station and graded at another is
"waiting for stage grading" at the first and "waiting for stage formation" at the second,
and decided once here.

The rule set is the one the cell's latest record was judged by, read from the plant's copy
of its exact text (``rule_texts``, by SHA-256), so the plant decides under the same text the
station used. A file judged at two stations (the same bytes, by SHA-256) counts once. A
plant decision is recorded in ``plant_decisions`` when it differs from the cell's latest
there (never over it), and is sent back to no station's ledger: it is the plant's; its
letters go out from the plant command that made it (letters.py).
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import psycopg

from pipeline.errors import FormgateError
from pipeline.judge.cellverdict import CellDecision, decide
from pipeline.judge.lotclose import CellNow, cell_now
from pipeline.judge.review import Asked, Decided, Reviewed, stands
from pipeline.plant.tables import SCHEMA
from pipeline.read.readings import Reading
from pipeline.rulebook.book import RuleBook, load_rule_set

Conn = psycopg.Connection[tuple[Any, ...]]


@dataclass(frozen=True, slots=True)
class PlantRecord:
    """One judged cycle file of the cell, at one station."""

    station_id: str
    result_id: int
    document: Mapping[str, Any]  # the result JSON
    verdict: str
    rule_set_sha256: str
    analysed_at: datetime.datetime
    input_name: str
    input_sha256: str


@dataclass(frozen=True, slots=True)
class StationDecision:
    """A station's latest decision on the cell."""

    station_id: str
    verdict: str
    reason: str
    hazards: tuple[str, ...]
    cause: str
    decided_at: datetime.datetime


@dataclass(frozen=True, slots=True)
class PlantCell:
    """Everything the plant holds of one cell of one lot."""

    lot: str
    cell_id: str
    records: tuple[PlantRecord, ...]  # oldest first, each input once
    readings: tuple[tuple[str, str, str, Reading], ...]  # (station, file name, sha256, reading)
    decisions: tuple[StationDecision, ...]  # each station's latest

    @property
    def stations(self) -> tuple[str, ...]:
        """Every station that holds a record, a reading or a decision of the cell, sorted."""
        return tuple(sorted({r.station_id for r in self.records}
                            | {s for s, _, _, _ in self.readings}
                            | {d.station_id for d in self.decisions}))


@dataclass(frozen=True, slots=True)
class PlantDecision:
    id: int
    verdict: str
    reason: str
    hazards: tuple[str, ...]
    stations: tuple[str, ...]
    rule_set_sha256: str
    decided_by: str
    decided_at: datetime.datetime
    review_id: int | None = None  # the plant review that gave it


_RECORDS = f"""
SELECT r.cell_id, r.station_id, r.id, r.result_json, r.verdict, r.rule_set_sha256, r.analysed_at,
       i.name, i.sha256
FROM {SCHEMA}.results r JOIN {SCHEMA}.inputs i ON i.station_id = r.station_id AND i.id = r.input_id
WHERE r.lot = %s {{cell}} AND r.verdict <> 'error'
  AND i.state IN ('published', 'archived')
  AND NOT EXISTS (SELECT 1 FROM {SCHEMA}.results n
                  WHERE n.station_id = r.station_id AND n.input_id = r.input_id AND n.id > r.id)
ORDER BY r.analysed_at, r.station_id, r.id
"""

_READINGS = f"""
SELECT g.station_id, i.name, i.sha256, g.cell_id, g.lot, g.cell_type, g.at, g.ocv_v, g.acir_mohm,
       g.temperature_c, g.line
FROM {SCHEMA}.readings g JOIN {SCHEMA}.inputs i ON i.station_id = g.station_id AND i.id = g.input_id
WHERE g.lot = %s {{cell}} AND i.state <> 'quarantined'
ORDER BY g.at, g.station_id, g.id
"""

_DECISIONS = f"""
SELECT DISTINCT ON (cell_id, station_id) cell_id, station_id, verdict, reason, hazards, cause,
       decided_at
FROM {SCHEMA}.decisions WHERE lot = %s {{cell}} ORDER BY cell_id, station_id, id DESC
"""


def fetch_cells(conn: Conn, lot: str, cell_id: str | None = None) -> dict[str, PlantCell]:
    """Every cell of ``lot`` (or the one cell) as the plant holds it, in three queries: its
    records, readings and station decisions."""
    args: tuple[str, ...] = (lot,) if cell_id is None else (lot, cell_id)

    def sql(text: str, alias: str) -> str:
        return text.format(cell="" if cell_id is None else f"AND {alias}cell_id = %s")

    records: dict[str, dict[str, PlantRecord]] = {}
    for row in conn.execute(sql(_RECORDS, "r."), args):
        record = PlantRecord(row[1], int(row[2]), row[3], row[4], row[5], row[6], row[7], row[8])
        records.setdefault(row[0], {})[record.input_sha256] = record  # same bytes count once
    readings: dict[str, dict[tuple[str, int], tuple[str, str, str, Reading]]] = {}
    for row in conn.execute(sql(_READINGS, "g."), args):
        reading = Reading(row[3], row[4], row[5], row[6], float(row[7]), row[8], row[9], int(row[10]))
        readings.setdefault(row[3], {}).setdefault((row[2], reading.line),
                                                   (row[0], row[1], row[2], reading))
    decisions: dict[str, list[StationDecision]] = {}
    for r in conn.execute(sql(_DECISIONS, ""), args):
        decisions.setdefault(r[0], []).append(StationDecision(r[1], r[2], r[3], tuple(r[4]), r[5], r[6]))
    out = {}
    for cell in sorted(set(records) | set(readings) | set(decisions)):
        kept = sorted(records.get(cell, {}).values(),
                      key=lambda r: (r.analysed_at, r.station_id, r.result_id))
        out[cell] = PlantCell(lot, cell, tuple(kept), tuple(readings.get(cell, {}).values()),
                              tuple(decisions.get(cell, ())))
    return out


def fetch_cell(conn: Conn, lot: str, cell_id: str) -> PlantCell:
    """The cell's records, readings and station decisions as the plant holds them."""
    return fetch_cells(conn, lot, cell_id).get(cell_id) or PlantCell(lot, cell_id, (), (), ())


def lots_of_cell(conn: Conn, cell_id: str) -> list[str]:
    """Every lot in which a station holds a record, reading or decision of ``cell_id``."""
    rows = conn.execute(
        f"SELECT lot FROM {SCHEMA}.results WHERE cell_id = %s UNION "
        f"SELECT lot FROM {SCHEMA}.readings WHERE cell_id = %s UNION "
        f"SELECT lot FROM {SCHEMA}.decisions WHERE cell_id = %s ORDER BY 1",
        (cell_id, cell_id, cell_id),
    ).fetchall()
    return [str(r[0]) for r in rows]


def rule_book(conn: Conn, sha256: str) -> RuleBook:
    """The rule set kept under ``sha256``, as a book of its own."""
    row = conn.execute(f"SELECT name, text FROM {SCHEMA}.rule_texts WHERE sha256 = %s",
                       (sha256,)).fetchone()
    if row is None:
        raise FormgateError(
            f"the plant database has no rule text with SHA-256 {sha256}",
            None,
            "Let the station that judged with it forward its ledger (formgate status shows its "
            "plant feed).",
        )
    return RuleBook((load_rule_set(str(row[1]), str(row[0])),))


def cell_as_it_stands(cell: PlantCell, book: RuleBook) -> CellNow | None:
    """The cell's records that count over every station (pure)."""
    documents = [r.document for r in cell.records]
    readings = [(name, sha, reading) for _, name, sha, reading in cell.readings]
    return cell_now(documents, readings, book)


def seen_files(basis: Sequence[str]) -> frozenset[tuple[str, str]]:
    """(file name, SHA-256) of every file a station decision's basis names ("stage words:file
    name:SHA-256"; its review left out), as the station reads it (station/reviewing.py).

    >>> sorted(seen_files(["review:3", "formation and grading:c:1.csv:ab12"]))
    [('c:1.csv', 'ab12')]
    """
    found = set()
    for entry in basis:
        if entry.startswith("review:"):
            continue
        _, _, rest = entry.partition(":")  # stage words never hold a colon; a file name may
        name, _, sha = rest.rpartition(":")
        found.add((name, sha))
    return frozenset(found)


def latest_review(conn: Conn, lot: str, cell_id: str) -> Reviewed | None:
    """The cell's latest review at any station, with the decision it gave, or None."""
    row = conn.execute(
        f"SELECT v.action, v.reviewer, v.reason, v.stage, v.accepts, d.verdict, d.reason, "
        f"d.hazards, d.grade, d.basis FROM {SCHEMA}.reviews v JOIN {SCHEMA}.decisions d "
        f"ON d.station_id = v.station_id AND d.review_id = v.id "
        f"WHERE v.lot = %s AND v.cell_id = %s ORDER BY v.reviewed_at DESC, v.id DESC LIMIT 1",
        (lot, cell_id),
    ).fetchone()
    if row is None:
        return None
    asked = Asked(row[0], row[1], row[2], row[3], tuple(row[4]))
    return Reviewed(asked, Decided(row[5], row[6], tuple(row[7]), row[8]), seen_files(row[9]))


def decide_cell(
    cell: PlantCell, book: RuleBook, reviews: Sequence[Reviewed | None] = ()
) -> CellDecision | None:
    """The cell's decision over every station, as a station decides one (pure); None when no
    record names its cell type. A person's review decides the cell while it stands (it saw
    every file that counts for the cell now: judge/review.py), as at a station; of
    ``reviews`` (the plant's latest, then a station's) the first that stands decides."""
    now = cell_as_it_stands(cell, book)
    if now is None:
        return None
    for review in reviews:
        if review is not None and stands(review, now.stages.records, now.stages.files):
            given = review.given
            return CellDecision(given.verdict, (given.reason,) if given.reason else (),
                                given.hazards, ())
    return decide(now.needed, now.stages.records)


def latest_rule_set(cell: PlantCell) -> str | None:
    """The SHA-256 of the rule set of the cell's latest record (None: readings only)."""
    return cell.records[-1].rule_set_sha256 if cell.records else None


def basis_of(cell: PlantCell) -> list[str]:
    """What a plant decision rests on: each record and reading file, with its station."""
    out = [f"{r.station_id}:{r.input_name}:{r.input_sha256}" for r in cell.records]
    out += sorted({f"{s}:{name}:{sha}" for s, name, sha, _ in cell.readings})
    return out


def latest_plant_decision(conn: Conn, lot: str, cell_id: str) -> PlantDecision | None:
    row = conn.execute(
        f"SELECT id, verdict, reason, hazards, stations, rule_set_sha256, decided_by, decided_at, "
        f"review_id FROM {SCHEMA}.plant_decisions WHERE lot = %s AND cell_id = %s "
        f"ORDER BY id DESC LIMIT 1",
        (lot, cell_id),
    ).fetchone()
    if row is None:
        return None
    return PlantDecision(int(row[0]), row[1], row[2], tuple(row[3]), tuple(row[4]), row[5],
                         row[6], row[7], row[8])


def latest_plant_review(conn: Conn, lot: str, cell_id: str) -> Reviewed | None:
    """The cell's latest review made in the plant, with the plant decision it gave, or None
    (also for a role that may not read the plant's reviews: a station's own)."""
    try:
        row = _latest_plant_review_row(conn, lot, cell_id)
    except psycopg.errors.InsufficientPrivilege:
        return None
    if row is None:
        return None
    asked = Asked(row[0], row[1], row[2], row[3], tuple(row[4]))
    seen = frozenset((str(name), str(sha)) for name, sha in row[5])
    return Reviewed(asked, Decided(row[6], row[7], tuple(row[8])), seen)


def _latest_plant_review_row(conn: Conn, lot: str, cell_id: str) -> tuple[Any, ...] | None:
    return conn.execute(
        f"SELECT v.action, v.reviewer, v.reason, v.stage, v.accepts, v.seen, d.verdict, d.reason, "
        f"d.hazards FROM {SCHEMA}.plant_reviews v JOIN {SCHEMA}.plant_decisions d "
        f"ON d.review_id = v.id WHERE v.lot = %s AND v.cell_id = %s ORDER BY v.id DESC LIMIT 1",
        (lot, cell_id),
    ).fetchone()


def record_decision(
    conn: Conn,
    cell: PlantCell,
    decision: CellDecision,
    rule_set_sha256: str,
    *,
    decided_by: str,
    now: datetime.datetime,
) -> tuple[PlantDecision, bool]:
    """Record the plant's decision on ``cell`` unless its latest says the same; (it, new).

    A role that may read the plant but not record its decisions (a station's own) gets the
    decision as made now, unrecorded (id 0, and ``decided_by`` says so).
    """
    try:
        return _record_decision(conn, cell, decision, rule_set_sha256, decided_by=decided_by,
                                now=now)
    except psycopg.errors.InsufficientPrivilege:
        return PlantDecision(0, decision.verdict, decision.reason, decision.hazards, cell.stations,
                             rule_set_sha256, f"{decided_by} (not recorded: this role may not "
                             "record plant decisions)", now), True


def _record_decision(
    conn: Conn,
    cell: PlantCell,
    decision: CellDecision,
    rule_set_sha256: str,
    *,
    decided_by: str,
    now: datetime.datetime,
) -> tuple[PlantDecision, bool]:
    with conn.transaction():
        # one decider at a time per cell: two commands at once record one decision
        conn.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", (f"{cell.lot}\n{cell.cell_id}",))
        before = latest_plant_decision(conn, cell.lot, cell.cell_id)
        stations = cell.stations
        same = before is not None and (
            before.verdict, before.reason, before.hazards, before.stations, before.rule_set_sha256
        ) == (decision.verdict, decision.reason, decision.hazards, stations, rule_set_sha256)
        if same:
            assert before is not None
            return before, False
        conn.execute(
            f"INSERT INTO {SCHEMA}.plant_decisions (cell_id, lot, verdict, reason, hazards, "
            "stations, basis, rule_set_sha256, decided_by, decided_at, supersedes) "
            "VALUES (%s, %s, %s, %s, %s::jsonb, %s::jsonb, %s::jsonb, %s, %s, %s, %s)",
            (cell.cell_id, cell.lot, decision.verdict, decision.reason,
             json.dumps(list(decision.hazards)), json.dumps(list(stations)),
             json.dumps(basis_of(cell)), rule_set_sha256, decided_by, now,
             None if before is None else before.id),
        )
        after = latest_plant_decision(conn, cell.lot, cell.cell_id)
    assert after is not None
    return after, True


def across_stations(cell: PlantCell) -> bool:
    """Whether the cell's records and readings are at more than one station."""
    return len({r.station_id for r in cell.records} | {s for s, _, _, _ in cell.readings}) > 1


def decide_in_plant(
    conn: Conn, cell: PlantCell, *, decided_by: str, now: datetime.datetime
) -> tuple[PlantDecision, bool] | None:
    """Decide a cell whose records are at several stations and record it; None for a cell of one
    station (its station decides it) or one no record names the type of."""
    sha = latest_rule_set(cell)
    if not across_stations(cell) or sha is None:
        return None
    reviews = (latest_plant_review(conn, cell.lot, cell.cell_id),
               latest_review(conn, cell.lot, cell.cell_id))
    decision = decide_cell(cell, rule_book(conn, sha), reviews)
    if decision is None:
        return None
    return record_decision(conn, cell, decision, sha, decided_by=decided_by, now=now)


def stations_of(records: Sequence[PlantRecord]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(r.station_id for r in records))
