"""The lot report: a PDF per lot for quality staff, and a one-row-per-cell CSV for plant systems.

Both are pure functions of a :class:`LotReportInput`: no ledger, no clock, no files (the
only times shown are the ones the input carries). The statistics come from
:func:`pipeline.judge.lotstats.lot_statistics`, worked out once per report. The PDF goes
through the same renderer as the certificates (pdf.py), so it gets the same shipped font,
the same refusal of any URL outside templates/ and the same byte-for-byte repeatability.

This module holds the report's input, the page's context (identity, counts, caution,
failed cells, screens, grades), the two renderings and the export. The histograms are left
to :mod:`pipeline.report.lothistogram`, the wording of numbers, windows, yield and Cpk to
:mod:`pipeline.report.lotwords`.

Every identifier from data (lot, cell ids, reasons, metric names) reaches the page through
Jinja2's autoescaping; the histograms are SVG built from numbers, with every text in them
escaped before it is marked safe.

A lot can hold 10,000 cells: the tables of failed cells and of outliers are capped
(:data:`MAX_FAILED_ROWS`, :data:`MAX_OUTLIER_ROWS`) and say how many more the export holds,
so the PDF stays a few pages long whatever the lot's size.
"""

from __future__ import annotations

import csv
import datetime
import functools
import io
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Final

import jinja2
from markupsafe import Markup

from pipeline.acceptance.rules import Hazard, Window
from pipeline.judge.channels import ChannelRecord, ChannelScreen
from pipeline.judge.lotscreens import Outlier, RobustLimits
from pipeline.judge.lotstats import (
    CellRow,
    GradeClass,
    LotStatistics,
    ScreenSpec,
    WindowSpec,
    lot_statistics,
)
from pipeline.judge.quantities import DASH, format_spread, format_value, precision
from pipeline.model import frozen_mapping
from pipeline.report import hazards, pdf
from pipeline.report.certificate import HAZARD_WORDS, TEMPLATES_DIR, format_time
from pipeline.report.exportvalues import U_SUFFIX, round_to_resolution, round_uncertainty
from pipeline.report.lotcharts import (
    by_channel_rows,
    failures_by_channel_svg,
    failures_by_hour_svg,
    lot_control_charts,
    scatter_svg,
)
from pipeline.report.lothistogram import metric_histograms
from pipeline.report.lotwords import CPK_MINIMUM, capability_row, yield_text

TEMPLATE_NAME: Final = "lot.html.j2"
DEFAULT_SCREEN: Final = ChannelScreen()
MAX_FAILED_ROWS: Final = 200  # rows of the failed/held table before "and N more: see the export"
MAX_OUTLIER_ROWS: Final = 50  # outlier rows per screen, likewise
OPEN_LOT_WORDS: Final = "lot open: figures may change"
# Verdicts that keep a cell from release, in the order the report lists them.
ATTENTION: Final = ("fail", "hold", "error")
VERDICT_LABELS: Final = {"fail": "Failed", "hold": "Held for review", "error": "Not judged (error)",
                         "pass": "Passed"}
# A CSV field starting with one of these can be run as a formula by a spreadsheet
# (OWASP, "CSV Injection"): such a field from data is written with a leading single quote.
FORMULA_STARTS: Final = ("=", "+", "-", "@", "\t", "\r")


# -- the input ------------------------------------------------------------------------------


def _aware(moment: datetime.datetime, what: str) -> None:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError(f"{what} must carry a time zone, not {moment.isoformat()}")


