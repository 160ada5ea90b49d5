"""Comparing a station's ledger with what the plant database holds for that station.

Edge module over a ledger and the plant database. For every forwarded table (tables.py) the
rows of the ledger and the plant's rows under the station's id are compared by key and by
``row_sha256``, the hash of the row's fixed columns the feed stores with each row: rows
missing from the plant, rows the plant holds that the ledger does not, and rows whose hash
differs (changed after they were forwarded). The set of input SHA-256s is compared too. Rule
texts are shared by every station: the plant must hold each text the ledger holds, under its
hash. Rows the feed has still to forward are counted, so a difference they explain can be
told from one they do not. Read-only on both sides.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from pipeline.ledger.ledger import Ledger
from pipeline.plant.forward import behind
from pipeline.plant.tables import FED, SCHEMA, Fed

Conn = Any  # a psycopg connection


@dataclass(frozen=True, slots=True)
class TableCompare:
    table: str
    ledger_rows: int
    plant_rows: int
    missing: tuple[object, ...] = ()  # keys in the ledger, not in the plant
    extra: tuple[object, ...] = ()  # keys in the plant, not in the ledger
    changed: tuple[object, ...] = ()  # keys whose row hash differs

    @property
    def same(self) -> bool:
        return not (self.missing or self.extra or self.changed)


@dataclass(frozen=True, slots=True)
class Comparison:
    station_id: str
    tables: tuple[TableCompare, ...]
    inputs_missing: tuple[str, ...]  # input SHA-256s the plant lacks
    inputs_extra: tuple[str, ...]  # input SHA-256s only the plant holds
    behind: int  # changes the feed has still to forward
    notes: list[str] = field(default_factory=list)

    @property
    def same(self) -> bool:
        return all(t.same for t in self.tables) and not (self.inputs_missing or self.inputs_extra)


def _ledger_hashes(ledger: Ledger, fed: Fed) -> dict[object, str]:
    key = fed.names.index(fed.key)
    rows = ledger.db.rows(f"SELECT {', '.join(fed.names)} FROM {fed.table}").fetchall()
    return {tuple(r)[key]: fed.row_sha256(tuple(r)) for r in rows}


def _plant_hashes(conn: Conn, fed: Fed, station_id: str, keys: Mapping[object, str]) -> dict[object, str]:
    if fed.shared:  # every station's texts: only those of this ledger are compared
        rows = conn.execute(fed.stored_sql(), (list(keys),)).fetchall()
    else:
        rows = conn.execute(f"SELECT {fed.key}, row_sha256 FROM {SCHEMA}.{fed.table} "
                            "WHERE station_id = %s", (station_id,)).fetchall()
    return {r[0]: r[1] for r in rows}


def compare(ledger: Ledger, conn: Conn, station_id: str) -> Comparison:
    """The station's ledger beside the plant's rows for ``station_id``."""
    tables = []
    for fed in FED:
        mine = _ledger_hashes(ledger, fed)
        theirs = _plant_hashes(conn, fed, station_id, mine)
        tables.append(TableCompare(
            fed.table, len(mine), len(theirs),
            missing=tuple(sorted((k for k in mine if k not in theirs), key=str)),
            extra=tuple(sorted((k for k in theirs if k not in mine), key=str)),
            changed=tuple(sorted((k for k in mine if k in theirs and theirs[k] != mine[k]), key=str)),
        ))
    ledger_inputs = {str(r[0]) for r in ledger.db.rows("SELECT sha256 FROM inputs")}
    plant_inputs = {str(r[0]) for r in conn.execute(
        f"SELECT sha256 FROM {SCHEMA}.inputs WHERE station_id = %s", (station_id,))}
    return Comparison(station_id, tuple(tables), tuple(sorted(ledger_inputs - plant_inputs)),
                      tuple(sorted(plant_inputs - ledger_inputs)), behind(ledger))


def _keys(keys: tuple[object, ...], most: int = 5) -> str:
    shown = ", ".join(str(k) for k in keys[:most])
    return shown + (f" and {len(keys) - most:,} more" if len(keys) > most else "")


def report_lines(c: Comparison) -> list[str]:
    """The comparison as lines: one per table, then the inputs, then what it means."""
    out = [f"station {c.station_id}: ledger against the plant database"]
    width = max(len(t.table) for t in c.tables)
    for t in c.tables:
        word = "same" if t.same else "DIFFERS"
        line = f"  {t.table:<{width}}  ledger {t.ledger_rows:>9,}  plant {t.plant_rows:>9,}  {word}"
        parts = []
        if t.missing:
            parts.append(f"{len(t.missing):,} not in the plant ({_keys(t.missing)})")
        if t.extra:
            parts.append(f"{len(t.extra):,} only in the plant ({_keys(t.extra)})")
        if t.changed:
            parts.append(f"{len(t.changed):,} changed since forwarded ({_keys(t.changed)})")
        out.append(line + (": " + "; ".join(parts) if parts else ""))
    inputs = "same" if not (c.inputs_missing or c.inputs_extra) else (
        f"{len(c.inputs_missing):,} not in the plant, {len(c.inputs_extra):,} only in the plant")
    out.append(f"  input SHA-256s: {inputs}")
    if c.behind:
        out.append(f"  the feed has {c.behind:,} change(s) still to forward: rows not in the plant "
                   "yet, or changed in place since, may be those")
    if c.same:
        out.append("the plant holds exactly the ledger's rows for this station")
    else:
        out.append("the plant and the ledger differ" + (
            " (the feed is behind: look again once `formgate status` shows it up to date)"
            if c.behind else "; a row changed since it was forwarded stops the feed (docs/plant.md)"))
    return out
