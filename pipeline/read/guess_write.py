"""A guessed import profile as TOML text: each key with the reason it was chosen beside it.

The last part of :mod:`pipeline.read.guess`, shared by every layout: the readers of the
layout (text in ``guess``, workbooks and Parquet files in ``guess_books``) say what they
found about the file itself ([file], [workbook]); :mod:`pipeline.read.guess_columns`, what
the columns hold; this module writes both out, with [columns], [units], [time], [mode],
[counters] and [metadata], a file-name pattern for a lot and cell id that only the file's
name gives, and, in comments, what the file lacks that only a person can give.

Pure: text from what the guess found.

>>> print(toml_string('Cell temp (°C) "T1"'))
"Cell temp (°C) \\"T1\\""
"""

from __future__ import annotations

import re
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass, field

from pipeline.read.guess_cells import UNSURE, ColumnGuess
from pipeline.read.profile_keys import QUANTITIES, REQUIRED_METADATA, V1_COLUMNS

# Words of metadata keys that name what formgate needs under another name.
_NEAR_KEYS = {
    "cell_id": ("cellid", "cell", "cellno", "cellnumber", "serial", "serialno", "barcode"),
    "lot": ("lotid", "lotno", "lotnumber", "batch", "batchno", "batchid"),
    "cell_type": ("celltype", "type", "model", "product", "partno", "partnumber"),
}
_WIDTH = 100  # the longest line written, comments included
_INLINE = 44  # a key line longer than this gets its reason on the line above


@dataclass
class Entry:
    """One key of a table: its TOML value and why it was chosen."""

    key: str
    value: str
    why: str = ""


@dataclass
class Layout:
    """What the reader of a layout found about the file: [file] (and [workbook]) keys, a description."""

    kind: str  # text, workbook or parquet
    file: list[Entry] = field(default_factory=list)
    workbook: list[Entry] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # comments under [file]
    description: list[str] = field(default_factory=list)
    metadata: dict[str, str] = field(default_factory=dict)  # metadata found in the file
    unread_metadata: dict[str, str] = field(default_factory=dict)  # "key: value" lines not read
    headers: list[str] = field(default_factory=list)


class Doc:
    """The profile's text: tables of keys, each with the reason written beside it."""

    def __init__(self) -> None:
        self.top: list[str] = []
        self.tables: dict[str, list[tuple[str, str]]] = {}

    def set(self, table: str, key: str, value: str, why: str = "") -> None:
        self.tables.setdefault(table, []).append((f"{key} = {value}", why))

    def commented(self, table: str, key: str, value: str, why: str = "") -> None:
        self.tables.setdefault(table, []).append((f"# {key} = {value}", why))

    def note(self, table: str, text: str) -> None:
        self.tables.setdefault(table, []).append(("", text))

    def render(self) -> str:
        out = [comment(line) for line in self.top]
        for table, entries in self.tables.items():
            if not entries and table:
                continue
            out.append("")
            if table:
                out.append(f"[{table}]")
            inline = [e for e, why in entries if e and why and len(e) <= _INLINE]
            width = max((len(e) for e in inline), default=0)
            for entry, why in entries:
                if not entry:
                    out.append(comment(why))
                elif not why:
                    out.append(entry)
                elif len(entry) <= _INLINE and width + len(_one_line(why)) + 4 <= _WIDTH:
                    out.append(f"{entry.ljust(width)}  # {_one_line(why)}")
                else:
                    out.append(comment(why))
                    out.append(entry)
        return "\n".join(out).strip("\n") + "\n"


def _one_line(text: str) -> str:
    return " ".join(text.split())


def comment(text: str) -> str:
    """``text`` as TOML comment lines, wrapped."""
    text = _one_line(text)
    if not text:
        return "#"
    return "\n".join("# " + line for line in textwrap.wrap(text, _WIDTH - 4, break_on_hyphens=False))


