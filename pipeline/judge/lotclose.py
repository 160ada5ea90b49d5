"""Closing a lot: every cell's verdict over its stages, the lot's screens, grades and statistics.

Pure given its inputs: the lot's cycle-file results (the result JSON documents the
judge wrote), the aging readings of its cells, and the rule book. For each cell the
record that counts is its latest cycle-file result (by analysis time) and all its
readings; its verdict is the worst of its stages, held while a needed stage is missing
(judge/cellverdict.py). The lot's robust screens are then evaluated once, on the cells
that pass at that moment: a passing cell outside them becomes ``hold`` ("outlier in
lot: ..."), and the close records both decisions, never only the second. Grades go to
the cells that still pass. A person's review that still stands decides its cell instead
of its records (judge/review.py; how it meets the screens: :func:`close_lot`).
"""

from __future__ import annotations

import dataclasses
import datetime
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, cast

from pipeline.acceptance.rules import CellType, RuleSet
from pipeline.errors import FormgateError
from pipeline.judge.aging import judge_aging
from pipeline.judge.cellverdict import (
    AGING,
    CYCLE_FILE,
    CellDecision,
    CheckOut,
    StageRecord,
    decide,
    outlier_phrase,
)
from pipeline.judge.evaluate import decision_line
from pipeline.judge.lotscreens import Outlier
from pipeline.judge.lotstats import (
    CellRow,
    GradeClass,
    LotStatistics,
    ScreenSpec,
    Sides,
    WindowSpec,
    grade_of,
    lot_statistics,
)
from pipeline.judge.metricdefs import RULE_BY_NAME
from pipeline.judge.program import INCOMPLETE
from pipeline.judge.review import Reviewed, held_after_release, screens_after_release, stands
from pipeline.read.readings import Reading, ReadingFile
from pipeline.rulebook.book import RuleBook


@dataclass(frozen=True, slots=True)
class ClosedCell:
    """One cell at the lot's close: its decision before and after the screens, grade, values."""

    cell_id: str
    cell_type: str
    before_screens: CellDecision
    decision: CellDecision
    grade: str | None
    values: Mapping[str, float | None]
    records: tuple[tuple[str, str, str], ...]  # (stage, file name, sha256)
    decided_at: datetime.datetime | None
    # (channel, station) of each cycle-file record, as the file's metadata names them ("" if not)
    places: tuple[tuple[str, str], ...] = ()
    uncertainty: Mapping[str, float] = dataclasses.field(default_factory=dict)  # U by metric

    @property
    def changed(self) -> bool:
        """True when the screens turned a pass into a hold at the close."""
        return self.decision.verdict != self.before_screens.verdict


@dataclass(frozen=True, slots=True)
class ClosedLot:
    """A closed lot: its cells, the rule set it was judged by and the lot statistics."""

    lot: str
    rule_set: RuleSet
    cell_types: tuple[str, ...]
    cells: tuple[ClosedCell, ...]
    checks: tuple[WindowSpec, ...]
    screens: tuple[ScreenSpec, ...]
    grades: tuple[GradeClass, ...]
    statistics: LotStatistics  # as screened: limits from the cells passing before the screens
    notes: tuple[str, ...] = ()


def specs(rule_set: RuleSet, cell_type: CellType) -> tuple[WindowSpec, ...]:
    """The rule set's checks as windows for Cpk, relative windows resolved for ``cell_type``."""
    out = []
    for rule in rule_set.rules:
        if rule.cell_types and cell_type.name not in rule.cell_types:
            continue
        window = rule.window.resolve(cell_type)
        out.append(WindowSpec(rule.metric, window.low, window.high, rule.severity.value, rule.id))
    return tuple(out)


def _lot_specs(
    rule_set: RuleSet, cell_type: CellType
) -> tuple[tuple[WindowSpec, ...], tuple[ScreenSpec, ...], tuple[GradeClass, ...]]:
    screens = tuple(
        ScreenSpec(s.metric, s.k, s.min_cells, cast(Sides, s.sides))  # the loader checked it
        for s in rule_set.screens
    )
    grades = tuple(
        GradeClass(g.name, {m: (lo, hi) for m, lo, hi in g.bounds}, g.where)
        for g in rule_set.grades
    )
    return specs(rule_set, cell_type), screens, grades


