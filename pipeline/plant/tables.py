"""What the plant feed forwards of each ledger table: its key, its columns and their kinds.

Pure. Each ledger table the feed forwards (``pipeline.ledger.migrations.FED_TABLES``) is
described once here: the columns as the ledger holds them, the kind each becomes in
PostgreSQL (a time text becomes a ``timestamptz``, a JSON text ``jsonb``), and the few
columns the station itself changes in place (an input's state as it is archived, a
result's ``superseded_by`` when a retest comes). Every other column is *fixed*: its values
are hashed into the row's ``row_sha256``, and a row that comes again with another hash was
changed after it was forwarded, which the feed never overwrites (feed.py). The insert and
compare statements are made from this table; the schema itself is schema.py's.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass

KINDS = ("int", "real", "text", "time", "json")
_CAST = {"int": "", "real": "", "text": "", "time": "::timestamptz", "json": "::jsonb"}
SCHEMA = "formgate"  # the PostgreSQL schema every plant table is in


@dataclass(frozen=True, slots=True)
class Fed:
    """One forwarded table: ``columns`` (name, kind) in the ledger's order, ``key`` among them."""

    table: str
    key: str
    columns: tuple[tuple[str, str], ...]
    changing: tuple[str, ...] = ()  # columns the station changes in place
    shared: bool = False  # one row for all stations, keyed by ``key`` alone (rule texts)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(name for name, _ in self.columns)

    @property
    def fixed(self) -> tuple[str, ...]:
        return tuple(n for n in self.names if n not in self.changing)

    @property
    def conflict(self) -> str:
        return self.key if self.shared else f"station_id, {self.key}"

    def kind(self, column: str) -> str:
        return dict(self.columns)[column]

    def insert_sql(self, rows: int) -> str:
        """INSERT of ``rows`` rows that skips those already there, returning the keys it stored."""
        marks = ", ".join(["%s", *(f"%s{_CAST[k]}" for _, k in self.columns), "%s"])
        values = ", ".join(f"({marks})" for _ in range(rows))
        return (
            f"INSERT INTO {SCHEMA}.{self.table} (station_id, {', '.join(self.names)}, row_sha256) "
            f"VALUES {values} ON CONFLICT ({self.conflict}) DO NOTHING RETURNING {self.key}"
        )

    def stored_sql(self) -> str:
        """The hashes the plant holds for some keys of this station (or of any, when shared)."""
        where = "" if self.shared else "station_id = %s AND "
        return (f"SELECT {self.key}, row_sha256 FROM {SCHEMA}.{self.table} "
                f"WHERE {where}{self.key} = ANY(%s)")

    def update_sql(self) -> str:
        """UPDATE of the changing columns of one stored row, when they differ."""
        sets = ", ".join(f"{c} = %s{_CAST[self.kind(c)]}" for c in self.changing)
        now = ", ".join(f"%s{_CAST[self.kind(c)]}" for c in self.changing)
        return (
            f"UPDATE {SCHEMA}.{self.table} SET {sets} WHERE station_id = %s AND {self.key} = %s "
            f"AND ({', '.join(self.changing)}{',' if len(self.changing) == 1 else ''}) "
            f"IS DISTINCT FROM ({now}{',' if len(self.changing) == 1 else ''})"
        )

    def row_sha256(self, row: Sequence[object]) -> str:
        """SHA-256 (hex) of the table's name and the fixed columns of ``row`` (values in the
        order of ``columns``, as the ledger holds them).

        >>> t = Fed("lots", "lot", (("lot", "text"), ("report_path", "text")), ("report_path",))
        >>> t.row_sha256(("L1", "a.pdf")) == t.row_sha256(("L1", "b.pdf"))
        True
        """
        values = [v for (name, _), v in zip(self.columns, row, strict=True) if name not in self.changing]
        text = json.dumps([self.table, *values], ensure_ascii=False, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _cols(spec: str) -> tuple[tuple[str, str], ...]:
    """'id:int name:text' -> (('id', 'int'), ('name', 'text'))."""
    out = tuple(tuple(part.split(":")) for part in spec.split())
    assert all(len(c) == 2 and c[1] in KINDS for c in out), spec
    return out  # type: ignore[return-value]


# In the order a batch is applied: a row's parents (an input before its results, a result
# before its checks) come first, so the plant's foreign keys hold within every batch.
FED: tuple[Fed, ...] = (
    Fed("rule_texts", "sha256", _cols("sha256:text kind:text name:text text:text first_used_at:time"),
        changing=("kind", "name", "first_used_at"), shared=True),
    Fed("inputs", "id", _cols(
        "id:int sha256:text name:text size:int arrived_at:time work_path:text state:text "
        "final_path:text final_at:time reason:text version:int supersedes:int duplicate_of:int"),
        changing=("state", "final_path", "final_at", "reason")),
    Fed("regrades", "id", _cols(
        "id:int started_at:time finished_at:time run_by:text reason:text rules_digest:text "
        "rule_sets:json selection:text summary:json"),
        changing=("finished_at", "summary")),
    Fed("results", "id", _cols(
        "id:int input_id:int cell_id:text lot:text verdict:text hazards:json result_json:json "
        "rule_set_name:text rule_set_revision:text rule_set_sha256:text analysed_at:time "
        "json_path:text pdf_path:text superseded_by:int digest_mail_id:int regrade_id:int"),
        changing=("json_path", "pdf_path", "superseded_by", "digest_mail_id")),
    Fed("checks", "id", _cols(
        "id:int result_id:int position:int rule_id:text metric:text value:real low:real "
        "high:real outcome:text severity:text hazard:text")),
    Fed("readings", "id", _cols(
        "id:int input_id:int cell_id:text lot:text cell_type:text at:time ocv_v:real "
        "acir_mohm:real temperature_c:real line:int")),
    Fed("reviews", "id", _cols(
        "id:int cell_id:text lot:text action:text stage:text accepts:json reviewer:text "
        "reason:text reviewed_at:time decision_id:int prev_hash:text row_hash:text")),
    Fed("decisions", "id", _cols(
        "id:int cell_id:text lot:text verdict:text reason:text hazards:json grade:text cause:text "
        "basis:json decided_at:time supersedes:int review_id:int prev_hash:text row_hash:text")),
    Fed("lots", "lot", _cols(
        "lot:text closed_at:time closed_by:text report_path:text export_path:text"),
        changing=("report_path", "export_path")),
    Fed("set_aside", "id", _cols(
        "id:int inbox:text name:text kind:text reason:text noticed_at:time state:text "
        "final_path:text")),
    Fed("published", "id", _cols(
        "id:int path:text sha256:text kind:text lot:text cell_id:text result_id:int "
        "decision_id:int published_at:time")),
    Fed("channel_alerts", "id", _cols(
        "id:int station:text channel:text raised_at:time cell_id:text lot:text evidence:text "
        "advice:text mail_id:int cleared_at:time cleared_by:text cleared_why:text"),
        changing=("cleared_at", "cleared_by", "cleared_why")),
)
FED_BY_TABLE = {t.table: t for t in FED}

# The ledger's tables a station keeps to itself, and why: its own bookkeeping, not a record
# of what it judged or decided. Every other table is forwarded (FED); a test holds the two
# lists to the ledger's schema, so a new table or column is forwarded or listed here.
KEPT_AT_STATION: dict[str, str] = {
    "migrations": "the ledger's own schema history",
    "outbox": "the station's letters while they wait and their delivery",
    "certificate_queue": "the station's renders still to do",
    "station_state": "the running station's named values",
    "rule_books": "which rule sets were in force at each load (their texts are forwarded)",
    "plant_feed": "the feed's own start",
    "plant_changes": "the feed's own log",
}

