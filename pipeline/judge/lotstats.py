"""Lot statistics: counts and yield, the spread of every metric, capability, outlier screens, grades.

A cell's verdict comes from fixed windows in a rule file. Quality staff also look at the
lot as a whole: how many cells passed, how every checked metric is spread, how much room
the process leaves inside each window (Cpk), which passing cells sit far from their lot
even though they are inside the window (a robust screen, ``median ± k·1.4826·MAD`` of the
lot's passing cells, the part-average-testing idea of the semiconductor trade), and which
grade each passing cell belongs to, so that cells of one grade can be matched into packs.

Everything here is a pure function of values and specifications: no files, no ledger, no
clock. The whole-lot entry point :func:`lot_statistics` builds one float array per metric
once (NaN for a value not measured) and works on those arrays, so a lot of 10,000 cells
takes milliseconds (benchmarks/lot_statistics.py measures it).

A value that is None, NaN or infinite is a check not made: it is dropped, never counted as
a value, never an outlier and never graded.

>>> d = distribution([1.0, 2.0, None, 3.0, float("nan")])
>>> (d.n, d.mean, d.median, d.sd)
(3, 2.0, 2.0, 1.0)
>>> capability([9.0, 10.0, 11.0], 7.0, 16.0).cpk
1.0
"""

from __future__ import annotations

import math
import operator
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Final, Literal

import numpy as np

from pipeline.model import FloatArray, SourceRef, VerdictKind, frozen_mapping

# 1 / Φ⁻¹(3/4) ≈ 1.4826: the factor that makes the median absolute deviation of normal data
# an estimate of its standard deviation.
NORMAL_MAD_SCALE: Final = 1.0 / NormalDist().inv_cdf(0.75)
PERCENTILES: Final = (1, 5, 25, 75, 95, 99)
# How verdicts are listed in a tally: the ones that need someone's attention first.
VERDICT_ORDER: Final = (
    VerdictKind.FAIL.value,
    VerdictKind.HOLD.value,
    VerdictKind.ERROR.value,
    VerdictKind.PASS.value,
)
Sides = Literal["both", "low", "high"]
SIDES: Final = ("both", "low", "high")

Values = Iterable[float | None] | FloatArray


def _measured(values: Values) -> FloatArray:
    """The values that were measured, as a float array: None, NaN and ±inf dropped."""
    if isinstance(values, np.ndarray):
        x = np.asarray(values, dtype=np.float64)
    else:
        x = np.array(list(values), dtype=np.float64)  # numpy turns None into NaN
    kept: FloatArray = x[np.isfinite(x)]
    return kept


# -- one metric ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Distribution:
    """How one metric is spread over the cells that have a value for it.

    ``sd`` is the sample standard deviation (ddof = 1), None for a single value. ``mad``
    is the raw median absolute deviation; ``robust_sd`` = 1.4826·MAD estimates the
    standard deviation of normal data, yet a few wild values barely move it.
    ``percentile_values`` hold the percentiles named in :data:`PERCENTILES`, linearly
    interpolated (numpy's default); :attr:`percentiles` gives them as a mapping.
    """

    n: int
    mean: float
    median: float
    sd: float | None
    mad: float
    robust_sd: float
    minimum: float
    maximum: float
    percentile_values: tuple[float, ...]

    @property
    def percentiles(self) -> Mapping[int, float]:
        """Percentile (1, 5, 25, 75, 95, 99) -> value."""
        return dict(zip(PERCENTILES, self.percentile_values, strict=True))


def _distribution(x: FloatArray) -> Distribution | None:
    """:func:`distribution` of values already cleaned by :func:`_measured`."""
    n = int(x.size)
    if n == 0:
        return None
    median = float(np.median(x))
    mad = float(np.median(np.abs(x - median)))
    return Distribution(
        n=n,
        mean=float(np.mean(x)),
        median=median,
        sd=float(np.std(x, ddof=1)) if n >= 2 else None,
        mad=mad,
        robust_sd=NORMAL_MAD_SCALE * mad,
        minimum=float(np.min(x)),
        maximum=float(np.max(x)),
        percentile_values=tuple(float(p) for p in np.percentile(x, PERCENTILES)),
    )


def distribution(values: Values) -> Distribution | None:
    """Describe the measured values; None when no value was measured.

    >>> distribution([None, float("nan")]) is None
    True
    >>> distribution([4.0]).sd is None
    True
    """
    return _distribution(_measured(values))


@dataclass(frozen=True, slots=True)
class Capability:
    """How well one metric's spread fits its window: Cp, Cpl, Cpu and Cpk.

    Cp = (high - low)/(6 s), Cpu = (high - mean)/(3 s), Cpl = (mean - low)/(3 s), Cpk = the
    smaller of the sides present. s is the sample standard deviation of the whole lot (not a
    within-subgroup estimate), so on a lot these are what SPC texts call Pp and Ppk. A
    missing side leaves its index None (and Cp, which needs both). When nothing can be
    computed, ``cpk`` is None and ``why`` says why; else ``why`` is empty.
    """

    n: int
    mean: float | None
    sd: float | None
    low: float | None
    high: float | None
    cp: float | None = None
    cpl: float | None = None
    cpu: float | None = None
    cpk: float | None = None
    why: str = ""