def toml_string(text: str) -> str:
    """``text`` as a TOML basic string (quotes, backslashes and control characters escaped)."""
    out = []
    for char in text:
        if char in ('"', "\\"):
            out.append("\\" + char)
        elif ord(char) < 0x20 or ord(char) == 0x7F:
            out.append(f"\\u{ord(char):04X}")
        else:
            out.append(char)
    return '"' + "".join(out) + '"'


def pattern_string(pattern: str) -> str:
    """A regular expression as a TOML literal string (backslashes as they are) where it can be.

    >>> print(pattern_string(r"^(?P<lot>[^_]+)[.]"), pattern_string("it's"))
    '^(?P<lot>[^_]+)[.]' "it's"
    """
    if "'" not in pattern and all(0x20 <= ord(c) != 0x7F for c in pattern):
        return f"'{pattern}'"
    return toml_string(pattern)


def shown(text: str, size: int = 40) -> str:
    """A piece of the file, quoted and cut short, for a comment."""
    text = text if len(text) <= size else text[: size - 3] + "..."
    return repr(text) if text.isprintable() else ascii(text)


def base_name(name: str) -> str:
    return name.replace("\\", "/").rpartition("/")[2]


def data_sheets_pattern(names: Sequence[str], chosen: Sequence[str]) -> str:
    """The sheet's name, or a pattern with * that matches exactly the ``chosen`` sheets of ``names``.

    >>> data_sheets_pattern(["Info", "Record", "Record_2", "Record_3"], ["Record", "Record_2", "Record_3"])
    'Record*'
    """
    if len(chosen) == 1:
        return chosen[0]
    common = chosen[0]
    for other in chosen[1:]:
        while not other.startswith(common):
            common = common[:-1]
    pattern = common + "*"
    if common and [n for n in names if _sheet_matches(pattern, n)] == list(chosen):
        return pattern
    return chosen[0]


def _sheet_matches(pattern: str, sheet: str) -> bool:
    """Whether a sheet-name pattern (* any text, ? any one character) matches ``sheet`` whole."""
    parts = {"*": ".*", "?": "."}
    regex = "".join(parts.get(c, re.escape(c)) for c in pattern)
    return re.fullmatch(regex, sheet, re.DOTALL) is not None


# ---------------------------------------------------------------- the profile


def write_profile(name: str, layout: Layout, guess: ColumnGuess) -> str:
    """The whole profile's text."""
    doc = Doc()
    base = base_name(name)
    doc.top += [
        f"Import profile guessed by formgate profile guess from {base} ({layout.kind}).",
        "Each key says why it was chosen; check the ones marked 'unsure:' against the file. "
        f"See what it reads with: formgate profile show PROFILE {base}",
    ]
    if guess.problems:
        doc.top += ["", "What this profile cannot read as it is:"]
        doc.top += [f"- {problem}" for problem in guess.problems]
    doc.set("", "description", toml_string(_description(base, layout, guess)))
    for entry in layout.file:
        doc.set("file", entry.key, entry.value, entry.why)
    for note in layout.notes:
        doc.note("file", note)
    metadata = dict(layout.metadata)
    _name_pattern_entry(doc, base, metadata)
    for entry in layout.workbook:
        doc.set("workbook", entry.key, entry.value, entry.why)
    _columns(doc, guess, layout.headers)
    _units(doc, guess)
    _time(doc, guess)
    _modes_and_counters(doc, guess)
    _metadata(doc, metadata, layout.unread_metadata)
    return doc.render()


def _description(base: str, layout: Layout, guess: ColumnGuess) -> str:
    parts = list(layout.description)
    units = [guess.units[q].value for q in ("time", "voltage", "current") if q in guess.units]
    if guess.stamps.value != "elapsed":
        units[:1] = [guess.stamps.value]
    if units:
        parts.append(" / ".join(units))
    parts.append(guess.sign.value)
    return f"Guessed from {base}: " + ", ".join(parts)


