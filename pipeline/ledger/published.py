"""The ledger's published files: every result, certificate, cell certificate and lot report the
station wrote, with the SHA-256 of the bytes it wrote.

`formgate verify` looks a file up here by its hash (or by a hash prefix, the verification
code printed on certificates) or by its path, and so tells a file as published from one
edited since. A file moved under another name (an earlier record kept beside a retest) is
recorded again under its new path; the rows are never changed.
"""

from __future__ import annotations

import datetime

from pipeline.ledger.connection import Connection
from pipeline.ledger.rows import PublishedRow, published_row, utc_text

KINDS = ("result", "certificate", "cell result", "cell certificate", "lot report", "lot export")


class Published:
    """The published table over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def record(
        self,
        *,
        path: str,
        sha256: str,
        kind: str,
        now: datetime.datetime,
        lot: str | None = None,
        cell_id: str | None = None,
        result_id: int | None = None,
        decision_id: int | None = None,
    ) -> int:
        """Note a file as written (its own write transaction); its row id."""
        if kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
        with self.db.write() as conn:
            cur = conn.execute(
                "INSERT INTO published (path, sha256, kind, lot, cell_id, result_id, "
                "decision_id, published_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (path, sha256, kind, lot, cell_id, result_id, decision_id, utc_text(now, "now")),
            )
            assert cur.lastrowid is not None
            return cur.lastrowid

    def by_sha(self, sha256_or_prefix: str) -> list[PublishedRow]:
        """Every row of a published file with this SHA-256 (or hash prefix, at least 8 hex
        digits), newest first."""
        text = sha256_or_prefix.lower()
        if len(text) < 8 or any(c not in "0123456789abcdef" for c in text):
            raise ValueError(f"a hash or verification code has at least 8 hex digits, got {text!r}")
        rows = self.db.rows(
            "SELECT * FROM published WHERE sha256 >= ? AND sha256 < ? ORDER BY id DESC",
            (text, text + "g"),
        )
        return [published_row(r) for r in rows]

    def by_path(self, path: str) -> PublishedRow | None:
        """The latest row of a file published at ``path``."""
        row = self.db.one("SELECT * FROM published WHERE path = ? ORDER BY id DESC LIMIT 1", (path,))
        return None if row is None else published_row(row)

    def every(self) -> list[PublishedRow]:
        """Every row, oldest first (`formgate verify --ledger` checks each path's latest)."""
        return [published_row(r) for r in self.db.rows("SELECT * FROM published ORDER BY id")]

    def of_cell(self, lot: str, cell_id: str) -> list[PublishedRow]:
        rows = self.db.rows(
            "SELECT * FROM published WHERE lot = ? AND cell_id = ? ORDER BY id", (lot, cell_id)
        )
        return [published_row(r) for r in rows]