_OUT = ("out_of_window", "not_judged")


def _cycle_record(doc: Mapping[str, Any]) -> StageRecord:
    verdict = str(doc["verdict"])
    reason = "" if verdict == "pass" else str(doc.get("decision") or "; ".join(doc["reasons"]))
    return StageRecord(
        CYCLE_FILE,
        verdict,
        reason,
        tuple(str(h) for h in doc.get("hazards", ())),
        str(doc["input"]["name"]),
        str(doc["input"]["sha256"]),
        tuple(
            CheckOut(str(c["id"]), str(c["metric"]), str(c["severity"]), str(c["outcome"]))
            for c in doc.get("checks", ())
            if c.get("outcome") in _OUT
        ),
    )


@dataclass(frozen=True, slots=True)
class CellStages:
    """One cell's records that count, one per stage, with its values and the files behind them."""

    records: tuple[StageRecord, ...]
    values: Mapping[str, float | None]
    files: tuple[tuple[str, str, str], ...]  # (stage words, file name, sha256)
    decided_at: datetime.datetime | None
    places: tuple[tuple[str, str], ...] = ()  # (channel, station) per cycle-file record
    uncertainty: Mapping[str, float] = dataclasses.field(default_factory=dict)  # U by metric


_WORST_FIRST = {"fail": 3, "error": 3, "hold": 2, "pass": 1}


def _rank(doc: Mapping[str, Any], counts: str) -> tuple[bool, int, str, str]:
    """Sort key of a stage's records: the largest counts. Complete records before cut ones."""
    complete = not any(n.get("code") == INCOMPLETE for n in doc.get("notes", ()))
    severity = _WORST_FIRST.get(str(doc["verdict"]), 3) if counts == "worst" else 0
    return (complete, severity, str(doc["analysed_at"]), str(doc["input"]["sha256"]))


def _stages_of(doc: Mapping[str, Any]) -> tuple[str, ...]:
    """The stages a cycle-file result covers (a result without the key: the whole program)."""
    return tuple(str(s) for s in doc.get("stages") or CYCLE_FILE)


def cell_stages(
    documents: Sequence[Mapping[str, Any]],
    readings: Sequence[tuple[str, str, Reading]],
    rule_set: RuleSet,
    cell_type: CellType,
) -> CellStages:
    """The records that count for one cell: per stage its latest cycle-file result, and the
    aging stage judged on all its readings ((file name, sha256, reading) triples).

    Of a stage's records the rule set's ``[records] counts`` chooses: the latest complete
    one (a retest, a copy sent again supersedes an earlier one) or the worst complete one;
    a record cut short counts only while the stage has no complete record. The order the
    records arrived in does not matter, only their analysis times. More records of a stage
    than ``[records] retests`` allows hold the cell.
    """
    chosen: dict[int, tuple[Mapping[str, Any], list[str]]] = {}
    too_many: list[str] = []
    for stage in (*CYCLE_FILE,):
        covering = [d for d in documents if stage in _stages_of(d)]
        if covering:
            doc = max(covering, key=lambda d: _rank(d, rule_set.record_counts))
            chosen.setdefault(id(doc), (doc, []))[1].append(stage)
            if rule_set.retests is not None and len(covering) > 1 + rule_set.retests:
                too_many.append(
                    f"{len(covering)} records of stage {stage}, more than the first and "
                    f"{rule_set.retests} retest{'s' if rule_set.retests != 1 else ''}"
                )
    records: list[StageRecord] = []
    values: dict[str, float | None] = {}
    uncertainty: dict[str, float] = {}
    files: list[tuple[str, str, str]] = []
    times = []
    places: list[tuple[str, str]] = []
    ordered = sorted(chosen.values(), key=lambda p: str(p[0]["analysed_at"]))
    for doc, stages in ordered:
        base = _cycle_record(doc)
        records.append(dataclasses.replace(base, stages=tuple(stages)))
        values.update({k: v for k, v in doc["metrics"].items() if v is not None or k not in values})
        # each value's expanded uncertainty, from the record it came from (none in results
        # written before uncertainties were recorded)
        uncertainty.update({
            k: float(u) for k, u in (doc.get("metrics_U") or {}).items()
            if u is not None and doc["metrics"].get(k) is not None
        })
        files.append((" and ".join(stages), base.source, base.sha256))
        where = doc.get("cell", {})
        places.append((str(where.get("channel") or ""), str(where.get("station") or "")))
        times.append(datetime.datetime.fromisoformat(str(doc["analysed_at"])))
    if too_many:
        records.append(StageRecord((), "hold", "; ".join(too_many)))
    counts = [doc["metrics"].get("cycle_count") for doc, _ in ordered]
    if len(counts) > 1:  # a cell's cycles are those of its formation and its grading files
        values["cycle_count"] = None if None in counts else float(sum(counts))
    if readings:
        aging = judge_aging([r for _, _, r in readings], rule_set, cell_type)
        verdict = aging.verdict.kind.value
        reason = "" if verdict == "pass" else decision_line(aging.verdict, aging.notes)
        hazards = tuple(h.value for h in aging.verdict.hazards)
        sources = dict.fromkeys((name, sha) for name, sha, _ in readings)
        out = tuple(
            CheckOut(c.rule_id, c.metric, c.severity.value, c.outcome.value)
            for c in aging.verdict.checks
            if c.outcome.value in _OUT
        )
        records.append(
            StageRecord(AGING, verdict, reason, hazards, ", ".join(n for n, _ in sources),
                        checks_out=out)
        )
        values.update(aging.values)
        uncertainty.update(aging.uncertainty)
        files += [("aging", name, sha) for name, sha in sources]
    return CellStages(tuple(records), values, tuple(files), max(times) if times else None,
                      tuple(places), uncertainty)