@dataclass(frozen=True, slots=True)
class LotCell:
    """One cell of the lot as the ledger holds it.

    ``verdict`` is pass, fail, hold or error; ``reason`` the deciding line of a fail or a
    hold ("" for a pass); ``hazards`` the hazards of its failed checks (values of
    :class:`pipeline.acceptance.rules.Hazard`); ``records`` the files its decision rests on, as
    (stage or file kind, file name, SHA-256); ``decided_at`` when it was decided (aware);
    ``cell_type`` its type; ``places`` the (channel, station) of each cycle-file record, as
    the files' metadata name them ("" where a file names none).
    """

    cell_id: str
    verdict: str
    reason: str
    grade: str | None
    hazards: tuple[str, ...]
    values: Mapping[str, float | None]
    records: tuple[tuple[str, str, str], ...]
    decided_at: datetime.datetime
    cell_type: str = ""
    places: tuple[tuple[str, str], ...] = ()
    uncertainty: Mapping[str, float] = field(default_factory=dict)  # U (k = 2) by metric

    def __post_init__(self) -> None:
        object.__setattr__(self, "values", frozen_mapping(dict(self.values)))
        object.__setattr__(self, "uncertainty", frozen_mapping(dict(self.uncertainty)))
        _aware(self.decided_at, f"cell {self.cell_id}: decided_at")


@dataclass(frozen=True, slots=True)
class RuleSetRef:
    """The rule set a lot was judged by: name, revision, SHA-256 of its file, family."""

    name: str
    revision: str
    sha256: str
    family: str | None = None


@dataclass(frozen=True, slots=True)
class LotReportInput:
    """Everything a lot report shows. ``closed_at`` None means the lot is still open.

    ``units``: metric -> unit text as printed ("" or missing for a plain number), for
    example from :data:`pipeline.judge.metricdefs.BY_NAME`.
    """

    lot: str
    cell_types: tuple[str, ...]
    rule_set: RuleSetRef
    station: str
    generated_at: datetime.datetime
    closed_at: datetime.datetime | None
    cells: tuple[LotCell, ...]
    checks: tuple[WindowSpec, ...]
    screens: tuple[ScreenSpec, ...]
    grades: tuple[GradeClass, ...]
    units: Mapping[str, str]
    # the statistics as the lot was closed (screens evaluated on the cells passing before
    # them); None: worked out here from the cells as they stand
    statistics: LotStatistics | None = None
    # every judged record of the lot with its channel and start: the by-channel page and the
    # lot over time (none: neither is shown); the suspect-channel screen they are judged by
    records: tuple[ChannelRecord, ...] = ()
    channel_screen: ChannelScreen = DEFAULT_SCREEN

    def __post_init__(self) -> None:
        object.__setattr__(self, "units", frozen_mapping(dict(self.units)))
        _aware(self.generated_at, "generated_at")
        if self.closed_at is not None:
            _aware(self.closed_at, "closed_at")


# -- the report's context ----------------------------------------------------------------------


def _rows(cells: Sequence[LotCell]) -> list[CellRow]:
    return [CellRow(c.cell_id, c.verdict, c.values) for c in cells]


def _hazard_title(name: str) -> str:
    try:
        return hazards.CAUTIONS[Hazard(name)].title
    except ValueError:
        return name.replace("_", " ")


def _hazard_words(names: Iterable[str]) -> str:
    words = []
    for name in names:
        try:
            words.append(HAZARD_WORDS[Hazard(name)])
        except ValueError:
            words.append(name.replace("_", " "))
    return ", ".join(words)


def _caution(data: LotReportInput) -> dict[str, object] | None:
    """The caution box: for a lot with a failed cell, or a held one whose record shows a hazard."""
    failed = [c for c in data.cells if c.verdict == "fail"]
    hazardous = [c for c in data.cells if c.verdict != "pass" and c.hazards]
    if not failed and not hazardous:
        return None
    counts = Counter(h for c in data.cells if c.verdict != "pass" for h in dict.fromkeys(c.hazards))
    order = [h.value for h in Hazard] + sorted(set(counts) - {h.value for h in Hazard})
    items = []
    for name in order:
        if counts.get(name):
            known = Hazard(name) if name in {h.value for h in Hazard} else None
            items.append({
                "title": _hazard_title(name),
                "cells": f"{counts[name]} cell{'s' if counts[name] != 1 else ''}",
                "text": hazards.CAUTIONS[known].text if known else "",
            })
    title = (
        f"Caution: {len(failed)} cell{'s' if len(failed) != 1 else ''} of this lot failed "
        "and may be hazardous" if failed else "Caution: held cells of this lot show a hazard"
    )
    return {
        "title": title,
        "items": items,
        "handling": hazards.HANDLING if items else "",
        "general": hazards.general_caution(data.rule_set.family),
    }