def _capability(x: FloatArray, low: float | None, high: float | None) -> Capability:
    """:func:`capability` of values already cleaned by :func:`_measured`."""
    n = int(x.size)
    mean = float(np.mean(x)) if n else None
    sd = float(np.std(x, ddof=1)) if n >= 2 else None
    base = Capability(n=n, mean=mean, sd=sd, low=low, high=high)
    if low is None and high is None:
        return _replace_why(base, "no limits")
    if n < 2 or mean is None or sd is None:
        return _replace_why(base, "fewer than 2 values")
    # all values equal: the rounding of the mean could leave a tiny sd and a huge Cpk
    if float(np.max(x)) == float(np.min(x)) or not sd > 0.0:
        return _replace_why(base, "no spread")
    cpl = (mean - low) / (3.0 * sd) if low is not None else None
    cpu = (high - mean) / (3.0 * sd) if high is not None else None
    cp = (high - low) / (6.0 * sd) if low is not None and high is not None else None
    cpk = min(v for v in (cpl, cpu) if v is not None)
    return Capability(n=n, mean=mean, sd=sd, low=low, high=high, cp=cp, cpl=cpl, cpu=cpu, cpk=cpk)


def _replace_why(capability: Capability, why: str) -> Capability:
    return Capability(
        n=capability.n, mean=capability.mean, sd=capability.sd,
        low=capability.low, high=capability.high, why=why,
    )


def capability(values: Values, low: float | None, high: float | None) -> Capability:
    """Capability of the measured values against the window [low, high] (either side may be open).

    >>> c = capability([9.0, 10.0, 11.0], 7.0, None)
    >>> (c.cp, c.cpl, c.cpu, c.cpk)
    (None, 1.0, None, 1.0)
    >>> capability([5.0, 5.0, 5.0], 0.0, 10.0).why
    'no spread'
    """
    return _capability(_measured(values), low, high)


# -- robust screens -------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class RobustLimits:
    """A robust outlier screen for one metric, worked out from the lot's passing cells.

    When ``applied``, ``low``/``high`` are ``median ∓ k·robust_sd`` on the screened sides,
    clipped into the spec window so the screen can only tighten it; a side not screened
    keeps the spec's bound (None = open). When not applied, ``low``/``high`` are the spec's
    own bounds, nothing is flagged and ``why`` says why. ``median``/``robust_sd`` are None
    when there was no passing value at all.
    """

    metric: str
    k: float
    min_cells: int
    sides: str
    n: int
    median: float | None
    robust_sd: float | None
    low: float | None
    high: float | None
    applied: bool
    why: str = ""


def _check_screen(k: float, min_cells: int, sides: str) -> None:
    """Refuse a screen no rule loader should have let through (a programming error)."""
    if not (math.isfinite(k) and k > 0):
        raise ValueError(f"k must be a positive number, not {k!r}")
    if min_cells < 1:
        raise ValueError(f"min_cells must be at least 1, not {min_cells!r}")
    if sides not in SIDES:
        raise ValueError(f"sides must be one of {', '.join(SIDES)}, not {sides!r}")


def _cells(n: int) -> str:
    return "1 passing cell" if n == 1 else f"{n} passing cells"


def _robust_limits(
    metric: str, x: FloatArray, k: float, min_cells: int,
    spec_low: float | None, spec_high: float | None, sides: str,
) -> RobustLimits:
    """:func:`robust_limits` of values already cleaned by :func:`_measured`."""
    _check_screen(k, min_cells, sides)
    n = int(x.size)
    median = float(np.median(x)) if n else None
    scale = NORMAL_MAD_SCALE * float(np.median(np.abs(x - median))) if median is not None else None

    def not_applied(why: str) -> RobustLimits:
        return RobustLimits(metric, k, min_cells, sides, n, median, scale, spec_low, spec_high, False, why)

    if n < min_cells:
        return not_applied(f"lot has {_cells(n)}, the screen needs {min_cells}")
    if median is None or scale is None or scale == 0.0:
        # a screen of zero width would flag every value that differs from the median
        return not_applied("no spread among passing cells")
    low, high = spec_low, spec_high
    if sides in ("both", "low"):
        low = median - k * scale if spec_low is None else max(spec_low, median - k * scale)
    if sides in ("both", "high"):
        high = median + k * scale if spec_high is None else min(spec_high, median + k * scale)
    return RobustLimits(metric, k, min_cells, sides, n, median, scale, low, high, True)


