"""Rule files (TOML text) -> RuleSet, and a folder of them -> RuleBook, with line-aware errors.

``load_rule_set`` is pure: it takes the text and the name to show in errors. Only
``load_rules_dir`` and ``check_rules_dir`` read files. Keys and values are checked
against the schema by rule_tables.py; this module checks the rules between keys
(low below high, relative windows, declared cell types, every cell type judged)
and builds the records. Judging a cell is evaluate.py's job. A little over 500 lines:
the cross-key checks each carry their located message and hint.

>>> from pipeline.rulebook.schema import EXAMPLE
>>> load_rule_set(EXAMPLE, "rules/demo.toml").cell_types[0].name
'DEMO-CELL-1'
"""

from __future__ import annotations

import hashlib
import pathlib
import tomllib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import cast

from pipeline.acceptance.rules import (
    SIMPLE,
    AgingSettings,
    CellType,
    Hazard,
    Program,
    Rule,
    RuleSet,
    Severity,
    Window,
)
from pipeline.errors import FormgateError, InputError, RulesError
from pipeline.judge.metricdefs import RULE_BY_NAME as BY_NAME
from pipeline.judge.metricdefs import RULE_METRIC_NAMES as METRIC_NAMES
from pipeline.model import PlateauSettings, SourceRef
from pipeline.rulebook.lotrules import LotRules, lot_rules
from pipeline.rulebook.reviewrules import release_hazards
from pipeline.rulebook.schema import BY_TABLE, FRACTION_LIMIT, FRACTION_METRICS, TABLES
from pipeline.rulebook.tables import (
    Collector,
    Values,
    check_family,
    check_table,
    close_match,
    did_you_mean,
    number,
)
from pipeline.rulebook.toml_lines import KeyPath, show_table, syntax_position

_UNIT_WORDS = {
    "V": "volts",
    "Ah": "ampere-hours",
    "Wh": "watt-hours",
    "s": "seconds",
    "mOhm": "milliohms",
    "mV/h": "millivolts per hour",
    "°C": "degrees Celsius",
    "%": "percent",
}
_RELEASE = "release_hazards"
_MISSING_HINTS = {
    "rule_set": "Add a [rule_set] table with name, revision and chemistry at the top of the file.",
    "cell_type": "Add one table per cell type, e.g. [cell_type.DEMO-1] with a line "
    "nominal_capacity_Ah = 10.0 below it.",
    "check": "Add at least one [check.ID] table; without checks every cell would pass.",
}


def _unknown_top(out: Collector, key: str) -> None:
    homes = [t.header for t in TABLES if t.key(key)]
    if homes:
        out.add(
            f"key '{key}' is outside any table",
            (key,),
            hint=f"It belongs in {' or '.join(homes)}: put that table's header line above it.",
        )
        return
    guess = close_match(key, list(BY_TABLE))
    out.add(
        f"unknown table [{key}]",
        (key,),
        hint=f"Did you mean [{guess}]?"
        if guess
        else f"Allowed tables: {', '.join(t.header for t in TABLES)}.",
    )


def _check_order(
    out: Collector,
    path: KeyPath,
    keys: tuple[str, str],
    low: float,
    high: float,
    unit: str,
    hint: str,
) -> None:
    """Record a problem when ``low`` (under keys[0]) is above ``high`` (under keys[1])."""
    if low > high:
        raw_low, raw_high = out.raw(path, keys[0], low), out.raw(path, keys[1], high)
        out.add(
            f"{show_table(path)} {keys[1]} = {raw_high}{unit} is below {keys[0]} = {raw_low}{unit}",
            path,
            keys[1],
            hint,
        )


def _swap_hint(unit: str, relative: bool) -> str:
    if relative:
        return "Swap the two values, or check that both are fractions of the nominal capacity."
    words = _UNIT_WORDS.get(unit)
    return (
        f"Swap the two values, or check that both are in {words}."
        if words
        else ("Swap the two values.")
    )


