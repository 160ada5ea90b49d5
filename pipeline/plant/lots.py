"""A lot over every station, yield by station, cell type or day, finding a cell or a file, exports.

Edge module over the plant database. A cell's standing decision in the plant is its
station's latest decision when all its records are at one station, and the plant's own
(cells.py) when they are at several. A lot's screens are evaluated over every station's
cells with the station's own pure lot logic (pipeline.judge.lotclose.close_lot) and shown:
they decide nothing here (a lot is closed at a station). The export is one row per cell,
as CSV and as Parquet.
"""

from __future__ import annotations

import csv
import datetime
import io
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.errors import FormgateError
from pipeline.judge.cellverdict import outlier_phrase
from pipeline.judge.lotclose import close_lot
from pipeline.plant.cells import (
    Conn,
    PlantCell,
    across_stations,
    cell_as_it_stands,
    decide_in_plant,
    fetch_cells,
    latest_rule_set,
    rule_book,
)
from pipeline.plant.tables import SCHEMA
from pipeline.read.readings import ReadingFile
from pipeline.rulebook.book import RuleBook


@dataclass(frozen=True, slots=True)
class LotCell:
    """One cell of a lot as the plant shows it: its standing decision and who made it."""

    lot: str
    cell_id: str
    cell_type: str
    stations: tuple[str, ...]
    verdict: str  # pass, fail, hold, or "" when no station decided it yet
    reason: str
    hazards: tuple[str, ...]
    decided_by: str  # "station NAME" or "plant"
    last_record_at: datetime.datetime | None
    values: Mapping[str, float | None]


def lot_names(conn: Conn) -> list[str]:
    rows = conn.execute(
        f"SELECT lot FROM {SCHEMA}.results UNION SELECT lot FROM {SCHEMA}.readings ORDER BY 1"
    ).fetchall()
    return [str(r[0]) for r in rows]


class Books:
    """Rule books by SHA-256, each read from the plant once."""

    def __init__(self, conn: Conn) -> None:
        self.conn = conn
        self.kept: dict[str, RuleBook] = {}

    def get(self, sha256: str) -> RuleBook:
        if sha256 not in self.kept:
            self.kept[sha256] = rule_book(self.conn, sha256)
        return self.kept[sha256]


def standing(
    conn: Conn, cell: PlantCell, books: Books, *, decided_by: str, now: datetime.datetime
) -> LotCell:
    """The cell as the plant shows it (a plant decision is made and recorded where due)."""
    sha = latest_rule_set(cell)
    values: Mapping[str, float | None] = {}
    cell_type = str(cell.records[-1].document["cell_type"]["name"]) if cell.records else ""
    if sha is not None:
        now_cell = cell_as_it_stands(cell, books.get(sha))
        if now_cell is not None:
            values = now_cell.stages.values
    last = cell.records[-1].analysed_at if cell.records else None
    if across_stations(cell):
        made = decide_in_plant(conn, cell, decided_by=decided_by, now=now)
        if made is not None:
            d = made[0]
            return LotCell(cell.lot, cell.cell_id, cell_type, cell.stations, d.verdict, d.reason,
                           d.hazards, "plant", last, values)
    if cell.decisions:
        d2 = max(cell.decisions, key=lambda d: d.decided_at)
        return LotCell(cell.lot, cell.cell_id, cell_type, cell.stations, d2.verdict, d2.reason,
                       d2.hazards, f"station {d2.station_id}", last, values)
    return LotCell(cell.lot, cell.cell_id, cell_type, cell.stations, "", "not decided yet", (),
                   "", last, values)


def lot_cells(
    conn: Conn, lot: str, *, decided_by: str, now: datetime.datetime
) -> tuple[list[LotCell], list[PlantCell]]:
    """Every cell of ``lot`` at every station, as the plant shows it, and what it holds of each."""
    books = Books(conn)
    held = list(fetch_cells(conn, lot).values())
    if not held:
        names = lot_names(conn)
        from pipeline.rulebook.tables import did_you_mean

        raise FormgateError(
            f"the plant database has no lot {lot!r}",
            None,
            did_you_mean(lot, names) + ("Lots: " + ", ".join(names[:20]) if names else
                                        "No station has forwarded a lot yet."),
        )
    return [standing(conn, c, books, decided_by=decided_by, now=now) for c in held], held


def screens_text(lot: str, held: Sequence[PlantCell], books: Books) -> list[str]:
    """The lot's screens over every station's cells, as lines (they decide nothing here)."""
    documents = [r.document for c in held for r in c.records]
    files: dict[tuple[str, str], list[Any]] = {}
    sha_of: dict[str, str] = {}
    for c in held:
        for station, name, sha, reading in c.readings:
            files.setdefault((station, name), []).append(reading)
            sha_of[name] = sha
    latest = max((r for c in held for r in c.records), key=lambda r: r.analysed_at, default=None)
    if latest is None:
        return ["screens: no cycle-file record in the lot yet"]
    reading_files = [ReadingFile(name, {}, tuple(rs)) for (_, name), rs in files.items()]
    try:
        closed = close_lot(lot, documents, reading_files, books.get(latest.rule_set_sha256),
                           sha256=sha_of)
    except FormgateError as exc:
        return [f"screens: cannot be evaluated over the stations ({exc.problem})"]
    screens = closed.screens
    if not screens:
        return [f"screens: rule set {closed.rule_set.name} has none"]
    outliers = closed.statistics.outliers
    out = [f"screens over every station's passing cells ({', '.join(s.metric for s in screens)}): "
           f"{len(outliers)} outlier(s); they hold no cell until a station closes the lot"]
    out += [f"  {o.cell_id}  {outlier_phrase(o)}" for o in outliers]
    return out


