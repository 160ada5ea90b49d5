"""A plain-text table of a lot's judged cells and its yield, for the terminal and summary.txt.

Pure: results in, text out. Each row ends with the cell's reason in one line, as `formgate
check` prints it (:func:`reason_line`). Lot statistics with outlier screening belong to
a later module; this one only lists what was decided.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence

from pipeline.acceptance.results import CellResult
from pipeline.judge.evaluate import decision_line
from pipeline.judge.quantities import DASH, metric_format

COLUMNS = (
    ("cell", 14, None),
    ("verdict", 7, None),
    ("capacity Ah", 11, "grading_capacity_Ah"),
    ("ICE %", 6, "first_cycle_efficiency"),
    ("DCIR mΩ", 8, "dcir_mOhm"),
    ("drift mV/h", 10, "rest_voltage_drift_mV_per_h"),
    ("Tmax °C", 7, "max_temperature_C"),
    ("plateau V", 9, "main_plateau_voltage_V"),
    ("plateau %", 9, "main_plateau_length_pct"),
)


def _fmt(metric: str, value: float | None) -> str:
    """The number as the certificate writes it (the column's title names the unit)."""
    if value is None or not math.isfinite(value):
        return DASH
    return metric_format(metric)[0](value)


def reason_line(result: CellResult) -> str:
    """Why a cell got its verdict, in one line: the deciding findings, hazards in brackets.

    The same words in `formgate check`'s line and the summary table's reason column.
    """
    text = decision_line(result.verdict, result.notes)
    if result.verdict.hazards:
        text += " [hazard: " + ", ".join(h.value for h in result.verdict.hazards) + "]"
    return text


def summary_table(results: Sequence[CellResult], errors: Sequence[tuple[str, str]] = ()) -> str:
    """One row per cell (sorted by lot and cell id) ending with its reason, then errors and yield.

    ``errors`` are (file name, one-line reason) pairs for inputs that could not be judged.
    """
    header = "  ".join(f"{title:<{width}}" for title, width, _ in COLUMNS) + "  reason"
    lines = [header, "-" * len(header)]
    ordered = sorted(results, key=lambda r: (r.lot, r.cell_id))
    for r in ordered:
        cells = [f"{r.cell_id:<14}", f"{r.verdict.kind.value:<7}"]
        for _, width, metric in COLUMNS[2:]:
            assert metric is not None
            cells.append(f"{_fmt(metric, r.metrics.values.get(metric)):>{width}}")
        # a fail or hold says why on its own row, as formgate check's line does
        cells.append(reason_line(r))
        lines.append("  ".join(cells))
    if errors:
        lines.append("")
    for name, reason in errors:
        lines.append(f"{name} (error): {reason}")
    counts = Counter(r.verdict.kind.value for r in results)
    judged = len(results)
    total = judged + len(errors)
    yield_pct = 100.0 * counts["pass"] / total if total else 0.0
    lines.append("")
    lines.append(
        f"{total} file(s): {counts['pass']} pass, {counts['fail']} fail, {counts['hold']} hold, "
        f"{len(errors)} error; first-pass yield {yield_pct:.1f} %"
    )
    return "\n".join(lines) + "\n"
