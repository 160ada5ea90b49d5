"""The ledger's cell history: aging readings, decisions on whole cells, and closed lots.

A cycle file's judgement is a result (ledger_inputs); a cell is more than one file.
Its aging readings come from reading files (one input may carry a whole lot), and its
decision over every stage and its lot is recorded here each time it changes: a new
row that names the one it supersedes, so the history is never rewritten. A closed
lot is recorded once, with when, by whom (a command or the station's quiet time)
and where its report went.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from pipeline.read.readings import Reading
from pipeline.station.ledger_base import LedgerBase
from pipeline.station.ledger_rows import OutgoingMail, ResultRow, _maybe_time, _result, _time, _utc

CAUSES = ("record", "readings", "lot closed", "rules")


@dataclass(frozen=True, slots=True)
class DecisionRow:
    """One decision on a whole cell. ``basis``: the ledger ids (result or input) it rests on."""

    id: int
    cell_id: str
    lot: str
    verdict: str
    reason: str
    hazards: tuple[str, ...]
    grade: str | None
    cause: str
    basis: tuple[str, ...]
    decided_at: datetime.datetime
    supersedes: int | None


@dataclass(frozen=True, slots=True)
class LotRow:
    """A lot as the ledger knows it: its cells' latest decisions counted, and its close."""

    lot: str
    cells: int
    counts: dict[str, int]
    last_activity: datetime.datetime | None
    closed_at: datetime.datetime | None
    closed_by: str | None
    report_path: str | None
    export_path: str | None


@dataclass(frozen=True, slots=True)
class StoredReading:
    """A reading as kept: the reading, and the input file (name, SHA-256) that brought it."""

    input_id: int
    file_name: str
    file_sha256: str
    reading: Reading


def _decision(row: object) -> DecisionRow:
    r = row  # sqlite3.Row
    return DecisionRow(
        r["id"],  # type: ignore[index]
        r["cell_id"],  # type: ignore[index]
        r["lot"],  # type: ignore[index]
        r["verdict"],  # type: ignore[index]
        r["reason"],  # type: ignore[index]
        tuple(json.loads(r["hazards"])),  # type: ignore[index]
        r["grade"],  # type: ignore[index]
        r["cause"],  # type: ignore[index]
        tuple(str(b) for b in json.loads(r["basis"])),  # type: ignore[index]
        _time(r["decided_at"]),  # type: ignore[index]
        r["supersedes"],  # type: ignore[index]
    )