def _attention(cells: Sequence[LotCell]) -> tuple[list[dict[str, str]], int]:
    """The failed, held and unjudged cells, fails first then by cell id, then the cells a person
    released (a pass with a reason: who and why), capped; and how many more."""
    rank = {v: i for i, v in enumerate(ATTENTION)}
    chosen = sorted((c for c in cells if c.verdict != "pass" or c.reason),
                    key=lambda c: (rank.get(c.verdict, len(rank)), c.cell_id))
    rows = [
        {"cell_id": c.cell_id, "verdict": "RELEASED" if c.verdict == "pass" else c.verdict.upper(),
         "kind": c.verdict, "reason": c.reason or DASH, "hazards": _hazard_words(c.hazards)}
        for c in chosen[:MAX_FAILED_ROWS]
    ]
    return rows, max(0, len(chosen) - MAX_FAILED_ROWS)


def _outlier_row(o: Outlier) -> dict[str, str]:
    # the value and the lot limit it crossed, as the cell's hold reason writes them
    extra = precision(o.metric, o.value, Window(o.low, o.high))
    return {"cell_id": o.cell_id, "value": format_value(o.metric, o.value, extra), "side": o.side,
            "limit": format_value(o.metric, o.low if o.side == "low" else o.high, extra)}


def _screen(limits: RobustLimits, found: Sequence[Outlier]) -> dict[str, object]:
    sides = {"both": "both sides", "low": "low side", "high": "high side"}[limits.sides]
    rows = [_outlier_row(o) for o in found[:MAX_OUTLIER_ROWS]]
    metric = limits.metric  # its values written as the certificates write them
    return {
        "metric": metric,
        "k": f"{limits.k:g}",
        "sides": sides,
        "n": str(limits.n),
        "median": format_value(metric, limits.median),
        "robust_sd": format_spread(metric, limits.robust_sd),
        "low": format_value(metric, limits.low) if limits.low is not None else "open",
        "high": format_value(metric, limits.high) if limits.high is not None else "open",
        "applied": "applied" if limits.applied else f"not applied: {limits.why}",
        "outliers": rows,
        "found": len(found),
        "more": max(0, len(found) - MAX_OUTLIER_ROWS),
    }


def _grades(data: LotReportInput, stats: LotStatistics) -> dict[str, object]:
    passed = stats.tally.passed
    rows = [(name, str(count)) for name, count in stats.grade_counts.items()]
    differ = sum(
        1 for c in data.cells if c.verdict == "pass" and c.grade != stats.grades.get(c.cell_id)
    ) if data.grades else 0
    return {
        "rows": rows,
        "ungraded": str(stats.ungraded),
        "passed": str(passed),
        "differ": differ,
    }


def lot_report_context(data: LotReportInput) -> dict[str, object]:
    """Everything the lot template shows, formatted as strings (statistics worked out once)."""
    stats = data.statistics or lot_statistics(
        _rows(data.cells), data.checks, data.screens, data.grades
    )
    t = stats.tally
    failed_rows, failed_more = _attention(data.cells)
    by_metric: dict[str, list[Outlier]] = {}
    for o in stats.outliers:
        by_metric.setdefault(o.metric, []).append(o)
    rs = data.rule_set
    histograms = metric_histograms(data.checks, [c.values for c in data.cells], stats.limits, data.units)
    status = (f"closed at {format_time(data.closed_at)}" if data.closed_at is not None
              else OPEN_LOT_WORDS)
    return {
        "title": f"Lot report {data.lot}",
        "lot": data.lot,
        "created": format_time(data.generated_at),
        "open": data.closed_at is None,
        "open_words": OPEN_LOT_WORDS,
        "identity": [
            ("Lot", data.lot),
            ("Cell types", ", ".join(data.cell_types) or DASH),
            ("Rule set", f"{rs.name}, revision {rs.revision}"),
            ("Rule set SHA-256", rs.sha256),
            ("Family", rs.family or "not declared"),
            ("Station", data.station or DASH),
            ("Generated at", format_time(data.generated_at)),
            ("Status", status),
        ],
        "total": t.n,
        "passed": t.passed,
        "yield": yield_text(t.passed, t.n),
        "verdicts": [
            (VERDICT_LABELS.get(v, v), str(count),
             f"{100.0 * count / t.n:.1f} %" if t.n else DASH)
            for v, count in t.by_verdict.items()
        ],
        "grades": _grades(data, stats),
        "has_grades": bool(data.grades),
        "caution": _caution(data),
        "data_check_notice": hazards.DATA_CHECK_NOTICE.replace("This certificate", "This report"),
        "failed": failed_rows,
        "failed_more": failed_more,
        "screens": [_screen(limits, by_metric.get(limits.metric, ())) for limits in stats.limits],
        "capabilities": [capability_row(c, stats.capabilities[c.key]) for c in data.checks],
        "cpk_minimum": f"{CPK_MINIMUM:.2f}",
        # a metric no cell has a value of gets a sentence, not an empty frame
        "histograms": [h for h in histograms if h["n"]],
        "no_values": ", ".join(str(h["metric"]) for h in histograms if not h["n"]),
        **over_time(data),
        "max_failed": MAX_FAILED_ROWS,
        "max_outliers": MAX_OUTLIER_ROWS,
    }