def _name_pattern_entry(doc: Doc, base: str, metadata: dict[str, str]) -> None:
    """A file_name_pattern for the lot and cell id that the file lacks and its name shows."""
    missing = [key for key in ("lot", "cell_id") if not metadata.get(key)]
    if not missing:
        return
    found = name_pattern(base, missing)
    if found is None:
        doc.note(
            "file",
            f"The file gives no {' and no '.join(missing)}, and its name does not show "
            f"{'it' if len(missing) == 1 else 'them'} either: formgate check will ask for "
            f"{'it' if len(missing) == 1 else 'them'}. Have the cycler write "
            f"{'it' if len(missing) == 1 else 'them'} into each file, or set "
            "file_name_pattern here for names that show them.",
        )
        return
    pattern, values, sure = found
    why = (
        f"the file gives no {' and no '.join(missing)}; its name gives "
        + ", ".join(f"{k} {v!r}" for k, v in values.items())
    )
    if not sure:
        why = f"{UNSURE} {why}, guessed from the order of its parts (lot first)"
    doc.set("file", "file_name_pattern", pattern_string(pattern), why)
    metadata.update(values)


_EXTENSION = re.compile(r"(?:\.[A-Za-z][A-Za-z0-9]{0,4})?(?:\.gz)?$")


def name_pattern(base: str, missing: Sequence[str]) -> tuple[str, dict[str, str], bool] | None:
    """(pattern, what it gives for this name, sure) for the missing lot and cell id, or None.

    The name's parts between underscores are looked at: one with "lot" or "batch" in it is
    the lot, one with "cell" the cell id; a name of two parts and no such words is read
    lot first (unsure).

    >>> name_pattern("LOT-A7_CELL-0012.csv", ["lot", "cell_id"])
    ('^(?P<lot>[^_]+)_(?P<cell_id>[^_.]+)[.]', {'lot': 'LOT-A7', 'cell_id': 'CELL-0012'}, True)
    """
    found = _EXTENSION.search(base)
    stem = base[: found.start()] if found and found.group() else ""
    if not stem:
        return None
    parts = stem.split("_")
    labels: dict[int, str] = {}
    for index, part in enumerate(parts):
        lower = part.lower()
        if ("lot" in lower or "batch" in lower) and "lot" not in labels.values():
            labels[index] = "lot"
        elif "cell" in lower and "cell_id" not in labels.values():
            labels[index] = "cell_id"
    sure = True
    if not set(missing) <= set(labels.values()):
        free = [i for i in range(len(parts)) if i not in labels]
        if len(parts) != 2:
            return None
        wanted = [k for k in ("lot", "cell_id") if k not in labels.values()]
        for index, key in zip(free, wanted, strict=False):
            labels[index] = key
        sure = False
    groups = []
    values: dict[str, str] = {}
    for index, part in enumerate(parts):
        chars = "[^_.]+" if index == len(parts) - 1 else "[^_]+"
        key = labels.get(index, "")
        if key in missing and key not in values:
            groups.append(f"(?P<{key}>{chars})")
            values[key] = part
        else:
            groups.append(chars)
    if not values or not all(v.strip() for v in values.values()):
        return None
    pattern = "^" + "_".join(groups) + "[.]"
    matched = re.search(pattern, base)
    if matched is None or any(matched[k] != v for k, v in values.items()):
        return None
    return pattern, values, sure


def _columns(doc: Doc, guess: ColumnGuess, headers: Sequence[str]) -> None:
    roles = guess.roles
    doc.tables.setdefault("columns", [])
    for role in ("time", "voltage", "current", "temperature", "step", "cycle", "mode", "capacity", "energy"):
        column = roles.get(role)
        if column is not None:
            doc.set("columns", role, toml_string(column.header), guess.reasons.get(role, ""))
    for quantity in QUANTITIES:
        if quantity in roles:
            continue
        default = V1_COLUMNS[quantity]
        if default in headers:
            # a v1 column name the file holds for something else must not be read as one
            doc.set(
                "columns",
                quantity,
                toml_string(f"(no {quantity} column)"),
                f"the file's column {default} is no {quantity} column formgate can read",
            )
        elif quantity in ("temperature", "step", "cycle"):
            found = f"no {quantity} column was found"
            doc.note("columns", found + (": formgate finds the steps itself" if quantity == "step" else ""))
    for unread in guess.unread:
        doc.note("columns", f"not read: {unread}")