def _build_rule(
    out: Collector, ident: str, v: Values, declared: Sequence[str], broken: bool
) -> Rule | None:
    """Cross-key checks of one [check.ID]; the Rule, or None if it has a problem.

    ``v`` holds only the values that passed the schema; ``broken`` says some did not.
    """
    path, before = ("check", ident), len(out.errors)
    metric, relative = str(v.get("metric", "")), str(v.get("relative_to", "")) or None
    low, high = number(v, "low"), number(v, "high")
    if metric not in BY_NAME:  # missing or unknown: already reported
        return None
    unit = BY_NAME[metric].unit
    shown_unit = f" {unit}" if unit and not relative else ""
    if low is None and high is None and not broken:  # if broken, a refused bound is likelier
        out.add(
            f"{show_table(path)} has neither low nor high",
            path,
            hint="Give low, high or both; a check without a window can never fail.",
        )
    elif low is not None and high is not None:
        _check_order(
            out,
            path,
            ("low", "high"),
            low,
            high,
            shown_unit,
            _swap_hint(unit, relative is not None),
        )
    if relative and not BY_NAME[metric].relative_ok:
        allowed = ", ".join(m for m in METRIC_NAMES if BY_NAME[m].relative_ok)
        in_unit = f"in {unit}" if unit else "as plain numbers"
        out.add(
            f'{show_table(path)} relative_to = "{relative}" cannot be used with metric '
            f"'{metric}'",
            path,
            "relative_to",
            f"Give low and high {in_unit} and remove relative_to; only {allowed} can be relative.",
        )
    elif relative or metric in FRACTION_METRICS:
        for key, bound in (("low", low), ("high", high)):
            if bound is not None and abs(bound) > FRACTION_LIMIT:
                of = " of the nominal capacity" if relative else ""
                out.add(
                    f"{show_table(path)} {key} = {out.raw(path, key, bound)} is not a fraction",
                    path,
                    key,
                    f"{metric} is judged as a fraction{of}: write {bound / 100:g} for {bound:g} %.",
                )
    if "hazard" in v and v.get("severity") == Severity.REVIEW.value:
        out.add(
            f'{show_table(path)} names a hazard but its severity is "review"',
            path,
            "hazard",
            "Hazards are reported for reject checks only: set severity = "
            '"reject", or remove hazard.',
        )
    listed = v.get("cell_types", ())
    cell_types = tuple(str(c) for c in listed) if isinstance(listed, tuple) else ()
    for name in cell_types:
        if name not in declared:
            out.add(
                f"{show_table(path)} cell_types names '{name}', which this file does not declare",
                path,
                "cell_types",
                did_you_mean(name, declared)
                + f"Declared cell types: {', '.join(declared)}.",
            )
    if broken or len(out.errors) > before:
        return None
    return Rule(
        id=ident,
        metric=metric,
        window=Window(low, high, relative),
        severity=Severity(v["severity"]),
        hazard=Hazard(v["hazard"]) if "hazard" in v else None,
        message=str(v["message"]),
        if_missing=str(v["if_missing"]),
        decision=str(v["decision"]) if "decision" in v else None,
        cell_types=cell_types,
        where=out.where(path),
    )


def _build_cell_type(out: Collector, ident: str, v: Values, plausible: Values) -> CellType | None:
    path = ("cell_type", ident)
    low = number(v, "min_voltage_V") if "min_voltage_V" in v else number(plausible, "min_voltage_V")
    high = (
        number(v, "max_voltage_V") if "max_voltage_V" in v else number(plausible, "max_voltage_V")
    )
    nominal = number(v, "nominal_capacity_Ah")
    if low is None or high is None or nominal is None:
        return None  # [plausible] had a problem, already recorded
    if low > high and ("min_voltage_V" in v or "max_voltage_V" in v):
        _check_order(
            out,
            path,
            ("min_voltage_V", "max_voltage_V"),
            low,
            high,
            " V",
            "Swap the two values, or check [plausible] and this cell type together.",
        )
        return None
    stages = tuple(str(s) for s in cast(Sequence[str], v["stages"])) if "stages" in v else None
    return CellType(ident, nominal, low, high, str(v["description"]), out.where(path), stages)


def _line_order(error: RulesError) -> tuple[bool, int]:
    line = error.where.line if error.where else None
    return line is None, line or 0


