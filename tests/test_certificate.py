"""Certificate HTML: values formatted and escaped, cautions where they belong, snapshots held."""

from __future__ import annotations

import dataclasses
import datetime
import math
import types
from collections.abc import Callable, Iterator

import jinja2
import pytest

from pipeline.acceptance.results import CellResult, Outcome, VerdictKind
from pipeline.acceptance.rules import Hazard, Severity, Window
from pipeline.judge.quantities import DASH, format_value, format_window, significant
from pipeline.model import Note, SourceRef
from pipeline.report import certificate
from pipeline.report.certificate import build_context, format_time, render_html
from tests.golden import cases, regenerate

HOSTILE = "<img src=file:///etc/passwd>"


@pytest.fixture(autouse=True)
def hazards() -> Iterator[types.ModuleType]:
    """pipeline.report.hazards when it exists, else the test stand-in with the same API."""
    module = cases.real_hazards() or cases.stand_in_hazards()
    with cases.hazards_in_use(module):
        yield module


# --- formatting -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("metric", "value", "expected"),
    [
        ("grading_capacity_Ah", 20.1349, "20.13 Ah"),
        ("grading_capacity_Ah", 2.34567, "2.346 Ah"),
        ("irreversible_capacity_Ah", 0.123456, "0.1235 Ah"),
        ("grading_energy_Wh", 64.5249, "64.52 Wh"),
        ("grading_mean_voltage_V", 3.20549, "3.205 V"),
        ("max_charge_voltage_V", 3.65, "3.650 V"),
        ("first_cycle_efficiency", 0.91202, "91.20 %"),
        ("grading_coulombic_efficiency", 0.9961, "99.61 %"),
        ("rest_voltage_drift_mV_per_h", -6.8412, "\N{MINUS SIGN}6.84 mV/h"),
        ("rest_voltage_drift_mV_per_h", -0.001, "0.00 mV/h"),
        ("dcir_mOhm", 1.8234, "1.82 mOhm"),
        ("dcir_mOhm", 123.4, "123 mOhm"),
        ("max_temperature_C", 31.44, "31.4 °C"),
        ("grading_cv_duration_s", 1287.6, "1288 s"),
        ("plateau_count", 3.0, "3"),
        ("main_plateau_length_pct", 27.96, "28.0 %"),
        ("not_a_known_metric", 1234.5678, "1235"),
        ("grading_capacity_Ah", None, DASH),
        ("grading_capacity_Ah", math.nan, DASH),
        ("grading_capacity_Ah", math.inf, DASH),
    ],
)
def test_values_print_with_sensible_digits_and_units(
    metric: str, value: float | None, expected: str
) -> None:
    assert format_value(metric, value) == expected


def test_significant_digits_never_use_an_exponent() -> None:
    assert significant(0.0, 4) == "0.000"
    assert significant(123456.0, 4) == "123456"
    assert significant(0.000012345, 3) == "0.000012"
    assert significant(-20.1349, 4) == "\N{MINUS SIGN}20.13"


@pytest.mark.parametrize(
    ("metric", "window", "expected"),
    [
        ("grading_capacity_Ah", Window(19.4, 21.0), "19.40 \N{EN DASH} 21.00 Ah"),
        ("rest_voltage_drift_mV_per_h", Window(-2.0, None), "≥ \N{MINUS SIGN}2.00 mV/h"),
        ("max_temperature_C", Window(None, 45.0), "≤ 45.0 °C"),
        ("first_cycle_efficiency", Window(0.85, 0.96), "85.00 \N{EN DASH} 96.00 %"),
        ("plateau_count", Window(2, 4), "2 \N{EN DASH} 4"),
        ("dcir_mOhm", Window(None, None), "any value"),
    ],
)
def test_windows_print_as_ranges_or_one_sided_bounds(
    metric: str, window: Window, expected: str
) -> None:
    assert format_window(metric, window) == expected


def test_analysis_time_prints_in_utc_iso_8601() -> None:
    plus_two = datetime.timezone(datetime.timedelta(hours=2))
    moment = datetime.datetime(2026, 3, 2, 12, 15, 0, 123456, tzinfo=plus_two)
    assert format_time(moment) == "2026-03-02T10:15:00Z"


# --- context --------------------------------------------------------------------------------


def test_context_shows_identity_with_nominal_capacity_and_other_metadata() -> None:
    context = build_context(cases.pass_result())
    identity = dict(context["identity"])
    assert identity["Cell ID"] == "DEMO-C0042"
    assert identity["Lot"] == "DEMO-LOT-01"
    assert identity["Cell type"] == "DEMO-LFP-20A (nominal 20.00 Ah)"
    assert identity["Channel"] == "B-07"
    assert identity["Station"] == "FORM-STATION-2"
    assert identity["Program"] == "demo-formation-v3"
    assert identity["Started at"] == "2026-02-27T08:00:00Z"
    assert context["other_metadata"] == [("tray", "T-118")]


