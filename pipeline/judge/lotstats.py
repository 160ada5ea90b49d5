"""A whole lot at once: counts and yield, and every metric's spread, capability, screens and grades.

A cell's verdict comes from fixed windows in a rule file. Quality staff also look at the
lot as a whole: how many cells passed, how every checked metric is spread, how much room
the process leaves inside each window (Cpk), which passing cells sit far from their lot
even though they are inside the window (a robust screen), and which grade each passing cell
belongs to, so that cells of one grade can be matched into packs.

This module holds what a lot is judged against (window checks, screens, grade classes),
the grades and the verdict tally, and the whole-lot entry point :func:`lot_statistics`.
The statistics of one metric are left to :mod:`pipeline.judge.lotspread`, the robust
screens to :mod:`pipeline.judge.lotscreens`. Everything here is a pure function of values
and specifications: no files, no ledger, no clock. :func:`lot_statistics` builds one float
array per metric once (NaN for a value not measured) and works on those arrays, so a lot
of 10,000 cells takes milliseconds (benchmarks/lot_statistics.py measures it).

A value that is None, NaN or infinite is a check not made: it is dropped, never counted as
a value, never an outlier and never graded.
"""

from __future__ import annotations

import math
import operator
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Final, Literal

import numpy as np

from pipeline.acceptance.results import VerdictKind
from pipeline.judge.lotscreens import (
    Outlier,
    RobustLimits,
    check_screen,
    flag_outliers,
    robust_limits_of_measured,
)
from pipeline.judge.lotspread import (
    Capability,
    Distribution,
    capability_of_measured,
    distribution_of_measured,
)
from pipeline.model import FloatArray, SourceRef, frozen_mapping

# How verdicts are listed in a tally: the ones that need someone's attention first.
VERDICT_ORDER: Final = (
    VerdictKind.FAIL.value,
    VerdictKind.HOLD.value,
    VerdictKind.ERROR.value,
    VerdictKind.PASS.value,
)
# The sides a screen may flag (pipeline.judge.lotscreens.SIDES checks them at run time).
Sides = Literal["both", "low", "high"]


# -- grades ---------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class GradeClass:
    """A named grade: metric -> (low, high), low inclusive and high exclusive, None = open.

    High is exclusive so that adjacent classes (A: 4.9-5.0 Ah, B: 5.0-5.1 Ah) never both
    hold. A class with no bounds takes every cell that reaches it (a catch-all, last).
    ``where`` is where a rule file declared it, for the loader's messages.
    """

    name: str
    bounds: Mapping[str, tuple[float | None, float | None]]
    where: SourceRef | None = field(default=None, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "bounds", frozen_mapping(dict(self.bounds)))


def _within(value: float | None, low: float | None, high: float | None) -> bool:
    if value is None or not math.isfinite(value):
        return False
    if low is not None and value < low:
        return False
    if high is not None and value >= high:
        return False
    return True


def grade_of(values: Mapping[str, float | None], classes: Sequence[GradeClass]) -> str | None:
    """The first class, in the order given, whose every bound holds; None when none does.

    A metric the cell has no value for keeps it out of every class that bounds it.

    >>> a = GradeClass("A", {"cap": (5.0, None)})
    >>> b = GradeClass("B", {"cap": (4.9, 5.0)})
    >>> [grade_of({"cap": v}, [a, b]) for v in (5.0, 4.95, 4.8, None)]
    ['A', 'B', None, None]
    """
    for grade in classes:
        if all(_within(values.get(metric), low, high) for metric, (low, high) in grade.bounds.items()):
            return grade.name
    return None


def check_grade_classes(classes: Sequence[GradeClass]) -> list[str]:
    """Every problem of a list of grade classes, in words, for the rule loader to report.

    >>> check_grade_classes([GradeClass("A", {"cap": (5.0, 4.0)}), GradeClass("A", {})])
    ["grade class 'A': cap low 5.0 is not below high 4.0", "grade class 'A' is named 2 times"]
    """
    problems: list[str] = []
    for number, grade in enumerate(classes, start=1):
        head = f"{grade.where}: " if grade.where else ""
        if not grade.name.strip():
            problems.append(f"{head}grade class {number} has no name")
        label = f"grade class {grade.name!r}" if grade.name.strip() else f"grade class {number}"
        for metric, (low, high) in grade.bounds.items():
            if any(b is not None and not math.isfinite(b) for b in (low, high)):
                problems.append(f"{head}{label}: {metric} bounds must be finite numbers")
            elif low is not None and high is not None and low >= high:
                problems.append(f"{head}{label}: {metric} low {low} is not below high {high}")
    counts = Counter(grade.name for grade in classes if grade.name.strip())
    problems += [f"grade class {name!r} is named {n} times" for name, n in counts.items() if n > 1]
    return problems