def yield_rows(
    conn: Conn, by: str, *, decided_by: str, now: datetime.datetime,
    since: datetime.datetime | None = None,
) -> list[tuple[str, int, int, int, int]]:
    """(group, cells, passed, failed, held) by ``by`` (station, cell type or day), every lot."""
    groups: dict[str, list[int]] = {}
    for lot in lot_names(conn):
        cells, _ = lot_cells(conn, lot, decided_by=decided_by, now=now)
        for c in cells:
            if since is not None and (c.last_record_at is None or c.last_record_at < since):
                continue
            if by == "station":
                key = " + ".join(c.stations) if c.decided_by == "plant" else c.decided_by.removeprefix(
                    "station ")
            elif by == "cell-type":
                key = c.cell_type or "(unknown)"
            else:
                at = c.last_record_at
                key = at.astimezone(datetime.UTC).date().isoformat() if at else "(no record)"
            counts = groups.setdefault(key, [0, 0, 0, 0])
            counts[0] += 1
            for i, verdict in enumerate(("pass", "fail", "hold"), start=1):
                counts[i] += c.verdict == verdict
    return [(k, *v) for k, v in sorted(groups.items())]  # type: ignore[misc]


def find(conn: Conn, text: str) -> list[str]:
    """Lines naming every input with this SHA-256, or every record of a cell with this id."""
    text = text.strip()
    if len(text) == 64 and all(ch in "0123456789abcdef" for ch in text.lower()):
        rows = conn.execute(
            f"SELECT i.station_id, i.id, i.name, i.state, i.final_path, r.cell_id, r.lot, r.verdict "
            f"FROM {SCHEMA}.inputs i LEFT JOIN {SCHEMA}.results r "
            f"ON r.station_id = i.station_id AND r.input_id = i.id "
            f"WHERE i.sha256 = %s ORDER BY i.arrived_at, i.station_id, i.id, r.id",
            (text.lower(),),
        ).fetchall()
        return [
            f"station {r[0]}  input {r[1]}  {r[2]}  {r[3]}"
            + (f"  {r[4]}" if r[4] else "")
            + (f"  cell {r[5]} lot {r[6]}: {r[7]}" if r[5] else "")
            for r in rows
        ]
    rows = conn.execute(
        f"SELECT r.station_id, r.lot, r.cell_id, r.verdict, r.analysed_at, i.name, i.sha256 "
        f"FROM {SCHEMA}.results r JOIN {SCHEMA}.inputs i "
        f"ON i.station_id = r.station_id AND i.id = r.input_id "
        f"WHERE r.cell_id = %s ORDER BY r.analysed_at, r.station_id, r.id",
        (text,),
    ).fetchall()
    return [
        f"station {r[0]}  lot {r[1]}  cell {r[2]}  {r[3]}  judged "
        f"{r[4].astimezone(datetime.UTC).isoformat(timespec='seconds')}  {r[5]}  {r[6]}"
        for r in rows
    ]


_FIXED_COLUMNS = ("lot", "cell_id", "cell_type", "stations", "verdict", "reason", "hazards",
                  "decided_by")


def export_columns(cells: Sequence[LotCell]) -> dict[str, list[Any]]:
    """The lot export as columns: who decided what, then every metric (sorted) in its unit."""
    metrics = sorted({k for c in cells for k in c.values})
    out: dict[str, list[Any]] = {k: [] for k in (*_FIXED_COLUMNS, *metrics)}
    for c in cells:
        for key, value in zip(_FIXED_COLUMNS, (c.lot, c.cell_id, c.cell_type, ";".join(c.stations),
                                               c.verdict, c.reason, ";".join(c.hazards),
                                               c.decided_by), strict=True):
            out[key].append(value)
        for m in metrics:
            number = c.values.get(m)
            out[m].append(None if number is None else float(number))
    return out


def export_csv(cells: Sequence[LotCell]) -> bytes:
    """The lot export as CSV text (UTF-8, a header row, one row per cell; empty for no value)."""
    columns = export_columns(cells)
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for i in range(len(cells)):
        writer.writerow(["" if columns[k][i] is None else repr(columns[k][i])
                         if isinstance(columns[k][i], float) else columns[k][i] for k in columns])
    return buffer.getvalue().encode("utf-8")


def export_parquet(cells: Sequence[LotCell]) -> bytes:
    """The same export as a Parquet file (strings, and float64 for every metric)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    columns = export_columns(cells)
    table = pa.table({k: pa.array(v, type=pa.string() if k in _FIXED_COLUMNS else pa.float64())
                      for k, v in columns.items()})
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()
