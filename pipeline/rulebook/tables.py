"""Check the tables of one rule file against rules_schema.py, collecting every problem and line.

Types, allowed values, ranges, unknown keys (with a close match, a renamed key
or the table the key belongs in) and missing required keys. The rules between
keys of a table and between tables are rulebook.py's job.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Mapping, Sequence

from pipeline.errors import FormgateError, RulesError
from pipeline.judge.metricdefs import RULE_METRIC_NAMES as METRIC_NAMES
from pipeline.model import SourceRef
from pipeline.rulebook.schema import INTEGER, NUMBER, RENAMED, TABLES, TEXT, TEXT_LIST, Key, Table
from pipeline.rulebook.toml_lines import KeyPath, Locator, show_table

Values = dict[str, object]

# Allowed values that come from another table than the schema's own.
_DYNAMIC_ALLOWED: dict[tuple[str, str], tuple[str, ...]] = {
    ("check", "metric"): METRIC_NAMES,
    ("screen", "metric"): METRIC_NAMES,
}
EXAMPLES = {NUMBER: "1.5", INTEGER: "1001", TEXT: '"text"', TEXT_LIST: '["text"]'}


def close_match(word: str, choices: Sequence[str]) -> str | None:
    """The choice closest to ``word`` (ignoring case), if any is close enough."""
    lowered = {c.lower(): c for c in choices}
    match = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)
    return lowered[match[0]] if match else None


def did_you_mean(word: str, choices: Sequence[str]) -> str:
    """The start of a hint: "Did you mean 'x'? " for the closest choice, or "" when none is close.

    >>> did_you_mean("ageing", ("formation", "aging", "grading")), did_you_mean("zz", ("a",))
    ("Did you mean 'aging'? ", '')
    """
    guess = close_match(word, choices)
    return f"Did you mean '{guess}'? " if guess else ""


def describe(value: object) -> str:
    """A found value in words, for "must be X, found Y"."""
    if isinstance(value, bool):
        return f"the true/false value {str(value).lower()}"
    if isinstance(value, str):
        return f'text "{value}"'
    if isinstance(value, Mapping):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, int | float):
        return f"the number {value}"
    return f"the {type(value).__name__} {value}"  # dates and times: "the date 2026-12-01"


def number(values: Mapping[str, object], key: str) -> float | None:
    """The checked number under ``key``, or None when it is absent (or was refused)."""
    value = values.get(key)
    return float(value) if isinstance(value, int | float) else None


class Collector:
    """Every problem of one rule file, each with its line."""

    def __init__(
        self, text: str, name: str, error: type[FormgateError] = RulesError
    ) -> None:
        self.name = name
        self.locate = Locator(text)
        self.error = error
        self.errors: list[FormgateError] = []

    def where(self, path: KeyPath = (), key: str | None = None) -> SourceRef:
        return SourceRef(self.name, self.locate.line(path, key) if path else None)

    def add(self, problem: str, path: KeyPath = (), key: str | None = None, hint: str = "") -> None:
        self.errors.append(self.error(problem, self.where(path, key), hint=hint))

    def raw(self, path: KeyPath, key: str, value: float) -> str:
        """The number as the file writes it ("3.10"), or a plain rendering of ``value``."""
        text = self.locate.raw_value(path, key)
        try:
            if text is not None and float(text.replace("_", "")) == value:
                return text
        except ValueError:
            pass
        return f"{value:g}"


def _check_number(out: Collector, path: KeyPath, spec: Key, value: object) -> object:
    if (
        isinstance(value, bool)
        or not isinstance(value, int | float)
        or (spec.kind == INTEGER and isinstance(value, float))
    ):
        kind = "a number" if spec.kind == NUMBER else "a whole number"
        example = spec.example or EXAMPLES[spec.kind]
        hint = (
            f"Write a plain number, e.g. {spec.name} = {example} "
            "(no quotes, no unit, a dot for decimals)."
            if spec.kind == NUMBER
            else f"Write a whole number, e.g. {spec.name} = {example} (no quotes, no decimals)."
        )
        if isinstance(value, str):
            try:
                float(value)
                hint = f"Remove the quotes: {spec.name} = {value.strip()}."
            except ValueError:
                pass
        out.add(
            f"{show_table(path)} {spec.name} must be {kind}, found {describe(value)}",
            path,
            spec.name,
            hint,
        )
        return None
    if not math.isfinite(value):
        out.add(
            f"{show_table(path)} {spec.name} must be a finite number, found {value}",
            path,
            spec.name,
            "Give a real limit, or leave the key out.",
        )
        return None
    if spec.minimum is not None and (
        value <= spec.minimum if spec.minimum_exclusive else value < spec.minimum
    ):
        bound = f"{'greater than' if spec.minimum_exclusive else 'at least'} {spec.minimum:g}"
    elif spec.maximum is not None and value > spec.maximum:
        bound = f"at most {spec.maximum:g}"
    else:
        return float(value) if spec.kind == NUMBER else value
    unit = f" {spec.unit}" if spec.unit else ""
    out.add(
        f"{show_table(path)} {spec.name} = {out.raw(path, spec.name, value)}{unit} is out of range",
        path,
        spec.name,
        f"It must be {bound}{unit}.",
    )
    return None


def check_value(out: Collector, path: KeyPath, spec: Key, table: str, value: object) -> object:
    """The value converted to its Python type, or None after recording a problem."""
    where = show_table(path)
    if spec.kind in (NUMBER, INTEGER):
        return _check_number(out, path, spec, value)
    if spec.kind == TEXT_LIST:
        if isinstance(value, list) and all(isinstance(v, str) for v in value):
            return tuple(value)
        example = f'["{value}"]' if isinstance(value, str) else EXAMPLES[TEXT_LIST]
        out.add(
            f"{where} {spec.name} must be a list of text, found {describe(value)}",
            path,
            spec.name,
            f"Write it in square brackets, e.g. {spec.name} = {example}.",
        )
        return None
    if not isinstance(value, str):
        shown = "..." if isinstance(value, bool | list | Mapping) else value
        out.add(
            f"{where} {spec.name} must be text, found {describe(value)}",
            path,
            spec.name,
            f'Put the value in double quotes, e.g. {spec.name} = "{shown}".',
        )
        return None
    if spec.required and not value.strip():
        out.add(
            f"{where} {spec.name} is empty",
            path,
            spec.name,
            f"Write the {spec.name} between the quotes ({spec.meaning}).",
        )
        return None
    allowed = spec.allowed or _DYNAMIC_ALLOWED.get((table, spec.name), ())
    if allowed and value not in allowed:
        guess = close_match(value, allowed)
        listing = f"Allowed: {', '.join(allowed)}."
        if allowed is METRIC_NAMES:  # long: name the docs instead when there is a good guess
            listing = "docs/rules.md lists every metric." if guess else listing
        kind = "metric" if allowed is METRIC_NAMES else "value"
        out.add(
            f'{where} {spec.name} = "{value}" is not a known {kind}',
            path,
            spec.name,
            (f"Did you mean '{guess}'? " if guess else "") + listing,
        )
        return None
    return value


def _unknown_key(
    out: Collector,
    path: KeyPath,
    table: Table,
    key: str,
    tables: Sequence[Table],
    renamed: Mapping[tuple[str, str], str],
) -> None:
    where = show_table(path)
    if (table.name, key) in renamed:
        new = renamed[(table.name, key)]
        out.add(
            f"key '{key}' in {where} was renamed to '{new}'",
            path,
            key,
            f"Rename it to '{new}'; its meaning is unchanged.",
        )
        return
    homes = [t.header for t in tables if t is not table and t.key(key)]
    guess = close_match(key, [k.name for k in table.keys])
    own = next((t for t in tables if t.name == key), None)
    if own is not None:
        hint = (
            f"{own.header} is a table of its own: start it with its own header line, "
            f"not as a key inside {where}."
        )
    elif homes:
        hint = f"'{key}' belongs in {' or '.join(homes)}, not in {where}."
    elif guess:
        hint = f"Did you mean '{guess}'?"
    else:
        hint = f"Allowed keys in {where}: {', '.join(k.name for k in table.keys)}."
    out.add(f"unknown key '{key}' in {where}", path, key, hint)


def check_table(
    out: Collector,
    path: KeyPath,
    table: Table,
    data: object,
    *,
    tables: Sequence[Table] = TABLES,
    renamed: Mapping[tuple[str, str], str] = RENAMED,
) -> Values:
    """Check one table's keys and values; return the valid values with defaults filled in.

    ``tables`` and ``renamed`` are the schema the table belongs to (rule files by
    default; station settings pass their own).
    """
    if not isinstance(data, Mapping):
        out.add(
            f"{show_table(path)} must be a table, found {describe(data)}",
            path,
            hint=f"Write it as a table: a line {show_table(path)} with its keys below it.",
        )
        return {}
    values: Values = {}
    unknown = False
    for key, value in data.items():
        spec = table.key(key)
        if spec is None:
            _unknown_key(out, path, table, key, tables, renamed)
            unknown = True
            continue
        checked = check_value(out, path, spec, table.name, value)
        if checked is not None:
            values[key] = checked
    for spec in table.keys:
        if spec.required and spec.name not in data:
            if not unknown:  # else the unknown key is most likely this one misspelt
                out.add(
                    f"{show_table(path)} has no '{spec.name}'",
                    path,
                    hint=f"Add a line such as {spec.name} = {spec.example} ({spec.meaning}).",
                )
        elif spec.name not in data and spec.default is not None:
            values[spec.name] = spec.default
    return values


def check_family(
    out: Collector,
    table: Table,
    data: object,
    *,
    tables: Sequence[Table] = TABLES,
    renamed: Mapping[tuple[str, str], str] = RENAMED,
) -> tuple[dict[str, Values], set[str]]:
    """Check a family of named tables such as [check.ID].

    Returns the valid values of every entry by ID, and the IDs of entries with a problem
    (their remaining values are still returned, so that later checks can report more).
    """
    path = (table.name,)
    if not isinstance(data, Mapping):
        written = f"[[{table.name}]]" if isinstance(data, list) else f"{table.name} = ..."
        out.add(
            f"{table.name} must be written as {table.header} tables, found {describe(data)}",
            path,
            hint=f"Give each entry its own table with its name in the header, e.g. "
            f"{table.header}, instead of {written}.",
        )
        return {}, set()
    members: dict[str, Values] = {}
    broken: set[str] = set()
    for ident, body in data.items():
        if not isinstance(body, Mapping):
            out.add(
                f"{show_table(path)} has a plain key '{ident}' where a table per entry belongs",
                path,
                ident,
                hint=f"Put the entry's name in the header, e.g. "
                f"[{table.name}.NAME], and its keys below it.",
            )
            continue
        before = len(out.errors)
        members[ident] = check_table(
            out, (*path, ident), table, body, tables=tables, renamed=renamed
        )
        if len(out.errors) > before:
            broken.add(ident)
    return members, broken