def test_context_leaves_out_a_missing_start_time_and_dashes_missing_fields() -> None:
    result = cases.pass_result()
    meta = {k: v for k, v in result.metadata.items() if k not in ("started_at", "channel")}
    context = build_context(dataclasses.replace(result, metadata=meta))
    identity = dict(context["identity"])
    assert "Started at" not in identity
    assert identity["Channel"] == DASH


def test_every_check_becomes_a_row_with_outcome_in_words(hazards: types.ModuleType) -> None:
    result = cases.hold_result()
    rows = build_context(result)["checks"]
    assert [r["id"] for r in rows] == [c.rule_id for c in result.verdict.checks]
    by_id = {r["id"]: r for r in rows}
    assert by_id["dcir"]["outcome"] == "not judged"
    assert by_id["dcir"]["value"] == DASH
    assert by_id["mean-voltage"]["outcome"] == "OUT OF WINDOW"
    assert by_id["grading-capacity"]["outcome"] == "in window"
    assert by_id["grading-capacity"]["severity"] == "reject"
    # a hazard shows only on a row out of window: on a row in window it alarms for nothing
    assert by_id["grading-capacity"]["hazard"] == ""
    assert by_id["dcir"]["hazard"] == ""


def test_a_failed_cells_deciding_rows_are_marked_and_carry_their_hazard(hazards: types.ModuleType) -> None:
    result = cases.fail_result()
    rows = {r["id"]: r for r in build_context(result)["checks"]}
    for check in result.verdict.checks:
        row = rows[check.rule_id]
        decided = check.outcome is Outcome.OUT_OF_WINDOW and check.severity is Severity.REJECT
        assert row["outcome"].endswith("(deciding)") == decided, check.rule_id
        if check.hazard is not None and check.outcome is Outcome.OUT_OF_WINDOW:
            assert row["hazard"] != "", check.rule_id


def test_failed_cell_gets_each_hazard_caution_and_the_general_caution(
    hazards: types.ModuleType,
) -> None:
    result = cases.fail_result()
    context = build_context(result)
    assert result.verdict.hazards == (
        Hazard.ABNORMAL_CAPACITY, Hazard.INTERNAL_SHORT, Hazard.OVER_TEMPERATURE
    )
    assert context["cautions"] == [
        {"title": hazards.CAUTIONS[h].title, "text": hazards.CAUTIONS[h].text}
        for h in result.verdict.hazards
    ]
    assert context["general_caution"] == hazards.GENERAL_CAUTION
    assert context["verdict"]["word"] == "FAIL"
    # page 1 leads with the deciding reject checks, then what else was found
    sections = context["verdict"]["sections"]
    assert sections[0]["title"] == "Deciding: reject checks out of their window"
    assert sections[0]["items"] == list(dict.fromkeys(
        c.message for c in result.verdict.checks
        if c.outcome is Outcome.OUT_OF_WINDOW and c.severity is Severity.REJECT
    ))


@pytest.mark.parametrize("make", [cases.pass_result, cases.hold_result])
def test_cells_that_did_not_fail_carry_no_caution(make, hazards: types.ModuleType) -> None:
    context = build_context(make())
    assert context["cautions"] == []
    assert context["general_caution"] == ""
    assert context["data_check_notice"] == hazards.DATA_CHECK_NOTICE


def test_held_cell_says_it_must_not_be_released_until_reviewed() -> None:
    context = build_context(cases.hold_result())
    assert context["verdict"]["word"] == "HOLD"
    assert "must not be released until it has been reviewed" in context["verdict"]["headline"]


def test_tables_are_formatted_strings() -> None:
    context = build_context(cases.pass_result())
    assert context["cycles"][0] == {
        "index": "1", "charge_ah": "22.05", "discharge_ah": "20.11", "ce_pct": "91.20",
        "energy_wh": "64.27", "mean_v": "3.196", "cv_s": "2710", "max_t_c": "29.8",
    }
    assert context["plateaus"][1] == {
        "label": "P2", "start_pct": "34.0", "end_pct": "62.0", "length_pct": "28.0",
        "length_ah": "5.636", "voltage_v": "3.279",
    }
    assert context["ica_peaks"] == "1: 3.200 V, 2: 3.275 V, 3: 3.320 V"  # numbered as on the plot
    assert dict(pair for row in context["traceability"] for pair in row) == {
        "Input file": cases.SOURCE_NAME,
        "Input SHA-256": cases.INPUT_SHA256,
        "Rule set": "demo-lfp, revision 3",
        "Rule set file": "rules/demo_lfp.toml",
        "Rule set SHA-256": cases.RULES_SHA256,
        "Software": "formgate 0.1.0",
        "Analysed at": "2026-03-02T10:15:00Z",
    }