def over_time(data: LotReportInput) -> dict[str, object]:
    """The by-channel page and the lot over time: the table, the control charts of the key
    metrics, capacity against DCIR, failures by channel and by hour (SVG marked safe: numbers
    and text escaped in :mod:`pipeline.report.lotcharts`)."""
    if not data.records:
        return {"channels": [], "charts": [], "figures": []}
    charts = lot_control_charts(data.records, data.units)
    figures = [
        {"name": "_chart-capacity-dcir", "svg": scatter_svg(
            [(c.verdict, c.values.get("grading_capacity_Ah"), c.values.get("dcir_mOhm"))
             for c in data.cells]),
         "caption": "Grading capacity against DC resistance, one mark per cell: passed a dot, held "
                    "a square, failed a cross."},
        {"name": "_chart-by-channel", "svg": failures_by_channel_svg(data.records),
         "caption": "Records failed or held, by the channel that tested them."},
        {"name": "_chart-by-hour", "svg": failures_by_hour_svg(data.records),
         "caption": "Records failed or held, by the hour their program started."},
    ]
    spec = data.channel_screen
    return {
        "channels": by_channel_rows(data.records, spec),
        "channel_screen": (
            f"A channel is suspect when its last {spec.recent} records fail or are held far more "
            "often than the other channels' (exact binomial test), its last records fail one check "
            f"{spec.min_run} or more times in a row, or the median of a key metric over its passed "
            "cells stands off the other channels'; the three tests together flag a line with no bad "
            f"channel at most {100.0 * spec.false_alarm:g} % of the time. A channel with fewer than "
            f"{spec.min_records} records is not screened. Bias: the median of its passed cells' "
            "capacity and DCIR against the other channels', in standard errors."),
        "charts": [{**c, "svg": Markup(c["svg"])} for c in charts],
        "figures": [{**f, "svg": Markup(f["svg"])} for f in figures],
    }


def lot_figures(data: LotReportInput) -> list[tuple[str, str]]:
    """Every chart of the lot as (file stem, SVG text), to be written next to the report."""
    shown = over_time(data)
    return [(str(c["name"]), str(c["svg"])) for key in ("charts", "figures")
            for c in shown[key]]  # type: ignore[attr-defined]


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES_DIR)),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_lot_report_html(data: LotReportInput) -> str:
    """The lot report as HTML (well-formed XHTML, every value from data escaped)."""
    return _environment().get_template(TEMPLATE_NAME).render(**lot_report_context(data))


def render_lot_report_pdf(data: LotReportInput) -> bytes:
    """The lot report as PDF bytes: same input, same bytes (the certificates' renderer)."""
    return pdf.render_pdf(render_lot_report_html(data))


# -- the export --------------------------------------------------------------------------------


