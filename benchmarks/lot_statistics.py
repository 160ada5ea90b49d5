"""How fast the lot statistics are: one call of ``lot_statistics`` on invented lots of several sizes.

Each lot has 15 metrics (about 1 % of values not measured), 20 window checks (15 reject
windows and 5 review windows inside them), 5 robust screens and 4 grade classes, all
invented here from a seeded random generator; about 95 % of the cells pass. Each size is
timed several times with ``time.perf_counter`` and the best call is shown, with the time
per 1,000 cells and its ratio to the first row (near 1 when the cost grows linearly with
the lot). Building the lot is not timed.

    .venv/bin/python benchmarks/lot_statistics.py                      # 1,000 / 10,000 / 100,000 cells
    .venv/bin/python benchmarks/lot_statistics.py --cells 10000 --repeats 9
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Sequence

import numpy as np

from pipeline.judge.lotstats import CellRow, GradeClass, ScreenSpec, WindowSpec, lot_statistics

METRICS = 15
SIZES = (1_000, 10_000, 100_000)


def metric_names() -> list[str]:
    return [f"metric_{i:02d}" for i in range(METRICS)]


def specs() -> tuple[list[WindowSpec], list[ScreenSpec], list[GradeClass]]:
    """20 checks, 5 screens and 4 grade classes on metrics of mean 10·(i+1) and sd i+1."""
    names = metric_names()
    checks = [
        WindowSpec(name, 5.5 * (i + 1), 14.5 * (i + 1), "reject", f"{name}_window")  # mean ± 4.5 sd
        for i, name in enumerate(names)
    ]
    checks += [
        WindowSpec(name, 6.5 * (i + 1), 13.5 * (i + 1), "review", f"{name}_review")  # mean ± 3.5 sd
        for i, name in enumerate(names[:5])
    ]
    screens = [
        ScreenSpec(names[0], 6.0, 30),
        ScreenSpec(names[1], 6.0, 30, "low"),
        ScreenSpec(names[2], 5.0, 30, "high"),
        ScreenSpec(names[3], 6.0, 100),
        ScreenSpec(names[4], 4.0, 30),
    ]
    grades = [
        GradeClass("A", {names[0]: (10.0, 11.0), names[1]: (None, 21.0)}),
        GradeClass("B", {names[0]: (9.0, 11.0)}),
        GradeClass("C", {names[0]: (8.0, 12.0)}),
        GradeClass("D", {}),
    ]
    return checks, screens, grades


def make_lot(cells: int, seed: int = 7) -> list[CellRow]:
    """An invented lot: normal values, 1 % not measured, verdicts about 95 % pass."""
    rng = np.random.default_rng(seed)
    names = metric_names()
    scale = np.arange(1, METRICS + 1, dtype=np.float64)
    values = rng.normal(10.0 * scale, scale, size=(cells, METRICS))
    missing = rng.random((cells, METRICS)) < 0.01
    verdicts = rng.choice(["pass", "fail", "hold", "error"], size=cells, p=[0.95, 0.03, 0.015, 0.005])
    rows = []
    for i in range(cells):
        pairs = zip(values[i].tolist(), missing[i].tolist(), strict=True)
        row = [None if gone else value for value, gone in pairs]
        rows.append(CellRow(f"CELL-{i:06d}", str(verdicts[i]), dict(zip(names, row, strict=True))))
    return rows


def best_of(repeats: int, cells: Sequence[CellRow]) -> float:
    """The shortest of ``repeats`` calls of lot_statistics, in seconds (after one untimed call)."""
    checks, screens, grades = specs()
    lot_statistics(cells, checks, screens, grades)
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        lot_statistics(cells, checks, screens, grades)
        best = min(best, time.perf_counter() - start)
    return best


def table(sizes: Sequence[int], repeats: int, seed: int) -> list[str]:
    """The printed table: one row per lot size."""
    lines = [
        f"{'cells':>9} {'ms per call':>12} {'ms per 1,000 cells':>19} {'÷ first row':>12}",
        "-" * 55,
    ]
    first: float | None = None
    for size in sizes:
        seconds = best_of(repeats, make_lot(size, seed))
        per_thousand = 1000.0 * seconds / size * 1000.0
        first = per_thousand if first is None else first
        ratio = per_thousand / first
        lines.append(f"{size:>9,} {1000.0 * seconds:>12.2f} {per_thousand:>19.3f} {ratio:>12.2f}")
    return lines


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--cells", type=int, nargs="+", default=list(SIZES), help="lot sizes to time")
    parser.add_argument("--repeats", type=int, default=5, help="timed calls per size (the best is shown)")
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args(argv)
    if any(n < 1 for n in args.cells) or args.repeats < 1:
        parser.error("--cells and --repeats must be at least 1")
    checks, screens, grades = specs()
    print(
        f"lot_statistics: {METRICS} metrics, {len(checks)} window checks, {len(screens)} screens, "
        f"{len(grades)} grade classes; best of {args.repeats}"
    )
    for line in table(args.cells, args.repeats, args.seed):
        print(line)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