def test_notes_from_result_and_metrics_show_once_with_where_and_what_they_block() -> None:
    result = cases.hold_result()
    extra = Note("nan_rows_dropped", "3 rows had no voltage.", SourceRef("x.csv", 12, 4))
    metrics = dataclasses.replace(result.metrics, notes=(result.notes[0], extra))
    notes = build_context(dataclasses.replace(result, metrics=metrics))["notes"]
    assert notes == [
        {"text": result.notes[0].text, "where": f"{cases.SOURCE_NAME}, line 5120",
         "blocks": "dcir_mOhm"},
        {"text": "3 rows had no voltage.", "where": "x.csv, line 12, column 4", "blocks": ""},
    ]


@pytest.mark.parametrize("make", [cases.pass_result, cases.hold_result], ids=["pass", "hold"])
def test_a_cell_without_curves_or_cycles_still_renders(make: Callable[[], CellResult]) -> None:
    result = make()
    metrics = dataclasses.replace(
        result.metrics, cycles=(), plateaus=(), ica_peaks_v=(), grading_curve=None,
        ica_curve=None,
    )
    html = render_html(dataclasses.replace(result, metrics=metrics))
    assert "No complete cycle found." in html
    if result.verdict.kind is VerdictKind.PASS:  # one page: no plots, no plateau table
        assert "<svg" not in html and "Plateaus on the grading discharge" not in html
    else:
        assert "No plateau found." in html
        assert "no grading discharge measured" in html


def test_a_passed_cells_full_certificate_has_every_section_and_plot() -> None:
    full = render_html(cases.pass_result(), full=True)
    assert "one-page" not in full and full.count("<svg") == 2  # the grading discharge and dQ/dV
    assert "Hazard (if out of window)" in full and "Plateaus on the grading discharge" in full
    assert render_html(cases.fail_result(), full=True) == render_html(cases.fail_result())


def test_a_passed_cell_gets_one_page_without_plots_and_the_others_keep_them() -> None:
    passed = render_html(cases.pass_result())
    assert "one-page" in passed and "<svg" not in passed
    assert "Hazard (if out of window)" not in passed  # no check of a pass is out of window
    for kept in ("Checks", "Cycles", "Data quality", "Traceability", "Verification code"):
        assert f"{kept}" in passed
    for make in (cases.fail_result, cases.hold_result):
        html = render_html(make())
        assert "one-page" not in html and "Hazard (if out of window)" in html
        assert html.count("<svg") >= 2  # the grading discharge and dQ/dV, and what failed
        assert "Plateaus on the grading discharge" in html and "dQ/dV peaks" in html


def test_a_passed_cells_rows_in_window_hold_severity_and_outcome_in_one_cell() -> None:
    """One cell, the outcome after a tab: a row of a passed cell's page in the renderer's fewest
    boxes. A row out of its window, or any row of a full certificate, keeps its two cells."""
    result = cases.pass_result()
    passed = render_html(result)
    for check in result.verdict.checks:
        words = f"{check.severity.value}&#9;{certificate.OUTCOME_WORDS[check.outcome]}"
        if check.outcome is Outcome.IN_WINDOW:
            assert f'<td class="c-sev-outcome" colspan="2">{words}</td>' in passed
    skipped = dataclasses.replace(result.verdict.checks[0], outcome=Outcome.SKIPPED)
    verdict = dataclasses.replace(result.verdict, checks=(skipped, *result.verdict.checks[1:]))
    one = render_html(dataclasses.replace(result, verdict=verdict))
    assert one.count("c-sev-outcome") == len(result.verdict.checks) - 1
    assert '<td class="c-outcome">not made (allowed)</td>' in one
    for html in (render_html(result, full=True), render_html(cases.fail_result())):
        assert "c-sev-outcome" not in html and "&#9;" not in html


# --- rendering ------------------------------------------------------------------------------


def test_environment_is_built_once_with_autoescape_and_strict_undefined() -> None:
    env = certificate.environment()
    assert env is certificate.environment()
    assert env.undefined is jinja2.StrictUndefined
    assert env.autoescape is True


def test_missing_context_value_fails_loudly() -> None:
    template = certificate.environment().get_template(certificate.TEMPLATE_NAME)
    context = build_context(cases.pass_result())
    del context["traceability"]
    with pytest.raises(jinja2.UndefinedError):
        template.render(context)