def _parse(text: str, name: str) -> tuple[RuleSet | None, list[RulesError]]:
    """Every problem of one rule file, and the RuleSet if there were none."""
    out = Collector(text, name)
    try:
        data = tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as exc:
        what, where = syntax_position(exc, name, out.locate.lines)
        return None, [
            RulesError(
                f"invalid TOML ({what})",
                where,
                hint="Fix the syntax at that spot; text values "
                "need double quotes, numbers a dot for decimals, and each table header may appear "
                "once.",
            )
        ]
    for key in data:
        if key not in BY_TABLE:
            _unknown_top(out, key)
    plain: dict[str, Values] = {}
    families: dict[str, tuple[dict[str, Values], set[str]]] = {}
    for table in TABLES:
        present = table.name in data and data[table.name] != {}
        if table.required and not present:
            out.add(f"no {table.header} table", (table.name,), hint=_MISSING_HINTS[table.name])
        if table.name == "grade":  # its keys are metric names: checked by lotrules
            continue
        if table.named:
            families[table.name] = check_family(out, table, data.get(table.name, {}))
        elif present or not table.required:
            plain[table.name] = check_table(out, (table.name,), table, data.get(table.name, {}))
    plausible = plain["plausible"]
    low, high = number(plausible, "min_voltage_V"), number(plausible, "max_voltage_V")
    if low is not None and high is not None:
        _check_order(
            out,
            ("plausible",),
            ("min_voltage_V", "max_voltage_V"),
            low,
            high,
            " V",
            "Swap the two values.",
        )
    type_values, broken_types = families["cell_type"]
    cell_types = [
        ct
        for ident, v in type_values.items()
        if ident not in broken_types
        and (ct := _build_cell_type(out, ident, v, plausible)) is not None
    ]
    raw_types = data.get("cell_type")
    declared = [str(k) for k in raw_types] if isinstance(raw_types, Mapping) else []
    check_values, broken_checks = families["check"]
    rules = [
        r
        for ident, v in check_values.items()
        if (r := _build_rule(out, ident, v, declared, ident in broken_checks)) is not None
    ]
    lot = lot_rules(out, data, plain["stages"], families["screen"], rules, cell_types)
    release_hazards(out, plain["review"])  # checked here; _assemble takes the checked names
    if not out.errors:
        for ct in cell_types:
            if not any(not r.cell_types or ct.name in r.cell_types for r in rules):
                out.add(
                    f"no check applies to cell type '{ct.name}'",
                    ("cell_type", ct.name),
                    hint="Add a check for it, or name it in a check's cell_types; "
                    "otherwise its cells would pass unjudged.",
                )
    if out.errors:
        # Problems with a line first, in line order; whole-file problems (often consequences) last.
        problems = [e for e in out.errors if isinstance(e, RulesError)]
        return None, sorted(problems, key=_line_order)
    return _assemble(text, name, plain, tuple(cell_types), tuple(rules), lot), []


def _assemble(
    text: str,
    name: str,
    plain: Mapping[str, Values],
    cell_types: tuple[CellType, ...],
    rules: tuple[Rule, ...],
    lot: LotRules,
) -> RuleSet:
    meta, plateau, measure = plain["rule_set"], plain["plateau_detection"], plain["measurement"]
    program, stages, aging = plain["program"], plain["stages"], plain["aging"]

    def num(values: Values, key: str) -> float:
        found = number(values, key)
        assert found is not None  # the schema gives every such key a default
        return found

    return RuleSet(
        name=str(meta["name"]),
        revision=str(meta["revision"]),
        chemistry=str(meta["chemistry"]),
        family=None if meta.get("family") is None else str(meta["family"]),
        sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        source=name,
        cell_types=cell_types,
        plateau=PlateauSettings(
            flatness_mv_per_pct=num(plateau, "flatness_mV_per_pct"),
            min_length_pct=num(plateau, "min_length_pct"),
            merge_gap_pct=num(plateau, "merge_gap_pct"),
            smoothing_pct=num(plateau, "smoothing_pct"),
            grid_points=int(num(plateau, "grid_points")),
            ica_bin_mv=num(plateau, "ica_bin_mV"),
            ica_min_prominence_ah_per_v=num(plateau, "ica_min_prominence_Ah_per_V"),
        ),
        rules=rules,
        dcir_pulse_s=num(measure, "dcir_pulse_s"),
        relax_s=num(measure, "relax_s"),
        rest_current_fraction=num(measure, "rest_current_C"),
        zero_offset=str(measure.get("zero_offset", "corrected")),
        decision=str(measure.get("decision", SIMPLE)),
        description=str(meta["description"]),
        program=Program(
            cycles=_int_or_none(program, "cycles"),
            grading_step=_int_or_none(program, "grading_step"),
            end_of_discharge_v=number(program, "end_of_discharge_V"),
            end_tolerance_v=num(program, "end_tolerance_V"),
            final_rest_s=number(program, "final_rest_s"),
        ),
        stages=tuple(str(s) for s in cast(Sequence[str], stages["needed"])),
        stage_overdue_h=number(stages, "overdue_h"),
        aging=AgingSettings(
            min_days=num(aging, "min_days"),
            temperature_coefficient_mv_per_k=number(aging, "temperature_coefficient_mV_per_K"),
            reference_c=num(aging, "reference_C"),
        ),
        screens=lot.screens,
        grades=lot.grades,
        lot_quiet_h=number(plain["lot"], "quiet_h"),
        record_counts=str(plain["records"]["counts"]),
        retests=_int_or_none(plain["records"], "retests"),
        release_hazards=tuple(str(h) for h in cast(Sequence[str], plain["review"][_RELEASE])),
        review_wait_h=number(plain["review"], "wait_h"),
    )


