"""The regrade change report: which cells a rule change moves, as a PDF and as a CSV.

Pure functions of a :class:`RegradeReportInput` (no ledger, no clock, no files): page 1
names the run (who, why, when, what was selected, whether it was applied) and every rule
set it judged with, with its SHA-256, then the counts by change (pass → fail, pass →
hold, fail → pass ...); then the changed cells, each with the checks behind the change
(value, old window and outcome, new window and outcome). Cells that a rule change would
turn into fails get the safety caution the certificates carry. The PDF goes through the
certificates' renderer and stylesheet, so it looks like the lot report.
"""

from __future__ import annotations

import csv
import datetime
import functools
import io
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Final

import jinja2

from pipeline.judge.quantities import DASH
from pipeline.report import hazards, pdf
from pipeline.report.certificate import TEMPLATES_DIR, format_time
from pipeline.report.lotreport import guard_formula

TEMPLATE_NAME: Final = "regrade.html.j2"
MAX_CELL_ROWS: Final = 400  # rows of the change table before "and N more: see the CSV"
OUTCOME_WORDS: Final = {"in_window": "in", "out_of_window": "out", "not_judged": "not judged",
                        "skipped": "skipped", "absent": "not checked"}


@dataclass(frozen=True, slots=True)
class CheckLine:
    file_name: str
    rule_id: str
    metric: str
    old_value: float | None
    new_value: float | None
    old_window: tuple[float | None, float | None]
    new_window: tuple[float | None, float | None]
    old_outcome: str
    new_outcome: str


@dataclass(frozen=True, slots=True)
class ChangedCell:
    lot: str
    cell_id: str
    old_verdict: str
    new_verdict: str
    old_reason: str
    new_reason: str
    new_hazards: tuple[str, ...]
    old_grade: str | None
    new_grade: str | None
    reviewed: bool  # left for a person's new review, not applied
    checks: tuple[CheckLine, ...]

    @property
    def change(self) -> str:
        return f"{self.old_verdict} \N{RIGHTWARDS ARROW} {self.new_verdict}"


@dataclass(frozen=True, slots=True)
class RegradeReportInput:
    station: str
    run_by: str
    reason: str
    selection: str
    started_at: datetime.datetime
    applied: bool
    regrade_id: int | None
    rule_sets: tuple[tuple[str, str, str], ...]  # (name, revision, SHA-256)
    rules_digest: str
    inputs: int  # inputs judged again
    cells: int  # cells decided again
    changed: tuple[ChangedCell, ...]
    refused: tuple[tuple[str, str, str], ...] = ()  # (lot, file name, why)
    family: str | None = None


def _window(low: float | None, high: float | None) -> str:
    if low is None and high is None:
        return DASH
    return f"[{DASH if low is None else f'{low:g}'}, {DASH if high is None else f'{high:g}'}]"


def _value(value: float | None) -> str:
    return DASH if value is None else f"{value:.6g}"


def counts(changed: Sequence[ChangedCell]) -> list[tuple[str, int]]:
    """(change, cells) for each kind of change, applied ones first, most cells first."""
    tally: dict[str, int] = {}
    for c in changed:
        key = c.change + (" (left for a new review)" if c.reviewed else "")
        tally[key] = tally.get(key, 0) + 1
    return sorted(tally.items(), key=lambda kv: ("review" in kv[0], -kv[1], kv[0]))