def _units(doc: Doc, guess: ColumnGuess) -> None:
    doc.tables.setdefault("units", [])
    for quantity in ("time", "voltage", "current"):
        if quantity in guess.units:
            decision = guess.units[quantity]
            doc.set("units", quantity, toml_string(decision.value), decision.why)
    doc.set("units", "current_sign", toml_string(guess.sign.value), guess.sign.why)
    for counter in ("capacity", "energy"):
        if counter in guess.roles and counter in guess.units:
            decision = guess.units[counter]
            doc.set("units", counter, toml_string(decision.value), decision.why)


def _time(doc: Doc, guess: ColumnGuess) -> None:
    doc.set("time", "stamps", toml_string(guess.stamps.value), guess.stamps.why)
    if guess.date_format is not None:
        doc.set("time", "date_format", toml_string(guess.date_format.value), guess.date_format.why)
    if guess.zone_metadata is not None:
        doc.set(
            "time",
            "zone_metadata",
            toml_string(guess.zone_metadata),
            f"the file's metadata {guess.zone_metadata} names its clock's zone",
        )
    if guess.zone is not None:
        doc.set("time", "zone", toml_string(guess.zone.value), guess.zone.why)


def _modes_and_counters(doc: Doc, guess: ColumnGuess) -> None:
    for kind in ("charge", "discharge", "rest"):
        values = guess.modes.get(kind)
        if values:
            listed = "[" + ", ".join(toml_string(v) for v in values) + "]"
            doc.set("mode", kind, listed, guess.mode_reasons.get(kind, ""))
    if "capacity" in guess.roles or "energy" in guess.roles:
        doc.set("counters", "compare", "true", "cross-check the cycler's counters with formgate's integrals")
        doc.set(
            "counters",
            "tolerance_percent",
            "1.0",
            "further apart than this, the certificate carries a data-quality note",
        )


def _metadata(doc: Doc, metadata: dict[str, str], unread: dict[str, str]) -> None:
    """[metadata]: what the file lacks, named in comments, never invented.

    ``unread`` holds "key: value" lines the reader does not take as metadata (no prefix, or
    above a banner line): a value there that may be what formgate needs is named.
    """
    missing = [key for key in REQUIRED_METADATA if not metadata.get(key)]
    if not missing:
        return
    doc.note("metadata", "Fixed values for every file read with this profile; a file's own values win.")
    for key in missing:
        near, where = _near_key(metadata, key), "its metadata"
        values = metadata
        if near is None:
            near, where, values = _near_key(unread, key), "its line (which is not read as metadata)", unread
        said = "" if near is None else f"{where} {near!r} says {values[near]!r}"
        if key == "cell_type" and near is not None:
            doc.commented(
                "metadata",
                key,
                toml_string(values[near]),
                f"{UNSURE} the file gives no cell_type, but {said}; formgate reads only a metadata "
                "line cell_type. Set it here only if every file read with this profile holds "
                "that cell type; until then formgate check asks for it",
            )
        elif key == "cell_type":
            doc.commented(
                "metadata",
                key,
                toml_string("..."),
                "the file does not say which cell type it holds, and formgate check will ask "
                "for it: give the cell type of every file read with this profile here (it "
                "chooses the rule set), or have the cycler write it into each file",
            )
        elif near is not None:
            doc.note(
                "metadata",
                f"the file gives no {key}, but {said}: formgate reads only a metadata line such "
                f"as '# {key}: ...'; have the cycler write it so (a value here would give every "
                f"file the same {key})",
            )


def _near_key(metadata: dict[str, str], key: str) -> str | None:
    for found, value in metadata.items():
        plain = re.sub(r"[^a-z]", "", found.lower())
        if plain in _NEAR_KEYS[key] and value:
            return found
    return None
