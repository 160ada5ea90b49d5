"""Turns one judged cell into the certificate's HTML: every shown value formatted, then Jinja2.

Pure: a CellResult in, text out; no clock (the only time shown is the result's
``analysed_at``). Every value from the data file reaches the page through
autoescaping; only the plots, which plots.py builds from numbers alone, go in as
markup. Turning the HTML into a PDF is pdf.py's job.
"""

from __future__ import annotations

import datetime
import functools
import importlib
import math
from collections.abc import Callable

import jinja2
from markupsafe import Markup

from pipeline import shipped
from pipeline.acceptance.results import CellResult, CheckResult, Outcome, VerdictKind
from pipeline.acceptance.rules import SIMPLE, WHOLE_PROGRAM, Hazard, Severity
from pipeline.judge.evaluate import deciding, phrase, program_findings
from pipeline.judge.metricdefs import BY_NAME, METRICS

# Every value and window is written as the judge's reasons, the letters and the lot report
# write it: quantities.py is the one source of those words.
from pipeline.judge.quantities import BY_UNIT as _BY_UNIT
from pipeline.judge.quantities import (
    DASH,
    format_uncertain,
    format_window,
    near_limit,
    significant,
)
from pipeline.judge.quantities import percent as _percent
from pipeline.judge.quantities import signed as _signed
from pipeline.judge.quantities import with_unit as _with_unit
from pipeline.model import CurrentBand, Curve, CycleMetrics, Note, Plateau
from pipeline.report import evidence, plots, verification
from pipeline.report.result import to_json

TEMPLATES_DIR = shipped.TEMPLATES_DIR
TEMPLATE_NAME = "certificate.html.j2"
PLOT_WIDTH_MM, PLOT_HEIGHT_MM = 86.0, 50.0
RECORD_WIDTH_MM, RECORD_HEIGHT_MM = 178.0, 66.0
IDENTITY_KEYS = ("cell_id", "lot", "cell_type", "channel", "station", "program", "started_at")

VERDICT_WORDS = {
    VerdictKind.PASS: ("PASS", "Every check is within its acceptance window."),
    VerdictKind.FAIL: ("FAIL", "Rejected: at least one reject check is out of its window."),
    VerdictKind.HOLD: (
        "HOLD",
        "Held for review: this cell must not be released until it has been reviewed.",
    ),
    VerdictKind.ERROR: ("ERROR", "Not judged: the file could not be judged."),
}
OUTCOME_WORDS = {
    Outcome.IN_WINDOW: "in window",
    Outcome.OUT_OF_WINDOW: "OUT OF WINDOW",
    Outcome.NOT_JUDGED: "not judged",
    Outcome.SKIPPED: "not made (allowed)",
}
HAZARD_WORDS = {
    Hazard.INTERNAL_SHORT: "internal short",
    Hazard.OVER_TEMPERATURE: "over-temperature",
    Hazard.OVER_VOLTAGE: "over-voltage",
    Hazard.LITHIUM_PLATING: "lithium plating",
    Hazard.SODIUM_PLATING: "sodium plating",
    Hazard.ABNORMAL_CAPACITY: "abnormal capacity",
}


def _num(value: float | None, fmt: Callable[[float], str], unit: str = "") -> str:
    if value is None or not math.isfinite(value):
        return DASH
    return _with_unit(fmt(value), unit)


