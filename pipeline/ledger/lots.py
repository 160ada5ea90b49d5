"""The ledger's lots: which lots there are, how their cells stand, and each lot's close.

A closed lot is recorded once, with when, by whom (a command or the station's quiet
time) and where its report went; the first close stands. Counting a lot's cells by their
latest decision reads decisions.py's table.
"""

from __future__ import annotations

import datetime

from pipeline.ledger.connection import Connection
from pipeline.ledger.rows import LotRow, maybe_time, utc_text


class Lots:
    """The lots table (and what a lot's rows add up to) over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def names(self) -> list[str]:
        """Every lot with a judged cell or a reading, by name."""
        rows = self.db.rows(
            "SELECT lot FROM results UNION SELECT lot FROM readings ORDER BY lot"
        )
        return [r["lot"] for r in rows]

    def cell_type(self, lot: str) -> str | None:
        """The cell type of the lot's first judged cell (its readings' when it has none)."""
        row = self.db.one(
            "SELECT json_extract(result_json, '$.cell_type.name') AS t FROM results "
            "WHERE lot = ? AND verdict <> 'error' ORDER BY id LIMIT 1",
            (lot,),
        )
        if row is None or row["t"] is None:
            row = self.db.one(
                "SELECT cell_type AS t FROM readings WHERE lot = ? AND cell_type IS NOT NULL "
                "LIMIT 1",
                (lot,),
            )
        return None if row is None else str(row["t"])

    def get(self, lot: str) -> LotRow:
        """The lot's cells counted by their latest decision, its last activity and its close."""
        counts: dict[str, int] = {}
        rows = self.db.rows(
            "SELECT d.verdict, count(*) AS n FROM decisions d WHERE d.lot = ? AND d.id = "
            "(SELECT max(id) FROM decisions e WHERE e.lot = d.lot AND e.cell_id = d.cell_id) "
            "GROUP BY d.verdict",
            (lot,),
        )
        for r in rows:
            counts[r["verdict"]] = r["n"]
        cells = self.db.one(
            "SELECT count(*) AS n FROM (SELECT cell_id FROM results WHERE lot = ? "
            "UNION SELECT cell_id FROM readings WHERE lot = ?)",
            (lot, lot),
        )
        last = self.db.one(
            "SELECT max(t) AS t FROM (SELECT max(analysed_at) AS t FROM results WHERE lot = ? "
            "UNION ALL SELECT max(i.arrived_at) FROM readings g JOIN inputs i "
            "ON i.id = g.input_id WHERE g.lot = ?)",
            (lot, lot),
        )
        closed = self.db.one("SELECT * FROM lots WHERE lot = ?", (lot,))
        return LotRow(
            lot,
            int(cells["n"]) if cells else 0,
            counts,
            maybe_time(last["t"]) if last else None,
            maybe_time(closed["closed_at"]) if closed else None,
            closed["closed_by"] if closed else None,
            closed["report_path"] if closed else None,
            closed["export_path"] if closed else None,
        )

    def close(
        self,
        lot: str,
        *,
        by: str,
        now: datetime.datetime,
        report_path: str | None = None,
        export_path: str | None = None,
    ) -> bool:
        """Record that ``lot`` is closed; False if it already was (the first close stands)."""
        with self.db.write() as conn:
            if self.db.one("SELECT 1 FROM lots WHERE lot = ?", (lot,)) is not None:
                return False
            conn.execute(
                "INSERT INTO lots (lot, closed_at, closed_by, report_path, export_path) "
                "VALUES (?, ?, ?, ?, ?)",
                (lot, utc_text(now, "now"), by, report_path, export_path),
            )
            return True

    def note_report(self, lot: str, report_path: str, export_path: str) -> None:
        with self.db.write() as conn:
            conn.execute(
                "UPDATE lots SET report_path = ?, export_path = ? WHERE lot = ?",
                (report_path, export_path, lot),
            )
