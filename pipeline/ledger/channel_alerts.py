"""The ledger's channel alerts: which channels are suspect, since when, on what evidence, and
who cleared them; and the recent records of a station's channels, read for the screen.

One open alert per channel (a unique index), raised with its alert mail in one transaction,
so a channel is alerted once however many of its cells fail after. The screen itself is
pure (pipeline/judge/channels.py); this module only stores what it found.
"""

from __future__ import annotations

import datetime
import json
import sqlite3
from dataclasses import dataclass

from pipeline.ledger.connection import Connection
from pipeline.ledger.outbox import insert_mail
from pipeline.ledger.rows import OutgoingMail, parse_time, utc_text


@dataclass(frozen=True, slots=True)
class ChannelAlert:
    """One alert on one channel: open while ``cleared_at`` is None."""

    id: int
    station: str
    channel: str
    raised_at: datetime.datetime
    cell_id: str
    lot: str
    evidence: str
    advice: str
    cleared_at: datetime.datetime | None
    cleared_by: str | None
    cleared_why: str | None


@dataclass(frozen=True, slots=True)
class StoredRecord:
    """One judged record as the screen reads it back: where and when it was tested, its verdict,
    the checks out of window and its metrics (JSON text of the result's ``metrics``)."""

    result_id: int
    cell_id: str
    lot: str
    verdict: str
    station: str
    channel: str
    started_at: str
    checks_out: tuple[str, ...]
    metrics: dict[str, float | None]


def _alert(r: sqlite3.Row) -> ChannelAlert:
    return ChannelAlert(
        r["id"], r["station"], r["channel"], parse_time(r["raised_at"]), r["cell_id"], r["lot"],
        r["evidence"], r["advice"], parse_time(r["cleared_at"]) if r["cleared_at"] else None,
        r["cleared_by"], r["cleared_why"],
    )


class ChannelAlerts:
    """Channel alerts and the channel records of the results, over the ledger's one connection."""

    def __init__(self, db: Connection) -> None:
        self.db = db

    def open_alert(self, station: str, channel: str) -> ChannelAlert | None:
        row = self.db.one(
            "SELECT * FROM channel_alerts WHERE station = ? AND channel = ? AND cleared_at IS NULL",
            (station, channel),
        )
        return None if row is None else _alert(row)

    def every(self, station: str | None = None, channel: str | None = None) -> list[ChannelAlert]:
        """Every alert, open or cleared, oldest first (of one station and channel if given)."""
        sql, params = "SELECT * FROM channel_alerts", []
        if station is not None and channel is not None:
            sql += " WHERE station = ? AND channel = ?"
            params = [station, channel]
        return [_alert(r) for r in self.db.rows(sql + " ORDER BY raised_at, id", tuple(params))]

    def raise_alert(
        self, *, station: str, channel: str, cell_id: str, lot: str, evidence: str, advice: str,
        mail: OutgoingMail | None, now: datetime.datetime,
    ) -> bool:
        """Record an alert on the channel with its mail, in one transaction; False (and nothing
        recorded) when the channel already has an open alert."""
        at = utc_text(now, "now")
        with self.db.write():
            if self.open_alert(station, channel) is not None:
                return False
            mail_id = insert_mail(self.db, mail, created_at=at, result_id=None, lot=lot) if mail else None
            self.db.rows(
                "INSERT INTO channel_alerts (station, channel, raised_at, cell_id, lot, evidence, advice, "
                "mail_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (station, channel, at, cell_id, lot, evidence, advice, mail_id),
            )
            return True

    def clear(self, station: str, channel: str, *, by: str, why: str, now: datetime.datetime) -> bool:
        """A person cleared the channel (checked, repaired): False when it had no open alert."""
        with self.db.write():
            found = self.open_alert(station, channel)
            if found is None:
                return False
            self.db.rows(
                "UPDATE channel_alerts SET cleared_at = ?, cleared_by = ?, cleared_why = ? WHERE id = ?",
                (utc_text(now, "now"), by, why, found.id),
            )
            return True

    def recent_records(self, limit: int, station: str | None = None) -> list[StoredRecord]:
        """The latest ``limit`` recorded records that name a channel (of ``station`` when given),
        oldest first: read with SQLite's JSON functions, not parsed whole."""
        where = "json_extract(r.result_json, '$.cell.channel') IS NOT NULL"
        params: tuple[object, ...] = ()
        if station is not None:
            where += " AND coalesce(json_extract(r.result_json, '$.cell.station'), '') = ?"
            params = (station,)
        rows = self.db.rows(
            "SELECT r.id, r.cell_id, r.lot, r.verdict, "
            "coalesce(json_extract(r.result_json, '$.cell.station'), '') AS station, "
            "json_extract(r.result_json, '$.cell.channel') AS channel, "
            "coalesce(json_extract(r.result_json, '$.cell.started_at'), r.analysed_at) AS started_at, "
            "json_extract(r.result_json, '$.metrics') AS metrics, "
            "(SELECT json_group_array(c.rule_id) FROM checks c WHERE c.result_id = r.id "
            "  AND c.outcome IN ('out_of_window', 'not_judged')) AS out "
            # a record counts once it is recorded ('judged'), before its files are written: the
            # station screens right after recording it
            "FROM results r JOIN inputs i ON i.id = r.input_id "
            "WHERE i.state IN ('judged', 'published', 'archived') "
            f"AND r.regrade_id IS NULL AND {where} ORDER BY r.id DESC LIMIT ?",
            (*params, limit),
        )
        out = []
        for r in reversed(list(rows)):
            metrics = json.loads(r["metrics"] or "{}")
            out.append(StoredRecord(
                r["id"], r["cell_id"], r["lot"], r["verdict"], str(r["station"]), str(r["channel"]),
                str(r["started_at"]), tuple(json.loads(r["out"] or "[]")),
                {k: float(v) if isinstance(v, int | float) else None for k, v in metrics.items()},
            ))
        return out


__all__ = ["ChannelAlert", "ChannelAlerts", "StoredRecord"]