def format_time(moment: datetime.datetime) -> str:
    """ISO 8601 in UTC to the second, e.g. ``2026-03-02T10:15:00Z``."""
    return moment.astimezone(datetime.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _check_row(check: CheckResult, decided: bool) -> dict[str, str]:
    definition = BY_NAME.get(check.metric)
    out = check.outcome is Outcome.OUT_OF_WINDOW
    # as the reasons write it: a value out of window, held too close to a limit or accepted
    # outside it by less than U, to the digits that tell it from that limit
    outside = check.value is not None and not check.window.contains(check.value)
    extra = near_limit(check.metric, check.value, check.window) if check.too_close or outside else 0
    return {
        "id": check.rule_id,
        "metric": check.metric,
        "meaning": definition.meaning if definition else "",
        "value": format_uncertain(check.metric, check.value, check.uncertainty, extra)
        + (" (exact)" if check.uncertainty == 0 and check.value is not None else ""),
        "window": format_window(check.metric, check.window, extra),
        "severity": check.severity.value,
        "outcome": ("too close to decide" if check.too_close else OUTCOME_WORDS[check.outcome])
        + (" (deciding)" if decided else ""),
        "outcome_class": check.outcome.value.replace("_", "-") + (" deciding" if decided else ""),
        # a hazard word on a row in window would alarm a reader for nothing
        "hazard": HAZARD_WORDS[check.hazard] if check.hazard and out else "",
    }


def other_values(result: CellResult) -> str:
    """Every measured metric the checks table does not show, each with its ± U, in one line.

    A count has no uncertainty; a U of 0 says the value is exact (a total plateau length of
    0 where noise cannot make a plateau: docs/metrics.md, Uncertainty).
    """
    metrics = result.metrics
    shown = {c.metric for c in result.verdict.checks if c.value is not None}
    words = []
    for definition in METRICS:
        name = definition.name
        value = metrics.values.get(name)
        if name in shown or value is None or not math.isfinite(value):
            continue
        u = metrics.uncertainty.get(name)
        text = format_uncertain(name, value, u)
        words.append(f"{name} {text}{' (exact)' if u == 0 else ''}")
    return f"Other measured values: {'; '.join(words)}." if words else ""


def _decision(result: CellResult) -> list[dict[str, object]]:
    """The verdict box's findings, deciding ones first: what a reader must act on, on page 1."""
    verdict = result.verdict
    decided = deciding(verdict)
    texts, quiet = program_findings((*result.notes, *result.metrics.notes))
    program = [f"{text[0].upper()}{text[1:]}." for text in texts]
    out_review = [
        c for c in verdict.checks
        if c.outcome is Outcome.OUT_OF_WINDOW and c.severity is Severity.REVIEW and c not in decided
    ]
    not_made = [c for c in verdict.checks if c.outcome is Outcome.NOT_JUDGED and c not in decided]

    def messages(checks: list[CheckResult] | tuple[CheckResult, ...]) -> list[str]:
        # two checks on one unmeasured metric say the same thing once
        return list(dict.fromkeys(c.message for c in checks))

    if verdict.kind is VerdictKind.FAIL:
        deciding_title = "Deciding: reject checks out of their window"
    else:
        deciding_title = "Deciding: findings that hold the cell for review"
    sections: list[dict[str, object]] = []
    if program:
        sections.append({"title": "The record", "kind": "deciding", "items": program})
    shown = [c for c in decided if not (c.outcome is Outcome.NOT_JUDGED and c.metric in quiet)]
    if shown:
        sections.append({"title": deciding_title, "kind": "deciding", "items": messages(shown)})
    if out_review:
        review = messages(out_review)
        sections.append({"title": "Also out of window (review)", "kind": "review", "items": review})
    if not_made:
        sections.append({"title": "Checks not made", "kind": "not-made", "items": messages(not_made)})
    if verdict.left_out and verdict.kind is not VerdictKind.PASS:  # a pass's headline names them
        sections.append({
            "title": "Checks not made, which the rule set allows to be left out",
            "kind": "left-out",
            "items": messages(verdict.left_out),
        })
    return sections


def _cycle_row(c: CycleMetrics) -> dict[str, str]:
    ah, wh = _BY_UNIT["Ah"], _BY_UNIT["Wh"]
    return {
        "index": str(c.index),
        "charge_ah": _num(c.charge_capacity_ah, ah),
        "discharge_ah": _num(c.discharge_capacity_ah, ah),
        "ce_pct": _num(c.coulombic_efficiency, _percent),
        "energy_wh": _num(c.discharge_energy_wh, wh),
        "mean_v": _num(c.mean_discharge_voltage_v, _BY_UNIT["V"]),
        "cv_s": _num(c.cv_duration_s, _BY_UNIT["s"]),
        "max_t_c": _num(c.max_temperature_c, _BY_UNIT["°C"]),
    }


def _plateau_row(number: int, p: Plateau) -> dict[str, str]:
    pct = _BY_UNIT["%"]
    return {
        "label": f"P{number}",
        "start_pct": _num(p.start_pct, pct),
        "end_pct": _num(p.end_pct, pct),
        "length_pct": _num(p.length_pct, pct),
        "length_ah": _num(p.length_ah, _BY_UNIT["Ah"]),
        "voltage_v": _num(p.voltage_v, _BY_UNIT["V"]),
    }


def _note_rows(result: CellResult) -> list[dict[str, str]]:
    seen: list[Note] = []
    for note in (*result.notes, *result.metrics.notes):
        if note not in seen:
            seen.append(note)
    return [
        {
            "text": n.text,
            "where": str(n.where) if n.where else "",
            "blocks": ", ".join(n.blocks),
        }
        for n in seen
    ]


def measurement_text(result: CellResult) -> str:
    """One sentence on where the ± values come from and how the checks decide near a limit."""
    accuracy = result.accuracy
    if accuracy is None:
        return ""
    range_text = (
        f"{accuracy.current_range_a:g} A" if accuracy.current_range_a is not None
        else "a range from the record"
    )
    by_rule: dict[str, list[str]] = {}
    for check in result.verdict.checks:
        by_rule.setdefault(check.decision, []).append(check.rule_id)
    if len(by_rule) <= 1:
        decisions = f"every check by {next(iter(by_rule), SIMPLE)}"
    else:
        decisions = "; ".join(f"{rule}: {', '.join(ids)}" for rule, ids in by_rule.items())
    return (
        f"± U (k = 2): the channel's accuracy class, V ±({accuracy.voltage_pct_of_reading:g} % "
        f"+ {accuracy.voltage_mv:g} mV), I ±({accuracy.current_pct_of_reading:g} % + "
        f"{accuracy.current_pct_of_range:g} % of {range_text}), T ±{accuracy.temperature_k:g} K, "
        f"time ±{accuracy.time_ppm:g} ppm ({accuracy.source}), with the data's own scatter. "
        f"Decisions: {decisions}."
    )


def _band_text(band: CurrentBand | None) -> str:
    """How rest was told from current, in one sentence for the data-quality section."""
    if band is None:
        return ""
    def ma(value_a: float) -> str:
        return f"{_signed(f'{value_a * 1000:.3g}')} mA"
    if band.corrected:  # one short sentence, as long as the other: a passed cell's page is one page
        return (
            f"Zero offset {ma(band.offset_a)} ± {2 * band.offset_u_a * 1000:.2g} mA (k = 2; "
            f"{band.rows} rows at rest, noise {ma(band.noise_a)} rms) taken out of every row; "
            f"rest is |\u2060I\u2060| ≤ {ma(band.threshold_a)} (rule set: {ma(band.floor_a)})."
        )
    source = (
        f"zero offset {ma(band.offset_a)}, noise {ma(band.noise_a)} rms, "
        f"from {band.rows} rows near zero current"
        if band.rows
        else "too few rows near zero current to estimate the channel's noise"
    )
    return (
        f"Rest is current within {ma(band.threshold_a)} of the zero offset ({source}; "
        f"rule set: {ma(band.floor_a)})."
    )


# The plot that shows each kind of failed check (evidence.py), by the metric it judges.
_CYCLE_METRICS = (
    "grading_capacity_Ah",
    "first_cycle_efficiency",
    "irreversible_capacity_Ah",
    "grading_coulombic_efficiency",
)


def _worst(checks: list[CheckResult]) -> CheckResult:
    """The check a plot should draw the limit of: a reject check before a review one."""
    return sorted(checks, key=lambda c: c.severity is not Severity.REJECT)[0]


def _evidence(result: CellResult) -> list[dict[str, object]]:
    """For each kind of check out of window, the plot that shows it, with a caption."""
    metrics = result.metrics
    out = [c for c in result.verdict.checks if c.outcome is Outcome.OUT_OF_WINDOW]
    size = {"width_mm": PLOT_WIDTH_MM, "height_mm": PLOT_HEIGHT_MM}
    shown: list[dict[str, object]] = []
    drift = [c for c in out if c.metric == "rest_voltage_drift_mV_per_h"]
    if drift:
        check = _worst(drift)
        svg = evidence.drift_svg(metrics.rest, check.window.low, **size)
        caption = (
            f"The final rest: {phrase(check)}. Grey: the relaxation left out of the fit; "
            "solid: the fit; dashed: a voltage falling at the limit."
        )
        shown.append({"svg": Markup(svg), "caption": caption})  # numbers only: see svgplot.py
    resistance = [c for c in out if c.metric == "dcir_mOhm"]
    if resistance:
        check = _worst(resistance)
        svg = evidence.pulse_svg(metrics.pulse, check.window.high, **size)
        caption = (
            f"The DCIR pulse: {phrase(check)}. Solid: the voltage before the switch and the line "
            "fitted at the pulse time; dashed: where a cell at the limit would have dropped to."
        )
        shown.append({"svg": Markup(svg), "caption": caption})
    heat = [c for c in out if c.metric == "max_temperature_C"]
    if heat:
        check = _worst(heat)
        svg = evidence.temperature_svg(metrics.record, check.window.high, **size)
        caption = f"The cell's temperature: {phrase(check)}. Dashed: the limit."
        shown.append({"svg": Markup(svg), "caption": caption})
    cycle = [c for c in out if c.metric in _CYCLE_METRICS]
    if cycle:
        capacity = [c for c in cycle if c.metric == "grading_capacity_Ah"]
        window = _worst(capacity).window if capacity else None
        svg = evidence.cycles_svg(metrics.cycles, window, **size)
        words = "; ".join(dict.fromkeys(phrase(c) for c in cycle))
        caption = f"Capacity and efficiency of each cycle: {words}."
        shown.append({"svg": Markup(svg), "caption": caption})
    return shown


def stage_words(stages: tuple[str, ...]) -> str:
    """The stages a record covers, in words.

    >>> stage_words(("formation",)), stage_words(("formation", "grading"))
    ('formation', 'formation and grading')
    >>> stage_words(("formation", "aging", "grading"))
    'formation, aging and grading'
    """
    if len(stages) > 2:
        return ", ".join(stages[:-1]) + " and " + stages[-1]
    return " and ".join(stages)


def stage_scope(stages: tuple[str, ...]) -> str:
    """What a record of one stage is judged on, and where the other stage's checks are judged.

    Empty for a record of the whole program: it is judged on every cycle-file check.
    """
    others = [s for s in WHOLE_PROGRAM if s not in stages]
    if not others:
        return ""
    return (
        f"This record holds the {stage_words(stages)} stage only: it is judged on that "
        f"stage's checks and on those every cycle file has. The {stage_words(tuple(others))} "
        f"checks are judged on the cell's {stage_words(tuple(others))} record."
    )


def record_heading(stages: tuple[str, ...]) -> str:
    """The certificate's title: a stage record says which stage it is.

    >>> record_heading(("formation", "grading")), record_heading(("grading",))
    ('Formation and grading certificate', 'Stage certificate: grading')
    """
    if tuple(stages) == WHOLE_PROGRAM:
        return "Formation and grading certificate"
    return f"Stage certificate: {stage_words(stages)}"


def record_scope(cell_id: str, stages: tuple[str, ...], cell_certificate: str | None) -> str:
    """What a record's certificate covers, said on page 1 before its verdict: one stage of
    the cell, or its whole program in one file; and where the cell's standing decision is."""
    if tuple(stages) == WHOLE_PROGRAM:
        covers = (
            f"This certificate covers the whole program of cell {cell_id} ("
            f"{stage_words(stages)}) in one record, judged on that record alone."
        )
    else:
        covers = (
            f"This certificate covers one stage of cell {cell_id}: its {stage_words(stages)} "
            "record, judged on that stage alone."
        )
    if cell_certificate is None:  # judged outside a station: no cell certificate to name
        if tuple(stages) == WHOLE_PROGRAM:
            return covers
        return covers + " The cell may be released only on its decision over every stage."
    return covers + (
        f" The cell's standing decision over all its stages, its lot's screens and any review "
        f"is on its cell certificate, {cell_certificate}."
    )


def _identity(result: CellResult) -> list[tuple[str, str]]:
    meta = result.metadata
    ct = result.cell_type
    rows = [
        ("Cell ID", meta.get("cell_id") or DASH),
        ("Lot", meta.get("lot") or DASH),
        ("Cell type", f"{ct.name} (nominal {significant(ct.nominal_capacity_ah, 4)} Ah)"),
        ("Channel", meta.get("channel") or DASH),
        ("Station", meta.get("station") or DASH),
        ("Program", meta.get("program") or DASH),
        ("Stage", stage_words(result.stages)),
    ]
    if result.record is not None:
        rows.append(("Record", result.record.words()))
    if meta.get("started_at"):
        rows.append(("Started at", meta["started_at"]))
    return rows


def _traceability(result: CellResult) -> list[list[tuple[str, str]]]:
    """Rows of one or two (label, value) pairs: hashes and the file name get a row each."""
    rs = result.rule_set
    others = [
        [(
            f"Record of {stage_words(o.stages)}",
            f"{o.name}" + (f" ({o.verdict})" if o.verdict else "") + f", SHA-256 {o.sha256}",
        )]
        for o in result.other_records
    ]
    return [
        [("Input file", result.source_name)],
        [("Input SHA-256", result.input_sha256)],
        *others,
        [("Rule set", f"{rs.name}, revision {rs.revision}"), ("Rule set file", rs.source)],
        [("Rule set SHA-256", rs.sha256)],
        [("Software", f"formgate {result.software_version}"),
         ("Analysed at", format_time(result.analysed_at))],
    ]


def _ica_caption(curve: Curve | None, peaks_v: tuple[float, ...]) -> str:
    shown = len(plots.marked_peaks(curve, peaks_v))
    found = sum(1 for p in peaks_v if math.isfinite(p))
    if shown < found:
        return (
            f"Incremental capacity dQ/dV; dashed lines mark the {shown} highest of the "
            f"{found} peaks found, numbered as listed under dQ/dV peaks."
        )
    return ("Incremental capacity dQ/dV; dashed lines mark the peaks found, numbered as listed "
            "under dQ/dV peaks.")


def is_one_page(result: CellResult, *, full: bool = False) -> bool:
    """Whether the record's certificate is one page without plots: a passed cell's (the plots,
    plateau table and dQ/dV peaks are a failed or held cell's evidence), unless ``full``."""
    return result.verdict.kind is VerdictKind.PASS and not full


def build_context(
    result: CellResult,
    verification_code: str | None = None,
    *,
    cell_certificate: str | None = None,
    full: bool = False,
) -> dict[str, object]:
    """Everything the certificate template shows, already formatted as strings.

    A passed cell's certificate is one page without plots; ``full`` asks for every section
    and plot whatever the verdict (the layout a failed or held cell gets).

    ``cell_certificate``: the file name of the cell's own certificate, which a station
    publishes beside its records (None: no station, no cell certificate to name).

    ``verification_code``: the code of the result JSON published with the certificate
    (report/verification.py); a caller that has the JSON text passes it, else it is
    computed from the result's JSON, which is the same text.
    """
    if verification_code is None:
        verification_code = verification.verification_code(to_json(result))
    hazards = importlib.import_module("pipeline.report.hazards")
    kind = result.verdict.kind
    word, headline = VERDICT_WORDS[kind]
    decided = deciding(result.verdict) if kind is VerdictKind.FAIL else ()
    if kind is VerdictKind.PASS and result.verdict.left_out:
        # named here, and in the checks table ("not made (allowed)"): a passed cell's page is one
        names = list(dict.fromkeys(c.metric for c in result.verdict.left_out))
        listed = names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]
        headline = (
            f"Every check made is within its acceptance window; the checks of {listed} were "
            "not made, as the rule set allows."
        )
    missing = [s for s in result.needed_stages if s not in result.stages]
    if kind is VerdictKind.PASS and missing:
        # a pass of one record is not the cell's release: its other stages are still to pass
        release = (
            f" The cell may be released only once every stage it needs "
            f"({stage_words(result.needed_stages)}) has passed"
        )
        if cell_certificate is None:
            headline += (
                f" This certificate covers the {stage_words(result.stages)} stage"
                f"{'s' if len(result.stages) > 1 else ''} only.{release}; its decision over all "
                "of them is in the station's ledger and its lot's report."
            )
        else:  # the scope above says what this covers and names the cell certificate
            headline += release + "."
    cell_id = result.cell_id or DASH
    metrics = result.metrics
    # A passed cell's certificate is one page: its plots are evidence for a failed or held
    # cell, so they are neither drawn nor laid out for a pass.
    one_page = is_one_page(result, full=full)
    # a failed cell, or a held one whose record shows a hazard before it was cut short
    failed = kind is VerdictKind.FAIL or bool(result.verdict.hazards)
    cautions = [
        {"title": hazards.CAUTIONS[h].title, "text": hazards.CAUTIONS[h].text}
        for h in result.verdict.hazards
    ] if failed else []
    return {
        "title": f"Certificate for cell {cell_id}: {word}",
        "description": (
            f"{record_heading(result.stages)}, cell {cell_id}, lot {result.lot or DASH}, "
            f"cell type {result.cell_type.name}: {word}"
        ),
        # the code in the PDF's metadata too: `formgate verify` reads it from a copy of the
        # certificate that was changed, and names the published certificate it claims to be
        "keywords": f"formation, grading, certificate, {word}, "
        f"verification code {verification_code}",
        "generator": f"formgate {result.software_version}",
        "created": format_time(result.analysed_at),
        "cell_id": cell_id,
        "heading": record_heading(result.stages),
        "scope": record_scope(cell_id, result.stages, cell_certificate),
        "verdict_label": "Verdict" if tuple(result.stages) == WHOLE_PROGRAM else "Stage verdict",
        "verdict": {
            "kind": kind.value,
            "word": word,
            "headline": headline,
            "sections": _decision(result),
        },
        "identity": _identity(result),
        "other_metadata": [
            (k, v) for k, v in result.metadata.items() if k not in IDENTITY_KEYS and k != "stage"
        ],
        "stage_scope": stage_scope(result.stages),
        "checks": [_check_row(c, c in decided) for c in result.verdict.checks],
        "cautions": cautions,
        "handling": hazards.HANDLING if cautions else "",
        "general_caution": hazards.general_caution(result.rule_set.family) if failed else "",
        "caution_title": (
            "Caution: this cell failed and may be hazardous"
            if kind is VerdictKind.FAIL
            else "Caution: this cell is held, and its record shows a hazard"
        ),
        "data_check_notice": hazards.DATA_CHECK_NOTICE,
        "one_page": one_page,
        "discharge_svg": "" if one_page else Markup(plots.discharge_svg(  # numbers only: plots.py
            metrics.grading_curve, metrics.plateaus,
            width_mm=PLOT_WIDTH_MM, height_mm=PLOT_HEIGHT_MM,
        )),
        "ica_svg": "" if one_page else Markup(plots.ica_svg(  # numbers only: see plots.py
            metrics.ica_curve, metrics.ica_peaks_v,
            width_mm=PLOT_WIDTH_MM, height_mm=PLOT_HEIGHT_MM,
        )),
        "record_svg": Markup(evidence.record_svg(  # numbers only: see svgplot.py
            metrics.record, width_mm=RECORD_WIDTH_MM, height_mm=RECORD_HEIGHT_MM,
        )) if metrics.record is not None and not one_page else "",
        "evidence": _evidence(result),
        "cycles": [_cycle_row(c) for c in metrics.cycles],
        "plateaus": [_plateau_row(i, p) for i, p in enumerate(metrics.plateaus, start=1)],
        "ica_caption": _ica_caption(metrics.ica_curve, metrics.ica_peaks_v),
        "ica_peaks": ", ".join(f"{i}: {v:.3f} V" for v, i in plots.peak_numbers(metrics.ica_peaks_v).items())
        or DASH,
        "notes": _note_rows(result),
        "current_band": _band_text(result.current_band),
        "measurement": measurement_text(result),
        "other_values": other_values(result),
        "traceability": _traceability(result),
        "verification": {"code": verification_code, "spaced": verification.spaced(verification_code)},
    }


@functools.lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The one Jinja2 environment: autoescaping on, undefined names fail loudly."""
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES_DIR),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_html(
    result: CellResult,
    verification_code: str | None = None,
    *,
    cell_certificate: str | None = None,
    full: bool = False,
    channel_note: str = "",
) -> str:
    """The certificate of one judged cell as an HTML document (a str); ``full``: see build_context.

    ``channel_note``: when the channel that tested the cell was suspect as it was judged, the
    words that say so (a station's, pipeline/station/channelwatch.py), shown under the verdict;
    they change neither the verdict nor its cautions."""
    context = build_context(result, verification_code, cell_certificate=cell_certificate, full=full)
    return environment().get_template(TEMPLATE_NAME).render({**context, "channel_note": channel_note})