def robust_limits(
    metric: str,
    passing_values: Values,
    *,
    k: float,
    min_cells: int,
    spec_low: float | None,
    spec_high: float | None,
    sides: Sides = "both",
) -> RobustLimits:
    """Robust limits ``median ± k·1.4826·MAD`` of the passing cells, never wider than the spec.

    Why the median and MAD: the mean and standard deviation of a lot are pulled towards the
    very cells the screen is looking for, so one bad cell could hide itself; half the lot
    would have to be off to move the median. Why only passing cells: failed cells are
    already out and would widen the limits. ``sides`` screens only one side ("low" for a
    screen that only catches low capacity, say). Raises ValueError for k <= 0, min_cells
    < 1 or unknown sides (the rule loader refuses those first).

    >>> r = robust_limits("cap", [1.0, 2.0, 3.0], k=2, min_cells=3, spec_low=0.0, spec_high=3.5)
    >>> (r.applied, r.median, round(r.robust_sd, 4), round(r.low, 4), r.high)
    (True, 2.0, 1.4826, 0.0, 3.5)
    >>> robust_limits("cap", [1.0, 2.0], k=2, min_cells=30, spec_low=None, spec_high=None).why
    'lot has 2 passing cells, the screen needs 30'
    """
    return _robust_limits(metric, _measured(passing_values), k, min_cells, spec_low, spec_high, sides)


@dataclass(frozen=True, slots=True)
class Outlier:
    """A cell whose value lies outside a robust screen's limits, on side "low" or "high"."""

    cell_id: str
    metric: str
    value: float
    low: float | None
    high: float | None
    side: str


def _flag(cell_ids: Sequence[str], x: FloatArray, limits: RobustLimits) -> tuple[Outlier, ...]:
    """The cells of ``x`` (NaN = not measured) outside ``limits``, furthest beyond first.

    Ties are ordered by cell id, so the result does not depend on the order of the cells.
    """
    if not limits.applied:
        return ()
    found: list[tuple[float, str, Outlier]] = []
    with np.errstate(invalid="ignore"):  # NaN compares False: never an outlier
        for bound, side, below in ((limits.low, "low", True), (limits.high, "high", False)):
            if bound is None:
                continue
            beyond = x < bound if below else x > bound
            for i in np.flatnonzero(beyond).tolist():
                value = float(x[i])
                outlier = Outlier(cell_ids[i], limits.metric, value, limits.low, limits.high, side)
                found.append((abs(value - bound), cell_ids[i], outlier))
    found.sort(key=lambda item: (-item[0], item[1]))
    return tuple(item[2] for item in found)


def outliers(values_by_cell: Mapping[str, float | None], limits: RobustLimits) -> tuple[Outlier, ...]:
    """The cells outside the screen's limits, furthest beyond the limit first.

    Nothing is flagged when the screen was not applied. A value not measured (None, NaN)
    is never an outlier: a missing value is the rule engine's business (it holds the cell).

    >>> r = robust_limits("cap", [1.0, 2.0, 3.0], k=0.5, min_cells=3, spec_low=None, spec_high=None)
    >>> [(o.cell_id, o.side) for o in outliers({"a": 1.0, "b": 2.0, "c": 3.5, "d": None}, r)]
    [('c', 'high'), ('a', 'low')]
    """
    ids = list(values_by_cell)
    x = np.array([values_by_cell[i] for i in ids], dtype=np.float64)
    x[~np.isfinite(x)] = np.nan
    return _flag(ids, x, limits)


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
        _check_screen(screen.k, screen.min_cells, screen.sides)

    metrics = _metric_names(cells, checks, screens, grades)
    columns = _columns(cells, metrics)
    ids = [cell.cell_id for cell in cells]
    verdicts = [v.value if isinstance(v, VerdictKind) else v for v in (cell.verdict for cell in cells)]
    passing = np.fromiter((v == VerdictKind.PASS.value for v in verdicts), dtype=bool, count=len(verdicts))
    passing_ids = [i for i, p in zip(ids, passing.tolist(), strict=True) if p]

    distributions = {m: _distribution(x[np.isfinite(x)]) for m, x in columns.items()}
    capabilities = {}
    for check in checks:
        x = columns[check.metric]
        capabilities[check.key] = _capability(x[np.isfinite(x)], check.low, check.high)

    limits: list[RobustLimits] = []
    flagged: list[Outlier] = []
    for screen in screens:
        x = columns[screen.metric][passing]
        spec_low, spec_high = _spec_window(screen.metric, checks)
        found = _robust_limits(
            screen.metric, x[np.isfinite(x)], screen.k, screen.min_cells, spec_low, spec_high, screen.sides
        )
        limits.append(found)
        flagged.extend(_flag(passing_ids, x, found))

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
    "NORMAL_MAD_SCALE",
    "PERCENTILES",
    "Capability",
    "CellRow",
    "Distribution",
    "GradeClass",
    "LotStatistics",
    "Outlier",
    "RobustLimits",
    "ScreenSpec",
    "Tally",
    "WindowSpec",
    "capability",
    "check_grade_classes",
    "distribution",
    "grade_of",
    "lot_statistics",
    "outliers",
    "robust_limits",
    "tally",
]