def _int_or_none(values: Values, key: str) -> int | None:
    found = number(values, key)
    return None if found is None else int(found)


def load_rule_set(text: str, name: str) -> RuleSet:
    """Parse one rule file's text; ``name`` is the file name errors show.

    Raises RulesError for the first problem (by line). ``RuleSet.sha256`` is the
    SHA-256 of ``text`` encoded as UTF-8, in hex.
    """
    rule_set, errors = _parse(text, name)
    if errors:
        raise errors[0]
    assert rule_set is not None
    return rule_set


def _duplicates(rule_sets: Sequence[RuleSet]) -> list[RulesError]:
    """A cell type declared by two files: a problem naming both files and lines."""
    seen: dict[str, CellType] = {}
    errors = []
    for rule_set in rule_sets:
        for ct in rule_set.cell_types:
            first = seen.setdefault(ct.name, ct)
            if first is not ct:
                errors.append(
                    RulesError(
                        f"cell type '{ct.name}' is also declared in {first.where}",
                        ct.where or SourceRef(rule_set.source),
                        hint="Keep each cell type in one rule file only, so that it has one set of "
                        "acceptance windows.",
                    )
                )
    return errors


def reused_revisions(
    rule_sets: Sequence[RuleSet], judged: Iterable[tuple[str, str, str]]
) -> list[RulesError]:
    """Rule sets whose text changed while their revision did not.

    ``judged`` is every (name, revision, SHA-256) that judged a recorded cell. Results and
    certificates name a rule set by its revision, so one revision must stand for one text: a
    file whose name and revision judged cells with another text is a problem, located at its
    ``revision`` line. (A revision that judged nothing yet may still be edited.)
    """
    known: dict[tuple[str, str], set[str]] = {}
    for name, revision, sha in judged:
        known.setdefault((name, revision), set()).add(sha)
    errors = []
    for rs in rule_sets:
        shas = known.get((rs.name, rs.revision))
        if not shas or rs.sha256 in shas:
            continue
        errors.append(RulesError(
            f"rule set '{rs.name}' revision '{rs.revision}' judged cells with another text "
            f"(SHA-256 {min(shas)[:12]}...); this text (SHA-256 {rs.sha256[:12]}...) is not that "
            "revision",
            SourceRef(rs.source, _revision_line(rs.source)),
            hint="Results and certificates name a rule set by its revision: give the changed file "
            "a new revision in [rule_set] (for example today's date and a number), so that each "
            "revision stands for one text.",
        ))
    return errors


def _revision_line(source: str) -> int | None:
    """The line of ``revision = ...`` in a rule file, if it can be read."""
    try:
        lines = pathlib.Path(source).read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError):
        return None
    return next((n for n, line in enumerate(lines, 1) if line.strip().startswith("revision")), None)