def _grade_column(
    columns: Mapping[str, FloatArray], n: int, classes: Sequence[GradeClass]
) -> list[str | None]:
    """:func:`grade_of` for every cell at once (column arrays, NaN = not measured)."""
    grade = np.full(n, -1, dtype=np.int64)
    with np.errstate(invalid="ignore"):
        for index, grade_class in enumerate(classes):
            holds = grade < 0
            for metric, (low, high) in grade_class.bounds.items():
                x = columns.get(metric)
                if x is None:
                    holds[:] = False
                    break
                holds &= np.isfinite(x)
                if low is not None:
                    holds &= x >= low
                if high is not None:
                    holds &= x < high
            grade[holds] = index
    names = [c.name for c in classes]
    return [names[i] if i >= 0 else None for i in grade.tolist()]


# -- counts ---------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Tally:
    """How many cells got each verdict, and the yield (passed / n; None for an empty lot).

    ``by_verdict`` lists fail, hold, error and pass (zeros kept), then any other verdict
    in the order first seen.
    """

    n: int
    by_verdict: Mapping[str, int]
    passed: int
    yield_fraction: float | None


def tally(verdicts: Iterable[str | VerdictKind]) -> Tally:
    """Count the verdicts of a lot.

    >>> t = tally(["pass", "fail", "pass", "hold"])
    >>> (t.n, dict(t.by_verdict), t.yield_fraction)
    (4, {'fail': 1, 'hold': 1, 'error': 0, 'pass': 2}, 0.5)
    """
    counts = Counter(_verdict_text(v) for v in verdicts)
    ordered = {name: counts.get(name, 0) for name in VERDICT_ORDER}
    ordered.update((name, count) for name, count in counts.items() if name not in ordered)
    n = sum(counts.values())
    passed = counts.get(VerdictKind.PASS.value, 0)
    return Tally(n, frozen_mapping(ordered), passed, passed / n if n else None)


def _verdict_text(verdict: str | VerdictKind) -> str:
    return verdict.value if isinstance(verdict, VerdictKind) else verdict


# -- the whole lot --------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class CellRow:
    """One cell of a lot: its id, its verdict ("pass", "fail", ...) and its metric values."""

    cell_id: str
    verdict: str | VerdictKind
    values: Mapping[str, float | None]


@dataclass(frozen=True, slots=True)
class WindowSpec:
    """A window check of the rule set: metric within [low, high] (None = open).

    ``severity`` ("reject" or "review") and ``name`` (the check's id) are carried for the
    report; the capability of a check is keyed by ``name``, or the metric when it is empty.
    """

    metric: str
    low: float | None
    high: float | None
    severity: str = "reject"
    name: str = ""

    @property
    def key(self) -> str:
        return self.name or self.metric


@dataclass(frozen=True, slots=True)
class ScreenSpec:
    """A robust outlier screen: ``median ± k·robust_sd`` of the passing cells on ``sides``,
    applied once the lot has at least ``min_cells`` passing cells with a value."""

    metric: str
    k: float
    min_cells: int
    sides: Sides = "both"


@dataclass(frozen=True, slots=True)
class LotStatistics:
    """Everything :func:`lot_statistics` works out for one lot.

    ``distributions``: every metric any cell or spec names -> its spread over all cells
    (None when no cell has a value). ``capabilities``: check key -> Cpk over all cells with
    a value, failed ones included (leaving them out would make the process look better
    than it is). ``limits``: one per screen, in the order given, from the passing cells.
    ``outliers``: passing cells outside a screen's limits (failed cells are out already),
    screen by screen, furthest first. ``grades``: passing cell -> its grade (None when no
    class takes it); ``grade_counts``: every class in order -> passing cells in it;
    ``ungraded``: passing cells no class takes.
    """

    tally: Tally
    distributions: Mapping[str, Distribution | None]
    capabilities: Mapping[str, Capability]
    limits: tuple[RobustLimits, ...]
    outliers: tuple[Outlier, ...]
    grades: Mapping[str, str | None]
    grade_counts: Mapping[str, int]
    ungraded: int


def _metric_names(
    cells: Sequence[CellRow], checks: Sequence[WindowSpec], screens: Sequence[ScreenSpec],
    grades: Sequence[GradeClass],
) -> list[str]:
    """Every metric the cells or the specs name, in order of first appearance."""
    names: dict[str, None] = {}
    seen = names.keys()
    for cell in cells:
        if not seen >= cell.values.keys():  # a set comparison in C: most cells name no new metric
            names.update(dict.fromkeys(cell.values))
    names.update(dict.fromkeys(c.metric for c in checks))
    names.update(dict.fromkeys(s.metric for s in screens))
    for grade in grades:
        names.update(dict.fromkeys(grade.bounds))
    return list(names)