def test_values_from_the_data_file_are_escaped() -> None:
    result = cases.pass_result(cell_id=HOSTILE, lot="<b>lot</b>", station='" onload="x',
                               **{"<script>": "alert(1)"})
    html = render_html(result)
    assert HOSTILE not in html
    assert "&lt;img src=file:///etc/passwd&gt;" in html
    assert "<img" not in html and "<b>lot" not in html and "<script" not in html
    assert '" onload="x' not in html


def test_html_is_deterministic_and_has_metadata() -> None:
    one = render_html(cases.fail_result())
    assert one == render_html(cases.fail_result())
    assert "<title>Certificate for cell DEMO-C0042: FAIL</title>" in one
    assert '<meta name="dcterms.created" content="2026-03-02T10:15:00Z"/>' in one
    assert '<meta name="generator" content="formgate 0.1.0"/>' in one


@pytest.mark.parametrize("name", sorted(regenerate.SNAPSHOTS))
def test_html_matches_its_golden_snapshot(name: str) -> None:
    path = regenerate.HERE / name
    actual = regenerate.render_snapshot(name)
    header, _, expected = path.read_text(encoding="utf-8").partition("\n")
    assert header + "\n" == regenerate.HEADER
    if actual != expected:
        beside = path.with_suffix(".actual.html")
        beside.write_text(actual, encoding="utf-8")
        pytest.fail(
            f"{name} differs from its snapshot; the output is in {beside.name}. If the change "
            "is intended, run tests/golden/regenerate.py and review the diff."
        )


def test_caption_says_when_only_the_highest_peaks_are_marked() -> None:
    result = cases.pass_result()
    many = tuple(3.0 + i * 0.01 for i in range(25))
    metrics = dataclasses.replace(result.metrics, ica_peaks_v=many)
    context = build_context(dataclasses.replace(result, metrics=metrics))
    assert context["ica_caption"] == (
        "Incremental capacity dQ/dV; dashed lines mark the 10 highest of the 25 peaks found, "
        "numbered as listed under dQ/dV peaks."
    )
    assert build_context(result)["ica_caption"] == (
        "Incremental capacity dQ/dV; dashed lines mark the peaks found, numbered as listed under "
        "dQ/dV peaks."
    )


def test_a_pass_of_one_stage_is_never_shown_as_the_cells_release() -> None:
    """A passing grading file of a cell that also needs aging says the cell is not released yet."""
    import datetime

    from pipeline.demo.lots import DEMO_CELLS, DEMO_STAGED_CELLS, demo_file_bytes, demo_stage_files
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    book = load_rules_dir(RULES_DIR)
    when = datetime.datetime(2026, 11, 1, tzinfo=datetime.UTC)
    staged = judge(demo_stage_files(DEMO_STAGED_CELLS[0])["grading"], "g.csv", book,
                   analysed_at=when)
    assert staged.verdict.passed
    assert staged.needed_stages == ("formation", "aging", "grading")
    headline = build_context(staged)["verdict"]["headline"]  # type: ignore[index]
    assert "This certificate covers the grading stage only." in headline
    assert "once every stage it needs (formation, aging and grading) has passed" in headline
    whole = judge(demo_file_bytes(DEMO_CELLS[0]), "w.csv", book, analysed_at=when)
    assert whole.verdict.passed
    assert "covers" not in build_context(whole)["verdict"]["headline"]  # type: ignore[index]


@pytest.mark.parametrize("make", [cases.pass_result, cases.fail_result], ids=["pass", "fail"])
def test_every_measured_metric_is_on_the_certificate_with_its_u(
    make: Callable[[], CellResult],
) -> None:
    """A checked metric in its row, every other one in the line under the checks: each
    measured value with ± U (the counts, which have none, plain; a U of 0 as exact)."""
    from pipeline.judge.metricdefs import METRICS
    from pipeline.judge.quantities import format_uncertain

    result = make()
    zero = dataclasses.replace(
        result.metrics, values={**result.metrics.values, "total_plateau_length_pct": 0.0},
        uncertainty={**result.metrics.uncertainty, "total_plateau_length_pct": 0.0},
    )
    result = dataclasses.replace(result, metrics=zero)
    html = render_html(result)
    for definition in METRICS:
        value = result.metrics.values.get(definition.name)
        if value is None:
            continue
        u = result.metrics.uncertainty.get(definition.name)
        text = format_uncertain(definition.name, value, u)
        assert ("±" in text) == bool(u) and (u is None) == definition.name.endswith("_count")
        if u == 0:
            text += " (exact)"
        assert f"{definition.name} {text}" in html or (
            f'class="metric">{definition.name}</span></td>\n        <td class="c-num">{text}</td>'
            in html
        ), definition.name
    other = certificate.other_values(result)
    assert other.startswith("Other measured values: grading_cv_duration_s 1288.0 ± 3.6 s")
    assert "total_plateau_length_pct 0.0 % (exact)" in other