@dataclass(frozen=True, slots=True)
class RuleBook:
    """Every rule set of a station; each cell type belongs to exactly one of them."""

    rule_sets: tuple[RuleSet, ...]

    def __post_init__(self) -> None:
        errors = _duplicates(self.rule_sets)
        if errors:
            raise errors[0]

    @property
    def cell_types(self) -> tuple[str, ...]:
        """Every cell type name the book knows, sorted."""
        return tuple(sorted(ct.name for rs in self.rule_sets for ct in rs.cell_types))

    def for_cell_type(self, cell_type: str, *, source: str = "") -> tuple[RuleSet, CellType]:
        """The rule set and cell type record for ``cell_type`` (exact name).

        Raises InputError naming ``source`` (the data file) when no rule set declares it.
        """
        for rule_set in self.rule_sets:
            found = rule_set.cell_type(cell_type)
            if found is not None:
                return rule_set, found
        known = self.cell_types
        hint = did_you_mean(cell_type, known) + (
            f"Known cell types: {', '.join(known)}. " if known else "No rule file declares any. "
        )
        raise InputError(
            f"no rule set covers cell type '{cell_type}'",
            SourceRef(source) if source else None,
            hint=hint + "Correct the file's cell_type, or declare the type in a rule file.",
        )


def _rule_files(path: pathlib.Path) -> list[pathlib.Path] | RulesError:
    if not path.is_dir():
        return RulesError(
            "rule folder not found",
            SourceRef(str(path)),
            hint="Create it, or give the folder that holds the rule files.",
        )
    files = sorted(p for p in path.glob("*.toml") if p.is_file())
    return files or RulesError(
        "no rule files (*.toml) in this folder",
        SourceRef(str(path)),
        hint="Add at least one rule file; docs/rules.md describes them.",
    )


def _read(file: pathlib.Path) -> str | RulesError:
    """The file's text, decoded as UTF-8 without changing its line endings (the hash sees them)."""
    data = file.read_bytes()
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        column = exc.start - data.rfind(b"\n", 0, exc.start)  # in bytes, 1-based
        return RulesError(
            "not UTF-8 text",
            SourceRef(str(file), line, column),
            hint="Save the file with UTF-8 encoding.",
        )


def check_rules_dir(path: pathlib.Path) -> list[RulesError]:
    """Every problem in every rule file directly in ``path`` (for `formgate rules check`)."""
    files = _rule_files(path)
    if isinstance(files, RulesError):
        return [files]
    errors: list[RulesError] = []
    rule_sets = []
    for file in files:
        text = _read(file)
        if isinstance(text, RulesError):
            errors.append(text)
            continue
        rule_set, found = _parse(text, str(file))
        errors += found
        if rule_set is not None:
            rule_sets.append(rule_set)
    return errors + _duplicates(rule_sets)


def load_rules_dir(path: pathlib.Path) -> RuleBook:
    """Load every ``*.toml`` directly in ``path`` (not subfolders), in name order.

    Errors name each file as ``path / file name``. Raises RulesError on the first
    problem, including a cell type declared in two files.
    """
    files = _rule_files(path)
    if isinstance(files, RulesError):
        raise files
    rule_sets = []
    for file in files:
        text = _read(file)
        if isinstance(text, RulesError):
            raise text
        rule_sets.append(load_rule_set(text, str(file)))
    return RuleBook(tuple(rule_sets))


def check_profiles_dir(folder: pathlib.Path) -> list[FormgateError]:
    """Every problem of the import profiles (``*.toml``) in ``folder``, read as UTF-8 as the
    station reads them; an absent folder has none."""
    from pipeline.errors import ProfileError
    from pipeline.read.profile import load_profile

    problems: list[FormgateError] = []
    for path in sorted(p for p in folder.glob("*.toml") if p.is_file()):
        try:
            data = path.read_bytes()
        except OSError as exc:
            unreadable = f"cannot read the import profile ({exc.strerror})"
            problems.append(ProfileError(unreadable, SourceRef(str(path)), "Check its permissions."))
            continue
        try:
            load_profile(data.decode("utf-8"), str(path))
        except UnicodeDecodeError as exc:
            line = data[: exc.start].count(b"\n") + 1
            column = exc.start - data.rfind(b"\n", 0, exc.start)  # in bytes, 1-based
            where = SourceRef(str(path), line, column)
            problems.append(ProfileError("not UTF-8 text", where, "Save the file with UTF-8 encoding."))
        except ProfileError as error:
            problems.append(error)
    return problems