class CellsMixin(LedgerBase):
    """Readings, decisions and lots; see the module docstring."""

    # ---- aging readings -----------------------------------------------------------------------

    def record_readings(self, input_id: int, readings: Sequence[Reading]) -> int:
        """Keep a reading file's readings and mark its input judged: ONE transaction.

        Returns how many were kept; a second call for the same input keeps nothing new.
        """
        with self._write() as conn:
            row = self._one("SELECT state FROM inputs WHERE id = ?", (input_id,))
            if row is None:
                raise ValueError(f"no input {input_id}")
            if row["state"] != "claimed":
                return 0
            conn.executemany(
                "INSERT INTO readings (input_id, cell_id, lot, cell_type, at, ocv_v, acir_mohm, "
                "temperature_c, line) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    (input_id, r.cell_id, r.lot, r.cell_type, _utc(r.at, "a reading's time"),
                     r.ocv_v, r.acir_mohm, r.temperature_c, r.line)
                    for r in readings
                ],
            )
            conn.execute("UPDATE inputs SET state = 'judged' WHERE id = ?", (input_id,))
            return len(readings)

    def has_readings(self, input_id: int) -> bool:
        return self._one("SELECT 1 FROM readings WHERE input_id = ? LIMIT 1", (input_id,)) is not None

    def cells_of_input(self, input_id: int) -> list[tuple[str, str]]:
        """(lot, cell_id) of every cell a reading file carried, in order."""
        rows = self._conn.execute(
            "SELECT DISTINCT lot, cell_id FROM readings WHERE input_id = ? ORDER BY lot, cell_id",
            (input_id,),
        )
        return [(r["lot"], r["cell_id"]) for r in rows]

    def readings_of(self, lot: str, cell_id: str | None = None) -> list[StoredReading]:
        """The kept readings of a lot (or of one cell of it), from inputs not quarantined."""
        sql = (
            "SELECT g.*, i.name AS file_name, i.sha256 AS file_sha256 FROM readings g "
            "JOIN inputs i ON i.id = g.input_id WHERE g.lot = ? AND i.state <> 'quarantined'"
        )
        params: tuple[str, ...] = (lot,)
        if cell_id is not None:
            sql += " AND g.cell_id = ?"
            params = (lot, cell_id)
        rows = self._conn.execute(sql + " ORDER BY g.cell_id, g.at, g.id", params)
        return [
            StoredReading(
                r["input_id"],
                r["file_name"],
                r["file_sha256"],
                Reading(r["cell_id"], r["lot"], r["cell_type"], _time(r["at"]), r["ocv_v"],
                        r["acir_mohm"], r["temperature_c"], r["line"]),
            )
            for r in rows
        ]

    def results_of_cell(self, lot: str, cell_id: str) -> list[ResultRow]:
        """Every published result of the cell's cycle files, oldest first (all records of it)."""
        return self.results_of_lot(lot, cell_id)

    def results_of_lot(self, lot: str, cell_id: str | None = None) -> list[ResultRow]:
        """Every published result of the lot's (or one cell's) cycle files, in one query,
        oldest first: every record, superseded ones included."""
        sql = (
            "SELECT r.* FROM results r JOIN inputs i ON i.id = r.input_id "
            "WHERE r.lot = ? AND i.state IN ('published', 'archived')"
        )
        params: tuple[str, ...] = (lot,)
        if cell_id is not None:
            sql, params = sql + " AND r.cell_id = ?", (lot, cell_id)
        rows = self._conn.execute(sql + " ORDER BY r.analysed_at, r.id", params)
        return [_result(r) for r in rows]

    def move_outputs(self, result_id: int, json_path: str, pdf_path: str | None) -> None:
        """Record where an earlier record's published files were moved to (kept, not replaced)."""
        with self._write() as conn:
            conn.execute(
                "UPDATE results SET json_path = ?, pdf_path = ? WHERE id = ?",
                (json_path, pdf_path, result_id),
            )

    # ---- decisions on whole cells ---------------------------------------------------------------

    def latest_decision(self, lot: str, cell_id: str) -> DecisionRow | None:
        row = self._one(
            "SELECT * FROM decisions WHERE lot = ? AND cell_id = ? ORDER BY id DESC LIMIT 1",
            (lot, cell_id),
        )
        return None if row is None else _decision(row)

    def latest_decisions(self, lot: str) -> dict[str, DecisionRow]:
        """Each cell of the lot -> its latest decision, in one query."""
        rows = self._conn.execute(
            "SELECT d.* FROM decisions d WHERE d.lot = ? AND d.id = (SELECT max(id) FROM "
            "decisions e WHERE e.lot = d.lot AND e.cell_id = d.cell_id)",
            (lot,),
        )
        return {r["cell_id"]: _decision(r) for r in rows}

    def decisions_of(self, lot: str, cell_id: str) -> list[DecisionRow]:
        """Every decision on the cell, oldest first."""
        rows = self._conn.execute(
            "SELECT * FROM decisions WHERE lot = ? AND cell_id = ? ORDER BY id", (lot, cell_id)
        )
        return [_decision(r) for r in rows]

    def decide_cell(
        self,
        *,
        cell_id: str,
        lot: str,
        verdict: str,
        reason: str,
        hazards: Sequence[str],
        grade: str | None,
        cause: str,
        basis: Sequence[str],
        now: datetime.datetime,
        letters: Callable[[DecisionRow | None], Sequence[OutgoingMail]] | None = None,
    ) -> tuple[DecisionRow, DecisionRow | None, bool]:
        """Record the cell's decision if it differs from its latest, with its letters: ONE
        transaction. Returns (the decision in force, the one before it, whether it is new).

        The same verdict, reason, hazards and grade again records nothing, so
        recomputing is always safe. ``letters`` is given the decision before (or None)
        and returns the mails this change calls for; they are queued with it.
        """
        if cause not in CAUSES:
            raise ValueError(f"cause must be one of {CAUSES}, got {cause!r}")
        with self._write() as conn:
            last = self.latest_decision(lot, cell_id)
            same = last is not None and (last.verdict, last.reason, last.hazards, last.grade) == (
                verdict, reason, tuple(hazards), grade
            )
            if last is not None and same:
                return last, None, False
            cur = conn.execute(
                "INSERT INTO decisions (cell_id, lot, verdict, reason, hazards, grade, cause, "
                "basis, decided_at, supersedes) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (cell_id, lot, verdict, reason, json.dumps(list(hazards)), grade, cause,
                 json.dumps(list(basis)), _utc(now, "now"), None if last is None else last.id),
            )
            new = self._one("SELECT * FROM decisions WHERE id = ?", (cur.lastrowid,))
            assert new is not None
            for mail in letters(last) if letters is not None else ():
                self._insert_mail(mail, created_at=_utc(now, "now"), result_id=None, lot=lot)
            return _decision(new), last, True

    # ---- lots ------------------------------------------------------------------------------------

    def lot_names(self) -> list[str]:
        """Every lot with a judged cell or a reading, by name."""
        rows = self._conn.execute(
            "SELECT lot FROM results UNION SELECT lot FROM readings ORDER BY lot"
        )
        return [r["lot"] for r in rows]

    def cells_behind(self, since: datetime.datetime, limit: int = 5000) -> list[tuple[str, str]]:
        """(lot, cell) of cells with a record or reading since ``since`` newer than their
        latest decision (or with none): a crash came between the two."""
        rows = self._conn.execute(
            "SELECT e.lot, e.cell_id FROM ("
            "  SELECT r.lot, r.cell_id, max(r.analysed_at) AS t FROM results r "
            "  JOIN inputs i ON i.id = r.input_id WHERE i.state IN ('published', 'archived') "
            "  AND r.verdict <> 'error' AND r.analysed_at >= ? GROUP BY r.lot, r.cell_id "
            "  UNION ALL "
            "  SELECT g.lot, g.cell_id, max(i.arrived_at) FROM readings g "
            "  JOIN inputs i ON i.id = g.input_id WHERE i.state IN ('published', 'archived') "
            "  AND i.arrived_at >= ? GROUP BY g.lot, g.cell_id"
            ") e GROUP BY e.lot, e.cell_id HAVING max(e.t) > coalesce((SELECT max(d.decided_at) "
            "FROM decisions d WHERE d.lot = e.lot AND d.cell_id = e.cell_id), '') "
            "ORDER BY e.lot, e.cell_id LIMIT ?",
            (_utc(since, "since"), _utc(since, "since"), limit),
        )
        return [(r["lot"], r["cell_id"]) for r in rows]

    def waiting_cells(self) -> list[tuple[str, str, str, datetime.datetime]]:
        """(lot, cell, reason, first decided) of every cell of an open lot whose latest
        decision holds it while it waits for a stage."""
        rows = self._conn.execute(
            "SELECT d.lot, d.cell_id, d.reason, (SELECT min(decided_at) FROM decisions f "
            "WHERE f.lot = d.lot AND f.cell_id = d.cell_id) AS first_at FROM decisions d "
            "WHERE d.verdict = 'hold' AND d.reason LIKE '%waiting for stage%' "
            "AND d.lot NOT IN (SELECT lot FROM lots) AND d.id = (SELECT max(id) FROM decisions e "
            "WHERE e.lot = d.lot AND e.cell_id = d.cell_id) ORDER BY d.lot, d.cell_id"
        )
        return [(r["lot"], r["cell_id"], r["reason"], _time(r["first_at"])) for r in rows]

    def lot_cell_type(self, lot: str) -> str | None:
        """The cell type of the lot's first judged cell (its readings' when it has none)."""
        row = self._one(
            "SELECT json_extract(result_json, '$.cell_type.name') AS t FROM results "
            "WHERE lot = ? AND verdict <> 'error' ORDER BY id LIMIT 1",
            (lot,),
        )
        if row is None or row["t"] is None:
            row = self._one(
                "SELECT cell_type AS t FROM readings WHERE lot = ? AND cell_type IS NOT NULL "
                "LIMIT 1",
                (lot,),
            )
        return None if row is None else str(row["t"])

    def lot(self, lot: str) -> LotRow:
        """The lot's cells counted by their latest decision, its last activity and its close."""
        counts: dict[str, int] = {}
        rows = self._conn.execute(
            "SELECT d.verdict, count(*) AS n FROM decisions d WHERE d.lot = ? AND d.id = "
            "(SELECT max(id) FROM decisions e WHERE e.lot = d.lot AND e.cell_id = d.cell_id) "
            "GROUP BY d.verdict",
            (lot,),
        )
        for r in rows:
            counts[r["verdict"]] = r["n"]
        cells = self._one(
            "SELECT count(*) AS n FROM (SELECT cell_id FROM results WHERE lot = ? "
            "UNION SELECT cell_id FROM readings WHERE lot = ?)",
            (lot, lot),
        )
        last = self._one(
            "SELECT max(t) AS t FROM (SELECT max(analysed_at) AS t FROM results WHERE lot = ? "
            "UNION ALL SELECT max(i.arrived_at) FROM readings g JOIN inputs i "
            "ON i.id = g.input_id WHERE g.lot = ?)",
            (lot, lot),
        )
        closed = self._one("SELECT * FROM lots WHERE lot = ?", (lot,))
        return LotRow(
            lot,
            int(cells["n"]) if cells else 0,
            counts,
            _maybe_time(last["t"]) if last else None,
            _maybe_time(closed["closed_at"]) if closed else None,
            closed["closed_by"] if closed else None,
            closed["report_path"] if closed else None,
            closed["export_path"] if closed else None,
        )

    def close_lot(
        self,
        lot: str,
        *,
        by: str,
        now: datetime.datetime,
        report_path: str | None = None,
        export_path: str | None = None,
    ) -> bool:
        """Record that ``lot`` is closed; False if it already was (the first close stands)."""
        with self._write() as conn:
            if self._one("SELECT 1 FROM lots WHERE lot = ?", (lot,)) is not None:
                return False
            conn.execute(
                "INSERT INTO lots (lot, closed_at, closed_by, report_path, export_path) "
                "VALUES (?, ?, ?, ?, ?)",
                (lot, _utc(now, "now"), by, report_path, export_path),
            )
            return True

    def note_lot_report(self, lot: str, report_path: str, export_path: str) -> None:
        with self._write() as conn:
            conn.execute(
                "UPDATE lots SET report_path = ?, export_path = ? WHERE lot = ?",
                (report_path, export_path, lot),
            )
