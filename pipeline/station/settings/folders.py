"""The rules between station.toml's path keys: folders apart, the station's state kept out.

Checks values that already passed the schema and reports into a Collector; it reads
no disk (files.py checks the folders that exist). The mail keys are
mail.py's, putting the whole file together check.py's.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from pipeline.rulebook.tables import Collector, Values
from pipeline.rulebook.toml_lines import KeyPath, show_table
from pipeline.station.handoff import is_temporary
from pipeline.station.settings.schema import SETTINGS_BY_TABLE, STATION_FILE, toml_value


def shown(text: object) -> str:
    """A value as station.toml would write it, for messages."""
    return toml_value(str(text))


@dataclass(frozen=True, slots=True)
class Place:
    """A folder the file names (or defaults), for the checks between folders."""

    label: str
    path: KeyPath
    key: str
    raw: str
    written: bool
    norm: str

    def __str__(self) -> str:
        if self.written:
            return f"{self.label} = {shown(self.raw)}"
        return f"{self.label} (default {shown(self.raw)})"


class Checker:
    """The rules between keys, over the values that passed the schema."""

    def __init__(self, out: Collector, data: Mapping[str, object], root: Path) -> None:
        self.out = out
        self.data = data
        self.root = root

    def written(self, path: KeyPath, key: str) -> bool:
        node: object = self.data
        for part in path:
            node = node.get(part) if isinstance(node, Mapping) else None
        return isinstance(node, Mapping) and key in node

    def path(self, path: KeyPath, key: str, values: Values) -> Path | None:
        """The value of a path key joined to the root and normalised, or None (absent or bad)."""
        raw = values.get(key)
        if not isinstance(raw, str):
            return None
        where = f"{show_table(path)} {key}"
        if not raw.strip():
            spec = SETTINGS_BY_TABLE[path[0]].key(key)
            default = spec.default if spec is not None else None
            self.out.add(
                f"{where} is empty",
                path,
                key,
                f"Give a path, e.g. {key} = {shown(default)}, or remove the line to use that "
                "default."
                if isinstance(default, str)
                else "Give a path, or remove the line.",
            )
            return None
        if any(ord(c) < 32 or ord(c) == 127 for c in raw):
            self.out.add(
                f"{where} = {shown(raw)} holds a control character",
                path,
                key,
                "Remove it: a path may hold no tabs, line breaks or other control characters.",
            )
            return None
        return Path(os.path.normpath(self.root / raw))

    def distinct(self, places: list[Place]) -> None:
        """Every folder must be a different one."""
        seen: dict[str, Place] = {}
        for place in places:
            first = seen.setdefault(place.norm, place)
            if first is place:
                continue
            subject, other = (
                (place, first) if place.written or not first.written else (first, place)
            )
            both_inboxes = subject.path[0] == other.path[0] == "inbox"
            self.out.add(
                f"{subject} is the same folder as {other}",
                subject.path,
                subject.key,
                "Give each inbox its own folder, so that every file is claimed by one inbox only."
                if both_inboxes
                else "Give each its own folder: the station tells files apart by the folder they "
                "are in, and moves them from an inbox into work, then archive or quarantine.",
            )

    def holds_state(
        self, place: Place, station: Values, ledger: Path | None, heartbeat: Path | None
    ) -> None:
        """An inbox or the work folder may not hold station.toml, the ledger or the heartbeat."""
        root = os.path.normpath(self.root)
        hint = ""
        if place.norm == root:
            what = f"the station folder itself, which holds {STATION_FILE} and the ledger"
            own = "inbox" if place.key == "folder" else place.key
            hint = f"give it a folder of its own, e.g. {place.key} = {shown(own)}"
        elif ledger is not None and place.norm == str(ledger.parent):
            what = f"the folder of the ledger ([station] ledger = {shown(station['ledger'])})"
            hint = 'keep the ledger elsewhere, e.g. ledger = "ledger.sqlite"'
        elif heartbeat is not None and place.norm == str(heartbeat.parent):
            what = (
                "the folder of the heartbeat file "
                f"([station] heartbeat = {shown(station['heartbeat'])})"
            )
            hint = 'keep the heartbeat file elsewhere, e.g. heartbeat = "heartbeat.json"'
        if hint:
            self.out.add(
                f"{place} is {what}",
                place.path,
                place.key,
                (
                    "Everything in an inbox is claimed"
                    if place.path[0] == "inbox"
                    else "Every file in the work folder is taken for a claimed input"
                )
                + f": {hint}.",
            )

    def marker(self, path: KeyPath, suffix: str) -> None:
        if (
            suffix.startswith(".")
            and len(suffix) > 1
            and not is_temporary("x" + suffix)
            and not (set(suffix) & {"/", "\\"})
        ):
            return
        self.out.add(
            f"{show_table(path)} marker_suffix = {shown(suffix)} cannot be used",
            path,
            "marker_suffix",
            "Give a suffix that starts with a dot and is not .tmp or .part (names ending so are "
            'never claimed), e.g. marker_suffix = ".done".',
        )

    def glob(self, path: KeyPath, glob: str) -> None:
        if "/" in glob or "\\" in glob:
            self.out.add(
                f"{show_table(path)} glob = {shown(glob)} holds a folder separator",
                path,
                "glob",
                "The glob is matched against the file's name only: remove the folder part, "
                'e.g. glob = "*_sc.csv".',
            )

