"""Which archived inputs a regrade judges again: chosen from a station's ledger, or a folder.

Edge module (reads the ledger and the settings; no file is opened here). From a station,
the inputs are the records that count today (current, published or archived, not refused)
narrowed by lot, cell, time of analysis, rule set or verdict; each keeps the place of its
archived copy, the time it was first analysed (its place in the cell's history) and the
import profile the station's settings give its name. From a plain folder, every file in it.
"""

from __future__ import annotations

import datetime
import fnmatch
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import ResultRow
from pipeline.station.settings import Settings


@dataclass(frozen=True, slots=True)
class Selection:
    """What a regrade takes from a station; every field narrows (empty: no narrowing)."""

    lots: tuple[str, ...] = ()
    cells: tuple[str, ...] = ()
    since: datetime.datetime | None = None
    until: datetime.datetime | None = None
    rule_sets: tuple[str, ...] = ()  # "name" or "name@revision"
    verdicts: tuple[str, ...] = ()

    def words(self) -> str:
        """The selection as one canonical line (stored with the regrade; same selection, same line).

        >>> Selection(lots=("L2", "L1"), verdicts=("pass",)).words()
        'lots L1, L2; verdicts pass'
        """
        parts = []
        if self.lots:
            parts.append("lots " + ", ".join(sorted(self.lots)))
        if self.cells:
            parts.append("cells " + ", ".join(sorted(self.cells)))
        if self.since:
            parts.append(f"analysed from {self.since.isoformat()}")
        if self.until:
            parts.append(f"analysed before {self.until.isoformat()}")
        if self.rule_sets:
            parts.append("rule sets " + ", ".join(sorted(self.rule_sets)))
        if self.verdicts:
            parts.append("verdicts " + ", ".join(sorted(self.verdicts)))
        return "; ".join(parts) or "every record that counts"


@dataclass(frozen=True, slots=True)
class Archived:
    """One input to judge again: where its bytes are, and what the ledger knows of it."""

    input_id: int | None  # None for a file from a plain folder
    lot: str
    cell_id: str
    name: str
    sha256: str
    path: Path
    analysed_at: datetime.datetime | None
    profile: Path | None
    result_json: str | None  # its judgement in force (None from a folder)


def select_inputs(
    ledger: Ledger,
    settings: Settings,
    selection: Selection,
    *,
    before: Mapping[int, ResultRow] | None = None,
) -> list[Archived]:
    """The station's records that count today and that the selection takes, oldest first.

    A record judged again by a regrade keeps the time its input was first analysed, so
    ``since`` and ``until`` read the same times whatever was regraded. ``before``: input id
    -> the judgement to take in place of the one that counts (a regrade that carries on
    selects as it did before it recorded anything: Regrades.judged_before).
    """
    out = []
    for c in ledger.results.counting(
        lots=selection.lots, cells=selection.cells, verdicts=() if before else selection.verdicts
    ):
        result = (before or {}).get(c.result.input_id, c.result)
        if before and selection.verdicts and result.verdict not in selection.verdicts:
            continue
        if selection.since and result.analysed_at < selection.since:
            continue
        if selection.until and result.analysed_at >= selection.until:
            continue
        if selection.rule_sets and not any(
            _names_rule_set(want, result.rule_set_name, result.rule_set_revision)
            for want in selection.rule_sets
        ):
            continue
        out.append(Archived(
            result.input_id, result.lot, result.cell_id, c.name, c.sha256, Path(c.final_path),
            result.analysed_at, profile_for(settings, c.name), result.result_json,
        ))
    return out


def _names_rule_set(want: str, name: str, revision: str) -> bool:
    wanted_name, _, wanted_revision = want.partition("@")
    return wanted_name == name and (not wanted_revision or wanted_revision == revision)


def profile_for(settings: Settings, file_name: str) -> Path | None:
    """The import profile the station's settings give ``file_name``.

    The ``[profile.ID]`` globs decide; past them, the inboxes' own profile when they all
    have the same one (the ledger does not keep which inbox a file came through).
    """
    for rule in settings.profiles:
        if rule.matches(file_name):
            return rule.file
    defaults = {inbox.profile for inbox in settings.inboxes}
    return defaults.pop() if len(defaults) == 1 else None


def folder_inputs(folder: Path, pattern: str = "*", profile: Path | None = None) -> list[Archived]:
    """Every file in ``folder`` (not hidden, matching ``pattern``), by name."""
    import hashlib

    out = []
    for path in sorted(folder.iterdir()):
        if not path.is_file() or path.name.startswith(".") or not fnmatch.fnmatch(path.name, pattern):
            continue
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        out.append(Archived(None, "", "", path.name, digest, path, None, profile, None))
    return out


def lots_of(items: Sequence[Archived]) -> list[str]:
    return sorted({i.lot for i in items if i.lot})
