"""The ledger's aging readings: open-circuit voltage (and resistance) readings of cells, by file.

A reading file may carry a whole lot; its readings are kept in ONE transaction that
marks its input judged, and are read back per lot or per cell with the file that
brought them. Deciding what they mean is the station's (and the judge's).
"""

from __future__ import annotations

from collections.abc import Sequence

from pipeline.ledger.connection import Connection
from pipeline.ledger.rows import StoredReading, parse_time, utc_text
from pipeline.read.readings import Reading


class Readings:
    """The readings table over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def record(self, input_id: int, readings: Sequence[Reading]) -> int:
        """Keep a reading file's readings and mark its input judged: ONE transaction.

        Returns how many were kept; a second call for the same input keeps nothing new.
        """
        with self.db.write() as conn:
            row = self.db.one("SELECT state FROM inputs WHERE id = ?", (input_id,))
            if row is None:
                raise ValueError(f"no input {input_id}")
            if row["state"] != "claimed":
                return 0
            conn.executemany(
                "INSERT INTO readings (input_id, cell_id, lot, cell_type, at, ocv_v, acir_mohm, "
                "temperature_c, line) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    (input_id, r.cell_id, r.lot, r.cell_type, utc_text(r.at, "a reading's time"),
                     r.ocv_v, r.acir_mohm, r.temperature_c, r.line)
                    for r in readings
                ],
            )
            conn.execute("UPDATE inputs SET state = 'judged' WHERE id = ?", (input_id,))
            return len(readings)

    def exist_for(self, input_id: int) -> bool:
        return self.db.one("SELECT 1 FROM readings WHERE input_id = ? LIMIT 1", (input_id,)) is not None

    def cells_of_input(self, input_id: int) -> list[tuple[str, str]]:
        """(lot, cell_id) of every cell a reading file carried, in order."""
        rows = self.db.rows(
            "SELECT DISTINCT lot, cell_id FROM readings WHERE input_id = ? ORDER BY lot, cell_id",
            (input_id,),
        )
        return [(r["lot"], r["cell_id"]) for r in rows]

    def of(self, lot: str, cell_id: str | None = None) -> list[StoredReading]:
        """The kept readings of a lot (or of one cell of it), from inputs not quarantined."""
        sql = (
            "SELECT g.*, i.name AS file_name, i.sha256 AS file_sha256 FROM readings g "
            "JOIN inputs i ON i.id = g.input_id WHERE g.lot = ? AND i.state <> 'quarantined'"
        )
        params: tuple[str, ...] = (lot,)
        if cell_id is not None:
            sql += " AND g.cell_id = ?"
            params = (lot, cell_id)
        rows = self.db.rows(sql + " ORDER BY g.cell_id, g.at, g.id", params)
        return [
            StoredReading(
                r["input_id"],
                r["file_name"],
                r["file_sha256"],
                Reading(r["cell_id"], r["lot"], r["cell_type"], parse_time(r["at"]), r["ocv_v"],
                        r["acir_mohm"], r["temperature_c"], r["line"]),
            )
            for r in rows
        ]
