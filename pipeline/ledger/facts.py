"""The ledger's station facts: inbox entries set aside, named station values, remembered rule texts.

Entries that are not inputs (quarantined or left in place), the running station's
named values (e.g. 'paused'), the rule sets in force after each good load and the
exact texts of rule sets and profiles results were judged with. Inputs, results and
mail are other table families'.
"""

from __future__ import annotations

import datetime
import json
from collections.abc import Callable, Sequence

from pipeline.ledger.connection import Connection
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import OutgoingMail, SetAsideRow, parse_time, set_aside_row, utc_text


class Facts:
    """Set-aside entries, station values and kept rule texts over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def set_aside(
        self,
        *,
        inbox: str,
        name: str,
        kind: str,
        reason: str,
        now: datetime.datetime,
        final_path: str | None = None,
        mails: Sequence[OutgoingMail] = (),
        entry_id: int | None = None,
    ) -> int:
        """Record an entry that is not an input, and queue its alerts, in one transaction.

        With ``final_path`` it was moved to quarantine; without, it was left in place (and
        recording the same entry left in place for the same reason again adds nothing).
        ``entry_id``: the id its quarantined name carries (:meth:`next_set_aside_id`).
        """
        at = utc_text(now, "now")
        state = "left_in_place" if final_path is None else "quarantined"
        with self.db.write() as conn:
            same = self.db.one(
                "SELECT id FROM set_aside WHERE state = 'left_in_place' AND ? IS NULL "
                "AND inbox = ? AND name = ? AND reason = ?",
                (final_path, inbox, name, reason),
            )
            if same is not None:
                return int(same["id"])
            cur = conn.execute(
                "INSERT INTO set_aside (id, inbox, name, kind, reason, noticed_at, state, "
                "final_path) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (entry_id, inbox, name, kind, reason, at, state, final_path),
            )
            for mail in mails:
                insert_mail(self.db, mail, created_at=at, result_id=None, lot=mail.lot)
            assert cur.lastrowid is not None
            return cur.lastrowid

    def next_set_aside_id(self) -> int:
        """The id the next set-aside entry will get (one writer, the station, records them),
        so that its quarantined name can lead to its row before the row exists."""
        row = self.db.one("SELECT coalesce(max(id), 0) + 1 AS n FROM set_aside")
        return 1 if row is None else int(row["n"])

    def set_aside_rows(self, limit: int = 10, *, state: str | None = None) -> list[SetAsideRow]:
        """Entries set aside, newest first; ``state`` 'quarantined' or 'left_in_place' filters."""
        rows = self.db.rows(
            "SELECT * FROM set_aside WHERE ? IS NULL OR state = ? ORDER BY noticed_at DESC, id DESC "
            "LIMIT ?",
            (state, state, limit),
        )
        return [set_aside_row(r) for r in rows]

    def note_state(self, key: str, value: str, *, now: datetime.datetime) -> None:
        """Set a named value of the running station (e.g. 'paused'); a real write every time."""
        with self.db.write() as conn:
            conn.execute(
                "INSERT INTO station_state (key, value, updated_at) VALUES (?, ?, ?) "
                "ON CONFLICT (key) DO UPDATE SET value = excluded.value, "
                "updated_at = excluded.updated_at",
                (key, value, utc_text(now, "now")),
            )

    def change_state(
        self,
        key: str,
        change: Callable[[str | None], tuple[str, Sequence[OutgoingMail]] | None],
        *,
        now: datetime.datetime,
    ) -> bool:
        """Set a named value to what ``change`` makes of it, and queue its letters, in one
        write transaction; True if ``change`` changed anything.

        ``change`` gets the value in force (None if it was never set) and returns the new
        value with the letters it calls for, or None to leave everything as it is. The
        write lock is taken before the value is read, so two processes changing one value
        at once take turns: neither acts on a value the other has just replaced (and a
        letter meant to go once is queued once). ``change`` runs inside the transaction:
        it must be quick and touch nothing else.
        """
        at = utc_text(now, "now")
        with self.db.write() as conn:
            row = self.db.one("SELECT value FROM station_state WHERE key = ?", (key,))
            changed = change(None if row is None else str(row["value"]))
            if changed is None:
                return False
            value, mails = changed
            conn.execute(
                "INSERT INTO station_state (key, value, updated_at) VALUES (?, ?, ?) "
                "ON CONFLICT (key) DO UPDATE SET value = excluded.value, "
                "updated_at = excluded.updated_at",
                (key, value, at),
            )
            for mail in mails:
                insert_mail(self.db, mail, created_at=at, result_id=None, lot=mail.lot)
            return True

    def state(self, key: str) -> tuple[str, datetime.datetime] | None:
        """(value, when it was set) of a named value, or None."""
        row = self.db.one("SELECT value, updated_at FROM station_state WHERE key = ?", (key,))
        return None if row is None else (row["value"], parse_time(row["updated_at"]))

    # ---- texts of the rules results were judged with ------------------------------------------

    def remember_rule_book(self, sha256s: Sequence[str], *, now: datetime.datetime) -> None:
        """Note the rule sets in force after a good load (nothing new if the same as the last)."""
        listed = json.dumps(sorted(sha256s))
        with self.db.write() as conn:
            last = self.db.one("SELECT rule_sets FROM rule_books ORDER BY id DESC LIMIT 1")
            if last is None or last["rule_sets"] != listed:
                conn.execute(
                    "INSERT INTO rule_books (rule_sets, loaded_at) VALUES (?, ?)",
                    (listed, utc_text(now, "now")),
                )

    def last_rule_book(self) -> list[tuple[str, str]]:
        """(name, text) of each rule set of the last good load; empty if there was none."""
        last = self.db.one("SELECT rule_sets FROM rule_books ORDER BY id DESC LIMIT 1")
        if last is None:
            return []
        texts = [self.text_by_sha(sha) for sha in json.loads(last["rule_sets"])]
        return [t for t in texts if t is not None]

    def remember_text(
        self, *, kind: str, sha256: str, name: str, text: str, now: datetime.datetime
    ) -> None:
        """Keep a rule set's (or profile's) exact text under its SHA-256; again is a no-op."""
        with self.db.write() as conn:
            conn.execute(
                "INSERT OR IGNORE INTO rule_texts (sha256, kind, name, text, first_used_at) "
                "VALUES (?, ?, ?, ?, ?)",
                (sha256, kind, name, text, utc_text(now, "now")),
            )

    def text_by_sha(self, sha256: str) -> tuple[str, str] | None:
        """(name, text) of a remembered rule set or profile, or None."""
        row = self.db.one("SELECT name, text FROM rule_texts WHERE sha256 = ?", (sha256,))
        return None if row is None else (row["name"], row["text"])
