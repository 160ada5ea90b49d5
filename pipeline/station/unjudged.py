"""Cells whose file could not be judged: their lot and cell id, read again from the quarantined file.

The ledger keeps a quarantined input by its name and reason, not by the lot and cell its
file names: the judge never got that far, and a file name alone says nothing certain (only
a site's import profile gives its parts a meaning). What the file itself says can still be
known: its metadata lines before the header. So each quarantined input's file is read
again from quarantine, its head only (at most :data:`HEAD_BYTES` of text; a ``.csv.gz`` is
inflated no further), through the import profile the station would choose for its name
where that choice does not depend on the inbox it came through (a file-name rule, or one
profile for every inbox), else as cycle file version 1.

A file whose head cannot be read as far as the header, that names no lot or cell id, or
that is an OCV reading file (a lot's, not one cell's) names no cell here: it stays among
the errors `formgate status` lists. A cell that has a judged record or reading in that lot
stands on those and is not listed: a corrected file sent again replaces the one that failed.
"""

from __future__ import annotations

import datetime
import zlib
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow
from pipeline.read.cyclehead import GZIP_MAGIC, collect_metadata, split_head
from pipeline.read.profile import DEFAULT_PROFILE, Profile, load_profile
from pipeline.read.readings import looks_like_readings
from pipeline.station.settings import Settings

# The most of a quarantined file read back: a cycle file's metadata and header take a few
# hundred bytes; what does not fit in 64 KiB is no head the station could have judged.
HEAD_BYTES = 65536


@dataclass(frozen=True, slots=True)
class UnjudgedCell:
    """A cell named by a file that could not be judged: the file, why, and where it lies."""

    lot: str
    cell_id: str
    name: str  # the input's name, as the ledger shows it
    sha256: str
    reason: str  # the first line of the quarantine reason
    quarantined_at: datetime.datetime
    path: str  # the file in quarantine


def head_identity(head: bytes, name: str, profile: Profile | None = None) -> tuple[str, str] | None:
    """(lot, cell id) as the head of a cycle file names them; None when it does not (pure).

    ``head``: the file's first bytes (gzip is inflated up to :data:`HEAD_BYTES`).
    """
    if head[:2] == GZIP_MAGIC:
        try:
            head = zlib.decompressobj(wbits=31).decompress(head, HEAD_BYTES)
        except zlib.error:
            return None
    if looks_like_readings(head):
        return None  # a reading file carries a lot's cells: none of them is the file's own
    head = head[: head.rfind(b"\n") + 1]  # whole lines only: a cut character is no text
    try:
        found, _, _ = split_head(head, name, profile or DEFAULT_PROFILE)
        metadata = collect_metadata(found, name, profile or DEFAULT_PROFILE)
    except FormgateError:
        return None
    lot, cell = metadata.get("lot", ""), metadata.get("cell_id", "")
    return (lot, cell) if lot and cell else None


def _profile_for(settings: Settings, name: str) -> Profile | None:
    """The import profile the station would read ``name`` with, where its inbox does not matter."""
    path = next((rule.file for rule in settings.profiles if rule.matches(name)), None)
    if path is None:
        by_inbox = {inbox.profile for inbox in settings.inboxes}
        path = by_inbox.pop() if len(by_inbox) == 1 else None
    if path is None:
        return None
    try:
        return load_profile(path.read_text(encoding="utf-8"), path.name)
    except (OSError, FormgateError):
        return None


def _read_head(row: InputRow) -> bytes | None:
    if not row.final_path:
        return None
    try:
        with Path(row.final_path).open("rb") as fh:
            return fh.read(HEAD_BYTES)
    except OSError:  # moved away by hand, or not readable: nothing to say of it
        return None


def unjudged_cells(settings: Settings, ledger: Ledger, lot: str | None = None) -> list[UnjudgedCell]:
    """The cells (of ``lot``, or of every lot) whose latest file could not be judged and that
    have no judged record or reading in their lot, by lot and cell id."""
    found: dict[tuple[str, str], UnjudgedCell] = {}
    for row in ledger.inputs.in_state("quarantined"):  # oldest first: a later one wins
        head = _read_head(row)
        identity = None if head is None else head_identity(
            head, row.name, _profile_for(settings, row.name)
        )
        if identity is None or (lot is not None and identity[0] != lot):
            continue
        found[identity] = UnjudgedCell(
            identity[0],
            identity[1],
            row.name,
            row.sha256,
            (row.reason or "").splitlines()[0] if row.reason else "",
            row.final_at or row.arrived_at,
            row.final_path or "",
        )
    return [
        cell for key, cell in sorted(found.items())
        if not ledger.results.of_cell(*key) and not ledger.readings.of(*key)
    ]