@dataclass(frozen=True, slots=True)
class CellNow:
    """A cell as its records stand: its rule set and type, its records that count, its stages."""

    rule_set: RuleSet
    cell_type: CellType
    stages: CellStages
    needed: tuple[str, ...]


def cell_now(
    documents: Sequence[Mapping[str, Any]],
    readings: Sequence[tuple[str, str, Reading]],
    rulebook: RuleBook,
) -> CellNow | None:
    """One cell's records that count, as a station decides it: its rule set from the cell type
    its latest record (or reading) names; None when none names one yet. ``documents`` are the
    cell's result documents (not refused), ``readings`` (file name, SHA-256, reading)."""
    types = [str(d["cell_type"]["name"]) for d in documents] + [
        r.cell_type for _, _, r in readings if r.cell_type
    ]
    if not types:
        return None
    rule_set, cell_type = rulebook.for_cell_type(types[-1])
    stages = cell_stages(documents, readings, rule_set, cell_type)
    return CellNow(rule_set, cell_type, stages, tuple(cell_type.stages or rule_set.stages))


def close_lot(
    lot: str,
    documents: Sequence[Mapping[str, Any]],
    reading_files: Sequence[ReadingFile],
    rulebook: RuleBook,
    *,
    sha256: Mapping[str, str] | None = None,
    reviews: Mapping[str, Reviewed] | None = None,
) -> ClosedLot:
    """Decide every cell of ``lot`` and evaluate its screens and grades.

    ``documents``: result JSON documents (any lots; only ``lot``'s are used; per stage a
    cell's latest by analysis time counts). ``reading_files``: aging readings (only
    ``lot``'s are used). ``sha256``: reading file's source name -> its SHA-256.
    ``reviews``: each reviewed cell's latest review. One that still stands
    (judge/review.py) decides its cell: the screens' limits come from the cells that pass
    on their own (a concession never widens them), a cell released before the close is
    held again only by a screen on a metric its release did not answer, and a released
    cell is graded by its values like any passing cell.
    Raises FormgateError when the lot has no cell, or its cells need several rule sets.
    """
    docs_of: dict[str, list[Mapping[str, Any]]] = {}
    for doc in documents:
        if doc["cell"]["lot"] == lot:
            docs_of.setdefault(str(doc["cell"]["cell_id"]), []).append(doc)
    latest = {c: max(ds, key=lambda d: str(d["analysed_at"])) for c, ds in docs_of.items()}
    files = sha256 or {}
    by_cell: dict[str, list[tuple[str, str, Reading]]] = {}
    for f in reading_files:
        for r in f.readings:
            if r.lot == lot:
                by_cell.setdefault(r.cell_id, []).append((f.source, files.get(f.source, ""), r))
    cell_ids = sorted(set(latest) | set(by_cell))
    if not cell_ids:
        raise FormgateError(f"lot {lot} has no judged cell and no reading")
    types = {
        c: str(latest[c]["cell_type"]["name"]) if c in latest else (by_cell[c][0][2].cell_type or "")
        for c in cell_ids
    }
    known = sorted({t for t in types.values() if t})
    if not known:
        raise FormgateError(f"lot {lot}: no cell names its cell type")
    rule_set, cell_type = rulebook.for_cell_type(known[0])
    notes = []
    if len(known) > 1:
        others = {rulebook.for_cell_type(t)[0].name for t in known[1:]}
        if others != {rule_set.name}:
            raise FormgateError(
                f"lot {lot} holds cells of types judged by different rule sets "
                f"({', '.join(known)}); a lot's screens need one rule set"
            )
        notes.append(f"the lot holds {len(known)} cell types: {', '.join(known)}")
    checks, screens, grades = _lot_specs(rule_set, cell_type)
    first = {
        cell: cell_stages(
            docs_of.get(cell, []),
            by_cell.get(cell, []),
            rule_set,
            rule_set.cell_type(types[cell]) or cell_type,
        )
        for cell in cell_ids
    }
    needed = {c: (rule_set.cell_type(types[c]) or cell_type).stages or rule_set.stages
              for c in cell_ids}
    before = {c: decide(needed[c], st.records) for c, st in first.items()}
    rows = [CellRow(c, before[c].verdict, st.values) for c, st in first.items()]
    screened = lot_statistics(rows, checks, screens, grades)
    flagged: dict[str, list[str]] = {}
    for o in screened.outliers:
        unit = RULE_BY_NAME[o.metric].unit if o.metric in RULE_BY_NAME else ""
        flagged.setdefault(o.cell_id, []).append(outlier_phrase(o, unit))
    standing = {
        c: r for c, r in (reviews or {}).items()
        if c in first and stands(r, first[c].records, first[c].files)
    }
    cells = []
    late: tuple[Outlier, ...] = ()  # released cells the screens hold again
    for cell, st in first.items():
        decision = before[cell]
        final = decision
        if cell in standing:  # a person's review decides the cell (ISO 9001:2015, 8.7)
            given = standing[cell].given
            decision = final = CellDecision(given.verdict, (given.reason,), given.hazards, ())
            found = screens_after_release(standing[cell], st.records, st.values,
                                          screened.limits, cell)
            if found:
                late += found
                final = CellDecision(
                    "hold", held_after_release(found, standing[cell]), given.hazards, ()
                )
            grade = grade_of(st.values, grades) if final.verdict == "pass" else None
        else:
            if cell in flagged:
                final = decide(needed[cell], st.records, flagged[cell])
            grade = screened.grades.get(cell) if final.verdict == "pass" else None
        cells.append(
            ClosedCell(cell, types[cell], decision, final, grade, st.values, st.files, st.decided_at,
                       st.places, st.uncertainty)
        )
    # the counts, the yield and the grades as decided at the close (outliers held, ungraded);
    # the limits, outliers, spreads and Cpk as the screens were evaluated
    as_closed = lot_statistics(
        [CellRow(c.cell_id, c.decision.verdict, c.values) for c in cells], checks, (), grades
    )
    statistics = dataclasses.replace(
        screened,
        outliers=screened.outliers + late,
        tally=as_closed.tally,
        grades=as_closed.grades,
        grade_counts=as_closed.grade_counts,
        ungraded=as_closed.ungraded,
    )
    return ClosedLot(
        lot, rule_set, tuple(known), tuple(cells), checks, screens, grades, statistics, tuple(notes)
    )

