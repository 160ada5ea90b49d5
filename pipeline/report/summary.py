"""A plain-text table of a lot's judged cells and its yield, for the terminal and summary.txt.

Pure: results in, text out. Lot statistics with outlier screening belong to a later
module; this one only lists what was decided.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence

from pipeline.judge.evaluate import decision_line
from pipeline.model import CellResult, VerdictKind

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
    if value is None:
        return "—"
    if metric == "first_cycle_efficiency":
        return f"{value * 100:.1f}"
    if metric in ("grading_capacity_Ah", "main_plateau_voltage_V"):
        return f"{value:.3f}"
    if metric == "rest_voltage_drift_mV_per_h":
        return f"{value:+.2f}"
    return f"{value:.1f}"


def summary_table(results: Sequence[CellResult], errors: Sequence[tuple[str, str]] = ()) -> str:
    """One row per cell (sorted by lot and cell id), then failed/held reasons, errors and yield.

    ``errors`` are (file name, one-line reason) pairs for inputs that could not be judged.
    """
    header = "  ".join(f"{title:<{width}}" for title, width, _ in COLUMNS)
    lines = [header, "-" * len(header)]
    ordered = sorted(results, key=lambda r: (r.lot, r.cell_id))
    for r in ordered:
        cells = [f"{r.cell_id:<14}", f"{r.verdict.kind.value:<7}"]
        for _, width, metric in COLUMNS[2:]:
            assert metric is not None
            cells.append(f"{_fmt(metric, r.metrics.values.get(metric)):>{width}}")
        lines.append("  ".join(cells))
    lines.append("")
    # fails first, then holds: what a quality engineer acts on
    decided = [r for r in ordered if r.verdict.kind is VerdictKind.FAIL] + [
        r for r in ordered if r.verdict.kind is VerdictKind.HOLD
    ]
    for r in decided:
        hazards = ", ".join(h.value for h in r.verdict.hazards)
        extra = f" [hazard: {hazards}]" if hazards else ""
        lines.append(
            f"{r.cell_id} ({r.verdict.kind.value}): {decision_line(r.verdict, r.notes)}{extra}"
        )
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
