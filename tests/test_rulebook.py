"""Rule files: loading, every user-facing error message whole, the rule book, the generated docs."""

from __future__ import annotations

import re
import shutil
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import AgingSettings, Grade, Hazard, Program, Screen, Severity, Window
from pipeline.errors import InputError, RulesError
from pipeline.judge.metricdefs import METRIC_NAMES
from pipeline.model import PlateauSettings, SourceRef
from pipeline.rulebook.book import (
    RuleBook,
    check_rules_dir,
    load_rule_set,
    load_rules_dir,
    reused_revisions,
)
from pipeline.rulebook.schema import (
    EXAMPLE,
    FRACTION_METRICS,
    RENAMED,
    TABLES,
    Table,
    render_docs,
)
from pipeline.rulebook.toml_lines import Locator
from tests.conftest import DATA_DIR, REPO, RULES_DIR

BAD = DATA_DIR / "rules" / "bad"
GOOD = DATA_DIR / "rules" / "good"
BAD_CASES = sorted(p.stem for p in BAD.glob("*.toml"))
GOOD_CASES = sorted(p.stem for p in GOOD.glob("*.toml"))
SHIPPED = sorted(p.name for p in RULES_DIR.glob("*.toml"))
PLATEAU_METRICS = {
    "plateau_count",
    "main_plateau_voltage_V",
    "main_plateau_length_pct",
    "total_plateau_length_pct",
}

MINIMAL = """\
[rule_set]
name = "demo"
revision = "1"
chemistry = "LFP/graphite"

[cell_type.{cell_type}]
nominal_capacity_Ah = 20.0

[check.capacity]
metric = "grading_capacity_Ah"
low = 0.98
relative_to = "nominal_capacity"
severity = "reject"
"""


def _first_error(text: str, name: str) -> str:
    with pytest.raises(RulesError) as caught:
        load_rule_set(text, name)
    return str(caught.value)


# ---------------------------------------------------------------- bad files, one message each


def test_there_are_bad_cases_and_each_has_its_expected_message() -> None:
    assert len(BAD_CASES) >= 40
    assert sorted(p.stem for p in BAD.glob("*.expected")) == BAD_CASES


@pytest.mark.parametrize("case", BAD_CASES)
def test_bad_rule_file_gives_its_whole_message(case: str) -> None:
    text = (BAD / f"{case}.toml").read_text(encoding="utf-8")
    expected = (BAD / f"{case}.expected").read_text(encoding="utf-8")
    actual = _first_error(text, f"rules/{case}.toml") + "\n"
    if actual != expected:  # leave the actual message beside the expected one to compare
        (BAD / f"{case}.actual").write_text(actual, encoding="utf-8")
    assert actual == expected