def report_context(data: RegradeReportInput) -> dict[str, object]:
    failing = [c for c in data.changed if c.new_verdict == "fail" and c.old_verdict != "fail"]
    rows = []
    for c in data.changed[:MAX_CELL_ROWS]:
        rows.append({
            "lot": c.lot, "cell": c.cell_id, "change": c.change, "reviewed": c.reviewed,
            "verdict": c.new_verdict, "reason": c.new_reason or c.old_reason or DASH,
            "grade": f"{c.old_grade or DASH} \N{RIGHTWARDS ARROW} {c.new_grade or DASH}"
            if c.old_grade != c.new_grade else "",
            "checks": [{
                "name": f"{k.rule_id} ({k.metric})", "file": k.file_name,
                "value": _value(k.new_value if k.new_value is not None else k.old_value),
                "old": f"{_window(*k.old_window)} {OUTCOME_WORDS.get(k.old_outcome, k.old_outcome)}",
                "new": f"{_window(*k.new_window)} {OUTCOME_WORDS.get(k.new_outcome, k.new_outcome)}",
            } for k in c.checks],
        })
    caution = None
    if failing:
        caution = {
            "title": f"Caution: {len(failing)} cell{'s' if len(failing) != 1 else ''} would fail "
                     "under the new rules and may be hazardous",
            "handling": hazards.HANDLING,
            "general": hazards.general_caution(data.family),
        }
    identity = [
        ("Station", data.station),
        ("Run by", data.run_by),
        ("Why", data.reason),
        ("Started", format_time(data.started_at)),
        ("Selected", data.selection),
        ("Inputs judged again", str(data.inputs)),
        ("Cells decided again", str(data.cells)),
        ("Applied", f"yes, regrade {data.regrade_id}" if data.applied else
                    "no: a dry run; nothing was recorded"),
    ]
    return {
        "title": "Regrade report",
        "created": format_time(data.started_at),
        "identity": identity,
        "rule_sets": [{"name": n, "revision": r, "sha": s} for n, r, s in data.rule_sets],
        "rules_digest": data.rules_digest,
        "counts": counts(data.changed),
        "changed_total": len(data.changed),
        "rows": rows,
        "more": max(0, len(data.changed) - MAX_CELL_ROWS),
        "refused": [{"lot": lot, "file": f, "why": w} for lot, f, w in data.refused],
        "caution": caution,
        "data_check_notice": hazards.DATA_CHECK_NOTICE.replace("This certificate", "This report"),
    }


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES_DIR)), autoescape=True,
        undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
    )


def render_regrade_html(data: RegradeReportInput) -> str:
    return _environment().get_template(TEMPLATE_NAME).render(**report_context(data))


def render_regrade_pdf(data: RegradeReportInput) -> bytes:
    """The change report as PDF bytes (the certificates' renderer: same input, same bytes)."""
    return pdf.render_pdf(render_regrade_html(data))


def regrade_csv(data: RegradeReportInput) -> bytes:
    """One row per changed check of each changed cell (a cell without one gets one row).

    Columns: lot, cell_id, change, applied (yes / no: dry run / left for a new review),
    old_verdict, new_verdict, new_reason, old_grade, new_grade, file, check, metric,
    old_value, new_value, old_low, old_high, new_low, new_high, old_outcome, new_outcome.
    Text from data goes through :func:`guard_formula`.
    """
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(["lot", "cell_id", "change", "applied", "old_verdict", "new_verdict",
                     "new_reason", "old_grade", "new_grade", "file", "check", "metric",
                     "old_value", "new_value", "old_low", "old_high", "new_low", "new_high",
                     "old_outcome", "new_outcome"])

    def num(v: float | None) -> str:
        return "" if v is None else repr(float(v))

    for c in data.changed:
        applied = "left for a new review" if c.reviewed else ("yes" if data.applied else "no: dry run")
        head = [guard_formula(c.lot), guard_formula(c.cell_id), c.change, applied, c.old_verdict,
                c.new_verdict, guard_formula(c.new_reason), guard_formula(c.old_grade or ""),
                guard_formula(c.new_grade or "")]
        if not c.checks:
            writer.writerow([*head, *[""] * 11])
        for k in c.checks:
            writer.writerow([*head, guard_formula(k.file_name), guard_formula(k.rule_id), k.metric,
                             num(k.old_value), num(k.new_value), num(k.old_window[0]),
                             num(k.old_window[1]), num(k.new_window[0]), num(k.new_window[1]),
                             k.old_outcome, k.new_outcome])
    return out.getvalue().encode("utf-8")