def guard_formula(field: str) -> str:
    """``field`` with a leading single quote when a spreadsheet could take it for a formula.

    OWASP's "CSV Injection" guidance: a cell starting with =, +, -, @ (or a tab or carriage
    return) can be run as a formula when the file is opened in a spreadsheet, so a text
    field from data that starts with one is written with a leading ' (the quote shows; a
    reader stripping it gets the original back). Numbers written by the export itself are
    never guarded: a negative value stays a number.

    >>> guard_formula("=1+1"), guard_formula("C-0001")
    ("'=1+1", 'C-0001')
    """
    return "'" + field if field.startswith(FORMULA_STARTS) else field


def export_metrics(data: LotReportInput) -> list[str]:
    """The metric columns: the checks' metrics in order, then every other metric sorted."""
    first = list(dict.fromkeys(c.metric for c in data.checks))
    rest = {m for c in data.cells for m in c.values} - set(first)
    return first + sorted(rest)


def _joined(parts: Iterable[str]) -> str:
    """Distinct non-empty parts in order, ";"-joined: one channel for a cell tested on one."""
    return ";".join(dict.fromkeys(p for p in parts if p))


EXPORT_FIRST: Final = ("lot", "cell_id", "cell_type", "stage", "channel", "station", "verdict",
                       "grade", "reason", "hazards")
EXPORT_LAST: Final = ("records", "decided_at")


def export_table(data: LotReportInput) -> tuple[list[str], list[list[str | float | None]]]:
    """The export's header and rows, one per cell sorted by cell id, before any file format.

    Text fields are as data gives them (not yet guarded against spreadsheets); a metric is
    a float rounded to its resolution (:mod:`pipeline.report.exportvalues`) or None when not
    measured. ``stage``: the stages its records cover, ";"-joined; ``channel`` and
    ``station``: the distinct ones its cycle-file records name, ";"-joined.
    """
    metrics = export_metrics(data)
    rows: list[list[str | float | None]] = []
    for cell in sorted(data.cells, key=lambda c: c.cell_id):
        records = ";".join(f"{stage}:{name}:{sha}" for stage, name, sha in cell.records)
        rows.append([
            data.lot,
            cell.cell_id,
            cell.cell_type,
            _joined(stage for stage, _, _ in cell.records),
            _joined(channel for channel, _ in cell.places),
            _joined(station for _, station in cell.places),
            cell.verdict,
            cell.grade or "",
            cell.reason,
            ";".join(cell.hazards),
            *(
                v
                for m in metrics
                for v in (
                    (round_to_resolution(m, cell.values.get(m)),)
                    + ((round_uncertainty(m, cell.uncertainty.get(m)),) if _has_u(m) else ())
                )
            ),
            records,
            cell.decided_at.isoformat(),
        ])
    columns = [name for m in metrics for name in ((m, f"{m}{U_SUFFIX}") if _has_u(m) else (m,))]
    return [*EXPORT_FIRST, *columns, *EXPORT_LAST], rows


def _has_u(metric: str) -> bool:
    """Whether the export gives a metric an uncertainty column: a count has none."""
    return not metric.endswith("_count")


def _csv_field(value: str | float | None, column: str) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)  # already rounded: reads back to the same float
    return value if column == "decided_at" else guard_formula(value)


def lot_export_csv(data: LotReportInput) -> bytes:
    """The lot as UTF-8 CSV: one header row, then one row per cell sorted by cell id.

    Columns (:func:`export_table`): lot, cell_id, cell_type, stage, channel, station,
    verdict, grade, reason, hazards (";"-joined), one per metric (:func:`export_metrics`),
    records ("stage:file:sha256", ";"-joined), decided_at (ISO 8601). A value not measured
    (None, NaN or infinite, as the lot statistics treat it) is an empty field, never 0;
    others are rounded to their metric's resolution and written as Python's repr, which
    reads back to the same float. Text fields from data go through :func:`guard_formula`.
    """
    header, rows = export_table(data)
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([_csv_field(v, c) for v, c in zip(row, header, strict=True)])
    return out.getvalue().encode("utf-8")


__all__ = [
    "LotCell",
    "LotReportInput",
    "RuleSetRef",
    "export_metrics",
    "export_table",
    "guard_formula",
    "lot_export_csv",
    "lot_figures",
    "lot_report_context",
    "render_lot_report_html",
    "render_lot_report_pdf",
]
