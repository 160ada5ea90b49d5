"""Noting in the ledger each file the station publishes, with the SHA-256 of the bytes it wrote.

The station calls :func:`note_written` right after it has written a cell's result JSON and
certificate (and a lot's report and export), before the input counts as published: a
crash in between leaves the input 'judged', and the restart writes the same bytes again
and records them then. Recording is idempotent (a file already recorded at its path with
the same hash is not recorded twice), so a restart after the record adds nothing.

An earlier record's files moved to ``~record-N`` names are recorded again under their new
path by :func:`note_kept`, but only when the bytes moved are the ones that were published:
a file changed since is moved as it is and stays unrecorded, so that `formgate verify` still
tells it from the original (recording it would make the change look published).

Paths are recorded absolute, whatever folder the station was started from, so that
`formgate verify` finds a file by its path from anywhere.
"""

from __future__ import annotations

import datetime
import hashlib
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import ResultRow
from pipeline.station.settings import Settings


@dataclass(frozen=True, slots=True)
class Written:
    """One file just written: where, the exact bytes, and its kind (ledger/published.py KINDS)."""

    path: Path
    data: bytes
    kind: str


def recorded_path(path: Path) -> str:
    """The path as the ledger records it: absolute, symbolic links left as they are."""
    return os.path.abspath(path)


def located(settings: Settings, recorded: str) -> Path:
    """Where a recorded path is in this station's folders: every published or archived file
    is ``<folder>/<lot or day>/<name>``, so the same place under this station's folder of that
    name (a station started from another working folder, or copied elsewhere for an audit,
    recorded other paths to it); else the path as recorded."""
    path = Path(recorded)
    parts = path.parts
    here = [base / parts[-2] / parts[-1]
            for base in (settings.results, settings.certificates, settings.archive)
            if len(parts) >= 3 and parts[-3] == base.name]
    # a file missing here is missing, even where the path as recorded still leads to one
    return next((h for h in here if h.exists()), here[0] if here else path)


def note_written(
    ledger: Ledger,
    files: Sequence[Written],
    *,
    now: datetime.datetime,
    lot: str | None,
    cell_id: str | None = None,
    result_id: int | None = None,
    decision_id: int | None = None,
) -> None:
    """Record ``files`` as published, in one transaction (one commit for a cell's files)."""
    with ledger.db.write():
        for f in files:
            sha = hashlib.sha256(f.data).hexdigest()
            path = recorded_path(f.path)
            last = ledger.published.by_path(path)
            if last is not None and (last.sha256, last.kind, last.result_id) == (
                sha, f.kind, result_id
            ):
                continue  # a restart wrote the same bytes again
            ledger.published.record(
                path=path, sha256=sha, kind=f.kind, now=now, lot=lot, cell_id=cell_id,
                result_id=result_id, decision_id=decision_id,
            )


def note_kept(
    ledger: Ledger, earlier: ResultRow, moved: Sequence[Written], *, now: datetime.datetime
) -> list[str]:
    """Record an earlier record's files under the names they were moved to; what could not be.

    A moved file is recorded when its bytes are the ones recorded for that record and kind,
    or, for a JSON published before files were recorded, the result text the ledger keeps.
    """
    recorded = {
        (p.kind, p.sha256)
        for p in ledger.published.of_cell(earlier.lot, earlier.cell_id)
        if p.result_id == earlier.id
    }
    kept, problems = [], []
    for f in moved:
        sha = hashlib.sha256(f.data).hexdigest()
        vouched = (f.kind, sha) in recorded or (
            f.kind == "result" and f.data == earlier.result_json.encode("utf-8")
        )
        if vouched:
            kept.append(f)
        else:
            problems.append(
                f"{f.path}: moved as it was, but not recorded as published: its bytes "
                f"(SHA-256 {sha}) are not those published for this record"
            )
    if kept:
        note_written(
            ledger, kept, now=now, lot=earlier.lot, cell_id=earlier.cell_id, result_id=earlier.id
        )
    return problems
