"""The lot and stage tables of a rule file: [stages], [screen.ID] and [grade.NAME].

Their keys and values pass the schema first (tables.py), except a grade's: its keys
are metric names, each with an inline table ``{ low = ..., high = ... }``, checked here.
The cross-key rules live here too: a stage named twice or unknown, a check on an aging
metric without the aging stage, a grade with no range or a range that ends before it
begins. Every problem is reported with its line, like the rest of the file's.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import cast

from pipeline.acceptance.rules import STAGES, CellType, Grade, Rule, Screen
from pipeline.judge.metricdefs import AGING_METRIC_NAMES, RULE_BY_NAME, RULE_METRIC_NAMES
from pipeline.rulebook.schema import BY_TABLE
from pipeline.rulebook.tables import Collector, Values, check_table, describe, did_you_mean, number


@dataclass(frozen=True, slots=True)
class LotRules:
    """The screens and grades of a rule file, in file order."""

    screens: tuple[Screen, ...] = ()
    grades: tuple[Grade, ...] = ()


def lot_rules(
    out: Collector,
    data: Mapping[str, object],
    stages: Values,
    screens: tuple[dict[str, Values], set[str]],
    rules: Sequence[Rule],
    cell_types: Sequence[CellType] = (),
) -> LotRules:
    """Check the stage rules, build the screens and the grades; problems go to ``out``."""
    _check_stages(out, stages, rules, cell_types)
    values, broken = screens
    built = tuple(
        Screen(
            ident,
            str(v["metric"]),
            cast(float, number(v, "k")),
            int(cast(float, number(v, "min_cells"))),
            str(v["sides"]),
            out.where(("screen", ident)),
        )
        for ident, v in values.items()
        if ident not in broken and "metric" in v and "k" in v
    )
    return LotRules(built, _grades(out, data.get("grade", {})))


def _check_stage_list(out: Collector, needed: Sequence[str], path: tuple[str, ...], key: str) -> None:
    where = "[stages] needed" if path == ("stages",) else f"[cell_type.{path[-1]}] stages"
    for stage in needed:
        if stage not in STAGES:
            out.add(
                f'{where} holds "{stage}", which is not a stage',
                path,
                key,
                did_you_mean(stage, STAGES) + f"Stages: {', '.join(STAGES)}.",
            )
    if len(set(needed)) != len(needed):
        out.add(f"{where} names a stage twice", path, key, "Name each stage once.")
    if not needed:
        out.add(
            f"{where} is empty",
            path,
            key,
            'Name the stages a cell must pass, e.g. ["formation", "grading"].',
        )


def _check_stages(
    out: Collector, stages: Values, rules: Sequence[Rule], cell_types: Sequence[CellType]
) -> None:
    needed = tuple(cast(Sequence[str], stages.get("needed", ())))
    _check_stage_list(out, needed, ("stages",), "needed")
    for ct in cell_types:
        if ct.stages is not None:
            _check_stage_list(out, ct.stages, ("cell_type", ct.name), "stages")
    for rule in rules:
        if rule.metric not in AGING_METRIC_NAMES:
            continue
        types = [ct for ct in cell_types if not rule.cell_types or ct.name in rule.cell_types]
        lacking = [ct.name for ct in types if "aging" not in (ct.stages or needed)]
        if lacking or (not cell_types and "aging" not in needed):
            out.add(
                f"check '{rule.id}' judges {rule.metric}, an aging metric, but the stages "
                f"needed by {', '.join(lacking) or 'this rule set'} do not name aging",
                ("check", rule.id),
                "metric",
                'Add "aging" to needed under [stages] (e.g. needed = ["formation", "aging", '
                '"grading"]) or to the cell type\'s stages, or the check could never be made.',
            )
            return


def _grades(out: Collector, data: object) -> tuple[Grade, ...]:
    if not isinstance(data, Mapping):
        out.add(
            f"grade must be written as [grade.NAME] tables, found {describe(data)}",
            ("grade",),
            hint="Give each grade its own table, e.g. [grade.A], with one line per metric.",
        )
        return ()
    grades = []
    for name, body in data.items():
        path = ("grade", name)
        if not isinstance(body, Mapping) or not body:
            out.add(
                f"[grade.{name}] has no range",
                path if isinstance(body, Mapping) else ("grade",),
                None if isinstance(body, Mapping) else name,
                "Give at least one line such as grading_capacity_Ah = { low = 20.2, high = 20.6 }.",
            )
            continue
        bounds = [b for metric, bound in body.items() if (b := _bound(out, name, metric, bound))]
        if len(bounds) == len(body):
            grades.append(Grade(str(name), tuple(bounds), out.where(path)))
    return tuple(grades)


def _bound(
    out: Collector, grade: str, metric: str, bound: object
) -> tuple[str, float | None, float | None] | None:
    path = ("grade", grade)
    if metric not in RULE_BY_NAME:
        out.add(
            f"[grade.{grade}] names '{metric}', which is not a metric",
            path,
            metric,
            did_you_mean(metric, RULE_METRIC_NAMES) + "docs/rules.md lists every metric.",
        )
        return None
    if not isinstance(bound, Mapping):
        out.add(
            f"[grade.{grade}] {metric} must be a range, found {describe(bound)}",
            path,
            metric,
            f"Write it as {metric} = {{ low = 1.0, high = 2.0 }}, leaving out a side that is "
            "open.",
        )
        return None
    before = len(out.errors)
    values = check_table(out, (*path, metric), BY_TABLE["grade"], bound)
    if len(out.errors) > before:
        return None
    low, high = number(values, "low"), number(values, "high")
    if low is None and high is None:
        out.add(
            f"[grade.{grade}] {metric} has neither low nor high",
            path,
            metric,
            "Give low, high or both.",
        )
        return None
    if low is not None and high is not None and low >= high:
        out.add(
            f"[grade.{grade}] {metric} = {{ low = {low:g}, high = {high:g} }} ends before it "
            "begins",
            path,
            metric,
            "low must be below high (low is in the grade, high is not).",
        )
        return None
    return (metric, low, high)