@pytest.mark.parametrize("case", BAD_CASES)
def test_rules_check_reports_the_same_first_problem(
    case: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    (tmp_path / "rules").mkdir()
    shutil.copy(BAD / f"{case}.toml", tmp_path / "rules" / f"{case}.toml")
    monkeypatch.chdir(tmp_path)
    problems = check_rules_dir(Path("rules"))
    assert problems, "rules check found nothing"
    assert str(problems[0]) + "\n" == (BAD / f"{case}.expected").read_text(encoding="utf-8")


def test_every_problem_of_a_file_is_collected(tmp_path: Path) -> None:
    (tmp_path / "x.toml").write_text(
        '[rule_set]\nname = "x"\nrevision = "1"\nchemistry = "LFP/graphite"\n\n'
        "[cell_type.A]\nnominal_capacity_Ah = -1\n\n"
        '[check.v]\nmetric = "max_charge_voltage_V"\nhigh = 3.7\nseverity = "reject"\n'
        'hazzard = "over_voltage"\n\n'
        '[check.c]\nmetric = "grading_capacity_Ah"\nlow = 1.1\nhigh = 0.9\n'
        'relative_to = "nominal_capacity"\nseverity = "fatal"\n',
        encoding="utf-8",
    )
    name = str(tmp_path / "x.toml")
    assert [str(e) for e in check_rules_dir(tmp_path)] == [
        f"{name}, line 7: [cell_type.A] nominal_capacity_Ah = -1 Ah is out of range.\n"
        "  It must be greater than 0 Ah.",
        f"{name}, line 13: unknown key 'hazzard' in [check.v].\n  Did you mean 'hazard'?",
        f"{name}, line 18: [check.c] high = 0.9 is below low = 1.1.\n"
        "  Swap the two values, or check that both are fractions of the nominal capacity.",
        f'{name}, line 20: [check.c] severity = "fatal" is not a known value.\n'
        "  Allowed: reject, review.",
    ]


def test_a_check_with_problems_is_not_loaded_but_the_others_are_still_checked() -> None:
    text = MINIMAL.format(cell_type="A") + (
        '\n[check.t]\nmetric = "max_temperature_C"\nhigh = 60\nseverity = "reject"\n'
        'hazard = "fire"\n\n[check.u]\nmetric = "dcir_mOhm"\nlow = 9\nhigh = 2\n'
        'severity = "review"\n'
    )
    from pipeline.rulebook.book import _parse

    rule_set, errors = _parse(text, "r.toml")
    assert rule_set is None
    assert [e.where for e in errors] == [SourceRef("r.toml", 19), SourceRef("r.toml", 24)]


# ---------------------------------------------------------------- good files


@pytest.mark.parametrize("case", GOOD_CASES)
def test_good_rule_file_loads(case: str) -> None:
    rule_set = load_rule_set((GOOD / f"{case}.toml").read_text(encoding="utf-8"), case)
    assert rule_set.rules and rule_set.cell_types


def test_all_keys_file_uses_every_schema_key_and_each_reaches_the_rule_set() -> None:
    text = (GOOD / "all_keys.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    for table in TABLES:
        body = data[table.name]
        used = {k for entry in body.values() for k in entry} if table.named else set(body)
        if table.name == "grade":  # a grade's keys are metrics, each with a low-high range
            used = {k for entry in body.values() for bound in entry.values() for k in bound}
        assert used == {k.name for k in table.keys}, table.name
    rs = load_rule_set(text, "all_keys.toml")
    assert (rs.name, rs.revision, rs.chemistry) == ("all-keys", "2026-12-01.7", "LFP/graphite")
    assert rs.description == "Every key of the rule-file schema."
    assert rs.family == "sodium-ion"
    one, two = rs.cell_types
    assert (one.name, one.nominal_capacity_ah, one.min_voltage_v, one.max_voltage_v) == (
        "DEMO-ALL-1",
        12.5,
        1.0,
        3.9,
    )
    assert one.description == "Invented cell type."
    assert (two.min_voltage_v, two.max_voltage_v) == (0.5, 4.0)  # from [plausible]
    assert rs.plateau == PlateauSettings(4.0, 6.0, 2.0, 2.5, 501, 2.0, 0.5)
    assert (rs.dcir_pulse_s, rs.relax_s, rs.rest_current_fraction) == (5.0, 900.0, 0.01)
    assert (rs.zero_offset, rs.decision) == ("as recorded", "guarded rejection")
    assert rs.program == Program(3, 14, 2.0, 0.05, 7200.0)
    (rule,) = rs.rules
    assert rule.id == "capacity" and rule.metric == "grading_capacity_Ah"
    assert rule.window == Window(0.98, 1.12, "nominal_capacity")
    assert (rule.severity, rule.hazard) == (Severity.REJECT, Hazard.ABNORMAL_CAPACITY)
    assert (rule.message, rule.if_missing) == ("Grading capacity out of window.", "skip")
    assert rule.decision == "guarded acceptance"
    assert rule.cell_types == ("DEMO-ALL-1", "DEMO-ALL-2")
    assert rule.where == SourceRef("all_keys.toml", 46)
    assert (one.stages, two.stages) == (None, ("formation", "grading"))
    assert (rs.stages, rs.stage_overdue_h) == (("formation", "aging", "grading"), 240.0)
    assert rs.aging == AgingSettings(5.0, -0.25, 23.0)
    assert rs.screens == (Screen("self_discharge", "k_value_mV_per_day", 4.5, 40, "high"),)
    assert rs.grades == (Grade("A", (("grading_capacity_Ah", 12.5, 13.0),)),)
    assert rs.lot_quiet_h == 12.0
    assert (rs.record_counts, rs.retests) == ("worst", 2)
    assert (rs.release_hazards, rs.review_wait_h) == (("lithium_plating", "sodium_plating"), 8.0)


def test_defaults_fill_what_a_file_leaves_out() -> None:
    rs = load_rule_set(EXAMPLE, "rules/demo.toml")
    assert rs.plateau == PlateauSettings()
    assert (rs.dcir_pulse_s, rs.relax_s, rs.rest_current_fraction) == (10.0, 600.0, 0.002)
    assert rs.program == Program()
    assert (rs.cell_types[0].min_voltage_v, rs.cell_types[0].max_voltage_v) == (-0.1, 5.0)
    assert rs.rules[0].if_missing == "hold" and rs.rules[0].cell_types == ()
    assert (rs.decision, rs.rules[0].decision) == ("simple acceptance", None)


def test_sha256_is_of_the_text_as_given_and_crlf_files_load_with_right_lines() -> None:
    import hashlib

    text = MINIMAL.format(cell_type="A")
    crlf = text.replace("\n", "\r\n")
    assert load_rule_set(text, "a").sha256 == hashlib.sha256(text.encode()).hexdigest()
    assert load_rule_set(crlf, "a").sha256 == hashlib.sha256(crlf.encode()).hexdigest()
    broken = crlf.replace("low = 0.98", "lwo = 0.98")
    assert (
        _first_error(broken, "a") == "a, line 11: unknown key 'lwo' in [check.capacity].\n"
        "  Did you mean 'low'?"
    )


def test_a_byte_order_mark_is_accepted() -> None:
    assert load_rule_set("\ufeff" + MINIMAL.format(cell_type="A"), "a").name == "demo"


# ---------------------------------------------------------------- shipped rule files


def test_at_least_three_chemistries_ship() -> None:
    assert len(SHIPPED) >= 3


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_rule_file_loads_and_expects_plateaus(name: str) -> None:
    rs = load_rule_set((RULES_DIR / name).read_text(encoding="utf-8"), f"rules/{name}")
    assert len(rs.cell_types) >= 2
    assert {r.metric for r in rs.rules} >= PLATEAU_METRICS
    assert all(ct.name.startswith("DEMO-") for ct in rs.cell_types)  # invented names only


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_rule_file_opens_by_calling_its_values_placeholders(name: str) -> None:
    head = (RULES_DIR / name).read_text(encoding="utf-8")[:800]
    assert "starting point" in head and "placeholder" in head and "customer" in head


@pytest.mark.parametrize("name", SHIPPED)
def test_every_window_value_in_a_shipped_file_names_its_source(name: str) -> None:
    """Each low/high line has a comment naming a source or a marker (practice, memory, derived)."""
    marker = re.compile(r"practice|from memory|derived|et al\.|IEC \d|\b(19|20)\d\d\b")
    for number, line in enumerate((RULES_DIR / name).read_text(encoding="utf-8").splitlines(), 1):
        if re.match(r"\s*(low|high)\s*=", line):
            assert "#" in line and marker.search(line.split("#", 1)[1]), f"{name}, line {number}"


def test_shipped_folder_loads_as_one_rule_book() -> None:
    book = load_rules_dir(RULES_DIR)
    assert len(book.rule_sets) == len(SHIPPED)
    rule_set, cell_type = book.for_cell_type("DEMO-LFP-20A")
    assert (rule_set.name, cell_type.nominal_capacity_ah) == ("lfp-graphite", 20.0)
    assert check_rules_dir(RULES_DIR) == []


# ---------------------------------------------------------------- folders and the rule book


def _write(folder: Path, name: str, cell_type: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / name).write_text(MINIMAL.format(cell_type=cell_type), encoding="utf-8")


def test_a_cell_type_in_two_files_names_both_files_and_lines(tmp_path: Path) -> None:
    _write(tmp_path, "a.toml", "DEMO-X")
    _write(tmp_path, "b.toml", "DEMO-X")
    message = (
        f"{tmp_path / 'b.toml'}, line 6: cell type 'DEMO-X' is also declared in "
        f"{tmp_path / 'a.toml'}, line 6.\n  Keep each cell type in one rule file only, "
        "so that it has one set of acceptance windows."
    )
    with pytest.raises(RulesError) as caught:
        load_rules_dir(tmp_path)
    assert str(caught.value) == message
    assert [str(e) for e in check_rules_dir(tmp_path)] == [message]


def test_rule_book_refuses_duplicates_when_built_directly() -> None:
    one = load_rule_set(MINIMAL.format(cell_type="DEMO-X"), "rules/one.toml")
    two = load_rule_set(MINIMAL.format(cell_type="DEMO-X"), "rules/two.toml")
    with pytest.raises(RulesError, match=r"also declared in rules/one\.toml, line 6"):
        RuleBook((one, two))


def test_rules_dir_reads_only_toml_files_directly_in_it(tmp_path: Path) -> None:
    _write(tmp_path, "a.toml", "DEMO-A")
    _write(tmp_path / "profiles", "b.toml", "DEMO-B")
    (tmp_path / "notes.txt").write_text("not a rule file", encoding="utf-8")
    book = load_rules_dir(tmp_path)
    assert book.cell_types == ("DEMO-A",)
    assert book.rule_sets[0].source == str(tmp_path / "a.toml")


def test_missing_and_empty_rule_folders_are_errors(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere"
    assert [str(e) for e in check_rules_dir(missing)] == [
        f"{missing}: rule folder not found.\n"
        "  Create it, or give the folder that holds the rule files."
    ]
    with pytest.raises(RulesError) as caught:
        load_rules_dir(tmp_path)
    assert str(caught.value) == (
        f"{tmp_path}: no rule files (*.toml) in this folder.\n"
        "  Add at least one rule file; docs/rules.md describes them."
    )


def test_a_file_that_is_not_utf8_names_its_line(tmp_path: Path) -> None:
    (tmp_path / "latin.toml").write_bytes(b'[rule_set]\nname = "caf\xe9"\n')
    message = (
        f"{tmp_path / 'latin.toml'}, line 2, column 12: not UTF-8 text.\n"
        "  Save the file with UTF-8 encoding."
    )
    assert [str(e) for e in check_rules_dir(tmp_path)] == [message]
    with pytest.raises(RulesError) as caught:
        load_rules_dir(tmp_path)
    assert str(caught.value) == message


def test_unknown_cell_type_names_the_data_file_and_suggests_a_close_one() -> None:
    book = load_rules_dir(RULES_DIR)
    with pytest.raises(InputError) as caught:
        book.for_cell_type("DEMO-LFP-2OA", source="inbox/DEMO-LOT-01_L01-001.csv")
    assert str(caught.value) == (
        "inbox/DEMO-LOT-01_L01-001.csv: no rule set covers cell type 'DEMO-LFP-2OA'.\n"
        "  Did you mean 'DEMO-LFP-20A'? Known cell types: DEMO-LFP-100P, DEMO-LFP-20A, "
        "DEMO-LTO-10P, DEMO-LTO-30P, DEMO-NA-10A, DEMO-NA-40P, DEMO-NMC-5A, DEMO-NMC-5S, DEMO-NMC-60P. "
        "Correct the file's cell_type, "
        "or declare the type in a rule file."
    )


def test_unknown_cell_type_without_a_close_one_lists_the_known() -> None:
    book = RuleBook((load_rule_set(MINIMAL.format(cell_type="DEMO-A"), "r.toml"),))
    with pytest.raises(InputError) as caught:
        book.for_cell_type("ZZZ")
    assert str(caught.value) == (
        "no rule set covers cell type 'ZZZ'.\n  Known cell types: DEMO-A. Correct the file's "
        "cell_type, or declare the type in a rule file."
    )


# ---------------------------------------------------------------- line locator


def test_locator_finds_keys_past_multiline_values_and_in_dotted_forms() -> None:
    text = (
        'a = [\n  "x = 1",  # [not.a.table]\n  "]",\n]\n'  # lines 1-4
        's = """\n[fake]\nk = 2\n"""\n'  # lines 5-8
        "[t.'q q']\n"  # line 9
        "k.j = 1\n"  # line 10
        '"b.c" = 2\n'  # line 11
    )
    tomllib.loads(text)  # the text is valid TOML
    where = Locator(text)
    assert where.line((), "s") == 5
    assert where.line(("fake",)) is None
    assert where.line(("t", "q q")) == 9
    assert where.line(("t", "q q", "k"), "j") == 10
    assert where.line(("t", "q q"), "b.c") == 11
    assert where.line(("t", "q q"), "absent") == 9
    assert where.line(("t",)) == 9
    assert where.raw_value(("t", "q q"), "b.c") == "2"
    assert where.raw_value(("t", "q q"), "k") is None  # only a prefix of the dotted key k.j
    assert where.raw_value((), "nowhere") is None


# ---------------------------------------------------------------- loading never crashes


@settings(max_examples=300, deadline=None)
@given(st.text())
def test_any_text_loads_or_gives_a_rules_error(text: str) -> None:
    try:
        load_rule_set(text, "r.toml")
    except RulesError as error:
        assert error.where is not None and error.where.path == "r.toml"


@settings(max_examples=200, deadline=None)
@given(st.data())
def test_a_shipped_file_with_a_line_removed_loads_or_names_a_line(data: st.DataObject) -> None:
    lines = (RULES_DIR / "lfp_graphite.toml").read_text(encoding="utf-8").splitlines()
    drop = data.draw(st.integers(0, len(lines) - 1))
    text = "\n".join(lines[:drop] + lines[drop + 1 :]) + "\n"
    try:
        load_rule_set(text, "r.toml")
    except RulesError as error:
        assert error.where is not None


# ---------------------------------------------------------------- generated documentation


def test_docs_rules_md_is_generated_from_the_schema() -> None:
    docs = (REPO / "docs" / "rules.md").read_text(encoding="utf-8")
    assert docs == render_docs(), "run: python -m pipeline.rulebook.schema > docs/rules.md"
    assert (
        docs.splitlines()[0].startswith("_Generated by") and "do not edit" in docs.splitlines()[0]
    )


def test_the_documented_command_prints_the_docs() -> None:
    import subprocess
    import sys

    printed = subprocess.run(
        [sys.executable, "-m", "pipeline.rulebook.schema"],
        cwd=REPO,
        capture_output=True,
        text=True,
        check=True,
        encoding="utf-8",
    ).stdout
    assert printed == render_docs()


def test_every_accepted_key_and_metric_is_documented() -> None:
    docs = render_docs()
    for table in TABLES:
        section = docs.split(f"## {table.header}", 1)[1].split("\n## ", 1)[0]
        for key in table.keys:
            row = next(
                line for line in section.splitlines() if line.startswith(f"| `{key.name}` |")
            )
            assert key.kind in row and key.meaning.replace("|", "\\|") in row
    for metric in METRIC_NAMES:
        assert f"| `{metric}` |" in docs
    for (_, old), new in RENAMED.items():
        assert f"| `{old}` | `{new}` |" in docs


@pytest.mark.parametrize("table", TABLES, ids=lambda t: t.name)
def test_the_loader_accepts_no_key_the_schema_lacks(table: Table) -> None:
    if table.name == "rule_set":
        text = EXAMPLE.replace("[rule_set]\n", "[rule_set]\nnot_a_key = 1\n")
    else:
        text = EXAMPLE + f"\n[{table.name}{'.Y' if table.named else ''}]\nnot_a_key = 1\n"
    if table.name == "grade":  # a grade's keys are metric names
        assert "names 'not_a_key', which is not a metric" in _first_error(text, "r.toml")
        return
    assert "unknown key 'not_a_key'" in _first_error(text, "r.toml")


def test_schema_names_only_real_metrics() -> None:
    assert set(FRACTION_METRICS) <= set(METRIC_NAMES)
    assert all(old != new for (_, old), new in RENAMED.items())


def test_a_changed_text_under_a_revision_that_judged_cells_is_a_located_problem(tmp_path: Path) -> None:
    """One revision stands for one text: results and certificates name rule sets by revision."""
    shutil.copy(RULES_DIR / "lfp_graphite.toml", tmp_path / "lfp_graphite.toml")
    [judging] = load_rules_dir(tmp_path).rule_sets
    judged = [(judging.name, judging.revision, judging.sha256)]
    assert reused_revisions([judging], judged) == []  # the same text
    rule_file = tmp_path / "lfp_graphite.toml"
    text = rule_file.read_text(encoding="utf-8")
    rule_file.write_text(text.replace("\nlow = 1.00 ", "\nlow = 1.02 ", 1), encoding="utf-8")
    [edited] = load_rules_dir(tmp_path).rule_sets
    [problem] = reused_revisions([edited], judged)
    line = next(n for n, row in enumerate(text.splitlines(), 1) if row.startswith("revision"))
    assert problem.where is not None and problem.where.line == line
    assert f"revision '{judging.revision}' judged cells with another text" in str(problem)
    assert "new revision" in (problem.hint or "")
    assert reused_revisions([edited], []) == []  # a revision that judged nothing may be edited
    rule_file.write_text(rule_file.read_text(encoding="utf-8").replace(
        f'revision = "{judging.revision}"', 'revision = "2099-01-01.1"'), encoding="utf-8")
    [revised] = load_rules_dir(tmp_path).rule_sets
    assert reused_revisions([revised], judged) == []  # the changed text under a new revision