def _columns(cells: Sequence[CellRow], metrics: Sequence[str]) -> dict[str, FloatArray]:
    """One float array per metric over the cells; NaN where a cell has no finite value.

    Each cell's mapping is read once for all metrics (``itemgetter`` in C, a slower
    ``get`` per metric only for a cell that lacks one): reading it once per metric cost
    twice as much on a large lot, the mappings being scattered in memory.
    """
    if not metrics:
        return {}
    rows: list[tuple[float | None, ...]] = []
    if len(metrics) == 1:
        rows = [(cell.values.get(metrics[0]),) for cell in cells]
    else:
        every = operator.itemgetter(*metrics)
        for cell in cells:
            try:
                rows.append(every(cell.values))
            except KeyError:
                rows.append(tuple(cell.values.get(m) for m in metrics))
    try:
        table = np.array(rows, dtype=np.float64).reshape(len(cells), len(metrics))  # None -> NaN
    except (TypeError, ValueError):
        raise ValueError(_first_bad_value(cells, metrics)) from None
    table[~np.isfinite(table)] = np.nan
    return {m: np.ascontiguousarray(table[:, j]) for j, m in enumerate(metrics)}


def _first_bad_value(cells: Sequence[CellRow], metrics: Sequence[str]) -> str:
    """Name the first cell and metric whose value is not a number (for the error message)."""
    for cell in cells:
        for metric in metrics:
            value = cell.values.get(metric)
            try:
                float(value if value is not None else math.nan)
            except (TypeError, ValueError):
                return f"cell {cell.cell_id}: {metric} = {value!r} is not a number"
    return "a value is not a number"  # pragma: no cover - numpy refused something float() takes


def _spec_window(metric: str, checks: Sequence[WindowSpec]) -> tuple[float | None, float | None]:
    """The window a passing cell met for ``metric``: the intersection of its checks' windows."""
    lows = [c.low for c in checks if c.metric == metric and c.low is not None]
    highs = [c.high for c in checks if c.metric == metric and c.high is not None]
    return (max(lows) if lows else None, min(highs) if highs else None)


def lot_statistics(
    cells: Sequence[CellRow],
    checks: Sequence[WindowSpec],
    screens: Sequence[ScreenSpec],
    grades: Sequence[GradeClass],
) -> LotStatistics:
    """Tally, distributions, capability, robust screens, outliers and grades of one lot.

    A screen's spec window is the intersection of the windows of every check on its
    metric (what a passing cell met); with no check its limits are not clipped. Raises
    ValueError for two checks with the same key, a screen with a bad k, min_cells or sides
    (the rule loader refuses those first), or a value that is not a number (naming the
    cell and metric).

    >>> cells = [CellRow(f"c{i}", "pass", {"cap": 5.0 + i / 100}) for i in range(5)]
    >>> stats = lot_statistics(cells, [WindowSpec("cap", 4.9, 5.2, name="capacity")], [], [])
    >>> (stats.tally.yield_fraction, round(stats.capabilities["capacity"].cpk, 3))
    (1.0, 2.53)
    """
    keys = Counter(check.key for check in checks)
    twice = sorted(key for key, count in keys.items() if count > 1)
    if twice:
        raise ValueError(f"more than one window check is named {', '.join(map(repr, twice))}")
    for screen in screens:
        check_screen(screen.k, screen.min_cells, screen.sides)

    metrics = _metric_names(cells, checks, screens, grades)
    columns = _columns(cells, metrics)
    ids = [cell.cell_id for cell in cells]
    verdicts = [v.value if isinstance(v, VerdictKind) else v for v in (cell.verdict for cell in cells)]
    passing = np.fromiter((v == VerdictKind.PASS.value for v in verdicts), dtype=bool, count=len(verdicts))
    passing_ids = [i for i, p in zip(ids, passing.tolist(), strict=True) if p]

    distributions = {m: distribution_of_measured(x[np.isfinite(x)]) for m, x in columns.items()}
    capabilities = {}
    for check in checks:
        x = columns[check.metric]
        capabilities[check.key] = capability_of_measured(x[np.isfinite(x)], check.low, check.high)

    limits: list[RobustLimits] = []
    flagged: list[Outlier] = []
    for screen in screens:
        x = columns[screen.metric][passing]
        spec_low, spec_high = _spec_window(screen.metric, checks)
        found = robust_limits_of_measured(
            screen.metric, x[np.isfinite(x)], screen.k, screen.min_cells, spec_low, spec_high, screen.sides
        )
        limits.append(found)
        flagged.extend(flag_outliers(passing_ids, x, found))

    passing_columns = {m: x[passing] for m, x in columns.items()}
    graded = _grade_column(passing_columns, len(passing_ids), grades)
    counts = Counter(graded)
    return LotStatistics(
        tally=tally(verdicts),
        distributions=frozen_mapping(distributions),
        capabilities=frozen_mapping(capabilities),
        limits=tuple(limits),
        outliers=tuple(flagged),
        grades=frozen_mapping(dict(zip(passing_ids, graded, strict=True))),
        grade_counts=frozen_mapping({g.name: counts.get(g.name, 0) for g in grades}),
        ungraded=counts.get(None, 0),
    )


__all__ = [
    "CellRow",
    "GradeClass",
    "LotStatistics",
    "ScreenSpec",
    "Sides",
    "Tally",
    "WindowSpec",
    "check_grade_classes",
    "grade_of",
    "lot_statistics",
    "tally",
]
