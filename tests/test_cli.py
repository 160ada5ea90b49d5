"""The command line end to end: main(argv) on real files in temporary folders, whole lines checked."""

from __future__ import annotations

import functools
import json
import shutil
from pathlib import Path

import jsonschema
import pypdf
import pytest

from pipeline import __version__
from pipeline.cli.exits import EXIT_BUG
from pipeline.cli.main import main, report_bug
from pipeline.demo.cycletext import to_cycle_file
from pipeline.demo.lots import DEMO_CELLS, demo_file_bytes, demo_metadata, demo_record
from pipeline.names import safe_name
from pipeline.report.result import schema_text
from tests.conftest import REPO, RULES_DIR

RULES = str(RULES_DIR)
ANALYSED_AT = "2026-12-01T08:00:00+00:00"
GOOD, HIGH_DCIR, HOT = DEMO_CELLS[0], DEMO_CELLS[10], DEMO_CELLS[13]
assert (GOOD.defect, HIGH_DCIR.defect, HOT.defect) == ("", "high_dcir", "over_temperature")

# the file's name, the cell it holds, the verdict and what decided it
GOOD_LINE = f"{GOOD.file_name}  L01-001  pass  all checks in window"
# the one-line output names the deciding check with its value and the bound it crossed
HIGH_DCIR_LINE = f"{HIGH_DCIR.file_name}  L01-011  fail  dcir_mOhm 11.98 ± 0.33 mOhm > 8.00 mOhm (reject)"
HOT_LINE = (
    f"{HOT.file_name}  L01-014  fail  max_temperature_C 62.7 ± 1.2 °C > 60.0 °C (reject) "
    "[hazard: over_temperature]"
)


@functools.cache
def _cell_text(index: int, **metadata: str) -> str:
    """The demo cell's cycle file as text, with some metadata replaced (simulated once per cell)."""
    cell = DEMO_CELLS[index]
    return to_cycle_file(demo_record(cell), {**demo_metadata(cell), **metadata})


@functools.cache
def _cell_bytes(index: int) -> bytes:
    return demo_file_bytes(DEMO_CELLS[index])


def write_cell(folder: Path, index: int, name: str | None = None) -> Path:
    """Write demo cell ``index`` of DEMO_CELLS into ``folder``; return its path."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / (name or DEMO_CELLS[index].file_name)
    path.write_bytes(_cell_bytes(index))
    return path


def write_bad_row(folder: Path) -> Path:
    """A good cell's file with one voltage that is not a number, on line 21, column 2."""
    lines = _cell_bytes(0).decode("utf-8").split("\n")
    assert lines[20].startswith("120.0,1.99995,")
    lines[20] = lines[20].replace(",", ",x", 1)
    path = folder / "bad-row.csv"
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


BAD_ROW_LINES = [
    "{path}  error  {path}, line 21, column 2: voltage_V is 'x1.99995', not a number.",
    "    Fix the value, or leave it empty if it is missing.",
]


def files_under(folder: Path) -> dict[Path, bytes]:
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


# ---- check -----------------------------------------------------------------------------------


def test_check_good_cell_passes_with_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path, 0)
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", ANALYSED_AT]) == 0
    out, err = capsys.readouterr()
    assert out == GOOD_LINE + "\n"
    assert err == ""


@pytest.mark.parametrize(("index", "line"), [(10, HIGH_DCIR_LINE), (13, HOT_LINE)])
def test_check_failed_cell_exits_1_with_its_reason(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], index: int, line: str
) -> None:
    path = write_cell(tmp_path, index)
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", ANALYSED_AT]) == 1
    assert capsys.readouterr() == (line + "\n", "")


def test_check_bad_file_exits_2_with_located_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = write_bad_row(tmp_path)
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", ANALYSED_AT]) == 2
    out, err = capsys.readouterr()
    assert out.splitlines() == [line.format(path=path) for line in BAD_ROW_LINES]
    assert err == ""


def test_check_says_an_ocv_reading_file_goes_to_a_station(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file

    path = tmp_path / "DEMO-LOT-04_aging-readings.csv"
    path.write_bytes(demo_aging_file(DEMO_STAGED_CELLS[:3]))
    good = write_cell(tmp_path, 0)
    argv = ["check", str(path), str(good), "--rules", RULES, "--analysed-at", ANALYSED_AT]
    assert main(argv) == 2
    out, err = capsys.readouterr()
    assert out.splitlines() == [
        f"{path}  error  {path}: an OCV reading file (6 readings of 3 cells of lot DEMO-LOT-04), "
        "not a cycle file: formgate check judges one cell's cycle file at a time.",
        "    Drop it into a station's inbox (formgate watch): the station keeps the readings "
        "and decides each cell's aging stage with the cell's other records.",
        GOOD_LINE.replace(GOOD.file_name, good.name),
    ]
    assert err == ""


def test_check_missing_file_exits_2_naming_it(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "not-there.csv"
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", ANALYSED_AT]) == 2
    assert capsys.readouterr().out.splitlines() == [
        f"{path}  error  {path}: cannot read the file (No such file or directory).",
        "    Check the path and its permissions.",
    ]


@pytest.mark.parametrize(
    ("kinds", "expected"),
    [
        (("pass", "fail"), 1),
        (("fail", "pass"), 1),
        (("pass", "error"), 2),
        (("error", "fail", "pass"), 2),
        (("fail", "error"), 2),
    ],
)
def test_check_worst_outcome_wins(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], kinds: tuple[str, ...], expected: int
) -> None:
    # cli.py: 0 every cell passed, 1 a cell failed or was held, 2 a file could not be judged
    makers = {
        "pass": lambda: write_cell(tmp_path, 0),
        "fail": lambda: write_cell(tmp_path, 10),
        "error": lambda: write_bad_row(tmp_path),
    }
    paths = [makers[kind]() for kind in kinds]
    argv = ["check", *map(str, paths), "--rules", RULES, "--analysed-at", ANALYSED_AT, "--no-pdf"]
    assert main(argv) == expected
    lines = capsys.readouterr().out.splitlines()
    words = ("pass", "fail", "hold", "error")
    verdicts = [
        next(w for w in line.split("  ") if w in words) for line in lines if not line.startswith(" ")
    ]
    assert verdicts == list(kinds)  # one line per file, in the order given


def test_check_names_each_file_and_notes_a_cell_given_twice(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    first, again = write_cell(tmp_path / "in", 0), write_cell(tmp_path / "in", 0, "copy.csv")
    argv = ["check", str(first), str(again), "--rules", RULES, "--out", str(tmp_path / "out")]
    assert main([*argv, "--analysed-at", ANALYSED_AT, "--no-pdf"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0] == GOOD_LINE and out[1] == GOOD_LINE.replace(GOOD.file_name, "copy.csv")
    # with --no-pdf only the result was written, and only it is named
    assert out[2] == (
        f"    note: {GOOD.file_name} holds the same cell; this file's result replaced that "
        "one's in the output folder"
    )
    assert len(out) == 3


def test_check_notes_a_certificate_replaced_only_when_one_was_written(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    first, again = write_cell(tmp_path / "in", 0), write_cell(tmp_path / "in", 0, "copy.csv")
    argv = ["check", str(first), str(again), "--rules", RULES, "--out", str(tmp_path / "out")]
    assert main([*argv, "--analysed-at", ANALYSED_AT]) == 0
    assert capsys.readouterr().out.splitlines()[2] == (
        f"    note: {GOOD.file_name} holds the same cell; this file's result and certificate "
        "replaced that one's in the output folder"
    )


def test_check_keeps_a_cells_formation_and_grading_files_apart_without_a_note(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_stage_files, stage_file_name

    cell = DEMO_STAGED_CELLS[0]
    (tmp_path / "in").mkdir()
    paths = []
    for stage, data in demo_stage_files(cell).items():
        paths.append(tmp_path / "in" / stage_file_name(cell, stage))
        paths[-1].write_bytes(data)
    again = tmp_path / "in" / "grading-again.csv"
    again.write_bytes(paths[1].read_bytes())
    out = tmp_path / "out"
    argv = ["check", *map(str, paths), str(again), "--rules", RULES, "--out", str(out)]
    assert main([*argv, "--analysed-at", ANALYSED_AT, "--no-pdf"]) == 0
    lines = capsys.readouterr().out.splitlines()
    # two stages of one cell are two outputs: neither replaced the other
    assert [line.split("  ")[:3] for line in lines[:3]] == [
        [paths[0].name, cell.cell_id, "pass"],
        [paths[1].name, cell.cell_id, "pass"],
        ["grading-again.csv", cell.cell_id, "pass"],
    ]
    assert lines[3:] == [
        f"    note: {paths[1].name} holds the same cell and stage (grading); this file's result "
        "replaced that one's in the output folder"
    ]
    assert sorted(p.name for p in (out / "results" / cell.lot).iterdir()) == [
        f"{cell.cell_id}~formation.json", f"{cell.cell_id}~grading.json"
    ]


def test_check_with_import_profile(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A cycle file in the shipped tab-separated layout (ms, mA, '//' metadata) reads as v1 does."""
    head, _, body = _cell_text(0).rpartition("time_s,")
    rows = [line.split(",") for line in ("time_s," + body).strip().split("\n")]
    assert rows[0] == ["time_s", "voltage_V", "current_A", "temperature_C", "step", "cycle"]
    text = "".join("//" + line[1:] + "\n" for line in head.strip().split("\n"))
    text += "t_ms\tU_V\tI_mA\tT_degC\n"
    for t, v, i, temp, *_ in rows[1:]:
        text += f"{float(t) * 1000:.0f}\t{v}\t{float(i) * 1000:.2f}\t{temp}\n"
    path = tmp_path / "tab-log.txt"
    path.write_text(text, encoding="utf-8")
    profile = RULES_DIR / "profiles" / "tab_separated_ms.toml"
    argv = ["check", str(path), "--rules", RULES, "--profile", str(profile), "--analysed-at", ANALYSED_AT]
    assert main(argv) == 0
    assert capsys.readouterr() == (GOOD_LINE.replace(GOOD.file_name, "tab-log.txt") + "\n", "")


def test_check_help_names_what_it_reads(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as done:
        main(["check", "--help"])
    assert done.value.code == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "FILE cycle files: version 1 text (.csv or .csv.gz) or, through --profile," in text
    for kind in ("delimited text", ".xlsx", ".xls", ".ods", "Parquet"):
        assert kind in text, kind


def test_check_out_twice_gives_identical_files_that_match_the_schema(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    inbox = tmp_path / "inbox"
    paths = [write_cell(inbox, 0), write_cell(inbox, 13)]
    for out in ("out1", "out2"):
        argv = ["check", *map(str, paths), "--rules", RULES, "--out", str(tmp_path / out)]
        assert main([*argv, "--analysed-at", ANALYSED_AT]) == 1
    assert capsys.readouterr() == (f"{GOOD_LINE}\n{HOT_LINE}\n" * 2, "")
    first, second = files_under(tmp_path / "out1"), files_under(tmp_path / "out2")
    assert sorted(map(str, first)) == [
        "certificates/DEMO-LOT-01/L01-001.pdf",
        "certificates/DEMO-LOT-01/L01-014.pdf",
        "results/DEMO-LOT-01/L01-001.json",
        "results/DEMO-LOT-01/L01-014.json",
    ]
    assert first == second

    schema_file = REPO / "docs" / "result.schema.json"
    assert schema_file.read_text(encoding="utf-8") == schema_text(), (
        "run: python -m pipeline.report.result > docs/result.schema.json"
    )
    validator = jsonschema.Draft202012Validator(json.loads(schema_text()))
    for name in ("L01-001", "L01-014"):
        document = json.loads(first[Path(f"results/DEMO-LOT-01/{name}.json")])
        validator.validate(document)
        assert document["cell"]["cell_id"] == name
        assert document["analysed_at"] == ANALYSED_AT


def test_check_no_pdf_writes_json_only(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path / "inbox", 0)
    argv = ["check", str(path), "--rules", RULES, "--out", str(tmp_path / "out"), "--no-pdf"]
    assert main([*argv, "--analysed-at", ANALYSED_AT]) == 0
    assert list(files_under(tmp_path / "out")) == [Path("results/DEMO-LOT-01/L01-001.json")]


def test_hostile_cell_ids_stay_literal_and_inside_out(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    html_id, climbing_id, climbing_lot = "<img src=file:///etc/passwd>", "../../etc/x", "../../lots"
    run = tmp_path / "run"
    inbox = run / "inbox"
    inbox.mkdir(parents=True)
    (inbox / "html.csv").write_text(_cell_text(0, cell_id=html_id), encoding="utf-8")
    (inbox / "climb.csv").write_text(_cell_text(0, cell_id=climbing_id, lot=climbing_lot), encoding="utf-8")
    before = files_under(tmp_path)
    out = run / "out"
    argv = ["check", str(inbox / "html.csv"), str(inbox / "climb.csv"), "--rules", RULES]
    assert main([*argv, "--out", str(out), "--analysed-at", ANALYSED_AT]) == 0
    assert capsys.readouterr() == (
        f"html.csv  {html_id}  pass  all checks in window\n"
        f"climb.csv  {climbing_id}  pass  all checks in window\n",
        "",
    )

    written = set(files_under(out))
    assert written == {
        Path("results/DEMO-LOT-01", f"{safe_name(html_id)}.json"),
        Path("certificates/DEMO-LOT-01", f"{safe_name(html_id)}.pdf"),
        Path("results", safe_name(climbing_lot), f"{safe_name(climbing_id)}.json"),
        Path("certificates", safe_name(climbing_lot), f"{safe_name(climbing_id)}.pdf"),
    }
    for relative in written:
        assert (out / relative).resolve().is_relative_to(out.resolve())
    # nothing else appeared anywhere in the temporary folder, and nothing outside it
    outside = {p: data for p, data in files_under(tmp_path).items() if not (tmp_path / p).is_relative_to(out)}
    assert outside == before
    assert not Path("/etc/x").exists()

    for cell_id, lot in ((html_id, "DEMO-LOT-01"), (climbing_id, climbing_lot)):
        pdf = out / "certificates" / safe_name(lot) / f"{safe_name(cell_id)}.pdf"
        text = pypdf.PdfReader(pdf).pages[0].extract_text()
        assert f"Cell ID {cell_id}" in text.splitlines()
        document = json.loads((out / "results" / safe_name(lot) / f"{safe_name(cell_id)}.json").read_text())
        assert (document["cell"]["cell_id"], document["cell"]["lot"]) == (cell_id, lot)


def test_analysed_at_without_time_zone_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path, 0)
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", "2026-12-01T08:00:00"]) == 2
    assert capsys.readouterr() == (
        "",
        "--analysed-at '2026-12-01T08:00:00' has no time zone.\n  Add one, e.g. 2026-12-01T08:00:00+00:00.\n",
    )


def test_analysed_at_that_is_not_a_time_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path, 0)
    assert main(["check", str(path), "--rules", RULES, "--analysed-at", "yesterday"]) == 2
    assert capsys.readouterr().err == (
        "--analysed-at 'yesterday' is not a date and time.\n"
        "  Write it in ISO 8601 with a time zone, e.g. 2026-12-01T08:00:00+00:00.\n"
    )


def test_missing_profile_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path, 0)
    argv = ["check", str(path), "--rules", RULES, "--profile", str(tmp_path / "none.toml")]
    assert main([*argv, "--analysed-at", ANALYSED_AT]) == 2
    assert capsys.readouterr().err == (
        f"{tmp_path / 'none.toml'}: No such file or directory.\n  Check the path and its permissions.\n"
    )


def test_out_that_is_a_file_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = write_cell(tmp_path / "inbox", 0)
    (tmp_path / "out").write_text("not a folder", encoding="utf-8")
    argv = ["check", str(path), "--rules", RULES, "--out", str(tmp_path / "out")]
    assert main([*argv, "--analysed-at", ANALYSED_AT]) == 2


def test_check_with_broken_rules_exits_2_before_reading_files(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "broken.toml").write_text(BROKEN_RULES, encoding="utf-8")
    path = write_cell(tmp_path, 0)
    assert main(["check", str(path), "--rules", str(rules), "--analysed-at", ANALYSED_AT]) == 2
    assert capsys.readouterr() == ("", broken_rules_message(rules / "broken.toml") + "\n")


# ---- the bug path ----------------------------------------------------------------------------


def test_bug_report_is_one_line_and_a_log(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    # No command of formgate reaches this path on purpose, so it is given a real exception.
    monkeypatch.setenv("FORMGATE_HOME", str(tmp_path / "home"))
    try:
        raise KeyError("missing")
    except KeyError as exc:
        assert report_bug(exc) == EXIT_BUG
    log = tmp_path / "home" / "formgate-crash.log"
    assert capsys.readouterr() == (
        "",
        f"formgate: internal error: KeyError: 'missing'. This is a bug; details are in {log}.\n",
    )
    text = log.read_text(encoding="utf-8")
    assert text.startswith(f"formgate {__version__}, Python ")
    assert "Traceback (most recent call last):" in text
    assert text.rstrip().endswith("KeyError: 'missing'")


# ---- rules check -----------------------------------------------------------------------------

BROKEN_RULES = """\
[rule_set]
name = "test-broken"
revision = "1"
chemistry = "LFP/graphite"

[cell_type.TEST-BROKEN-1]
nominal_capacity_Ah = 10.0

[check.dcir]
metric = "dcir_mOhm"
low = 20.0
high = 8.0
severity = "reject"
message = "DC resistance out of window."
"""


def broken_rules_message(path: Path) -> str:
    return (
        f"{path}, line 12: [check.dcir] high = 8.0 mOhm is below low = 20.0 mOhm.\n"
        "  Swap the two values, or check that both are in milliohms."
    )


BROKEN_PROFILE = '[units]\ncurrent = "mA"\ncurrent_sign = "negative"\n'


def broken_profile_message(path: Path) -> str:
    return (
        f'{path}, line 3: [units] current_sign = "negative" is not one of "charge positive", '
        '"discharge positive", "from mode".\n'
        '  Use one of "charge positive", "discharge positive", "from mode".'
    )


def test_rules_check_shipped_rules(capsys: pytest.CaptureFixture[str]) -> None:
    rule_files = len(list(RULES_DIR.glob("*.toml")))
    profiles = len(list((RULES_DIR / "profiles").glob("*.toml")))
    assert profiles == 7
    assert main(["rules", "check", RULES]) == 0
    assert capsys.readouterr() == (
        f"{RULES}: {rule_files} rule files and {profiles} import profiles, all valid\n",
        "",
    )


def test_rules_check_broken_rule_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rules = tmp_path / "rules"
    shutil.copytree(RULES_DIR, rules)
    (rules / "broken.toml").write_text(BROKEN_RULES, encoding="utf-8")
    assert main(["rules", "check", str(rules)]) == 2
    assert capsys.readouterr() == (
        "",
        broken_rules_message(rules / "broken.toml") + f"\n1 problem(s) found in {rules}\n",
    )


def test_rules_check_broken_profile(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rules = tmp_path / "rules"
    shutil.copytree(RULES_DIR, rules)
    (rules / "profiles" / "lab.toml").write_text(BROKEN_PROFILE, encoding="utf-8")
    assert main(["rules", "check", str(rules)]) == 2
    assert capsys.readouterr() == (
        "",
        broken_profile_message(rules / "profiles" / "lab.toml") + f"\n1 problem(s) found in {rules}\n",
    )


def test_rules_check_reports_every_problem_of_rules_and_profiles(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rules = tmp_path / "rules"
    (rules / "profiles").mkdir(parents=True)
    (rules / "broken.toml").write_text(BROKEN_RULES, encoding="utf-8")
    (rules / "profiles" / "a.toml").write_text(BROKEN_PROFILE, encoding="utf-8")
    (rules / "profiles" / "b.toml").write_bytes(b'[file]\nencoding = "caf\xe9"\n')
    (rules / "profiles" / "notes.txt").write_text("not a profile", encoding="utf-8")
    assert main(["rules", "check", str(rules)]) == 2
    assert capsys.readouterr().err.splitlines() == [
        *broken_rules_message(rules / "broken.toml").splitlines(),
        *broken_profile_message(rules / "profiles" / "a.toml").splitlines(),
        f"{rules / 'profiles' / 'b.toml'}, line 2, column 16: not UTF-8 text.",
        "  Save the file with UTF-8 encoding.",
        f"3 problem(s) found in {rules}",
    ]


def test_rules_check_without_profiles_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rules = tmp_path / "rules"
    rules.mkdir()
    shutil.copy(RULES_DIR / "lfp_graphite.toml", rules)
    assert main(["rules", "check", str(rules)]) == 0
    assert capsys.readouterr() == (f"{rules}: 1 rule file, all valid\n", "")


def test_rules_check_missing_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    folder = tmp_path / "nowhere"
    assert main(["rules", "check", str(folder)]) == 2
    assert capsys.readouterr() == (
        "",
        f"{folder}: rule folder not found.\n"
        "  Create it, or give the folder that holds the rule files.\n"
        f"1 problem(s) found in {folder}\n",
    )


# ---- init and --version ----------------------------------------------------------------------


def test_init_creates_a_station_once(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    station = tmp_path / "station"
    assert main(["init", str(station)]) == 0
    out, err = capsys.readouterr()
    created = sum(1 for _ in station.rglob("*")) + 1  # the station folder itself
    assert out.splitlines() == [
        f"station created in {station} ({created} files and folders)",
        f"  edit {station / 'station.toml'}, then run: formgate watch {station}",
    ]
    assert err == ""
    assert (station / "station.toml").is_file()
    for shipped in [*RULES_DIR.glob("*.toml"), *RULES_DIR.glob("profiles/*.toml")]:
        copy = station / "rules" / shipped.relative_to(RULES_DIR)
        assert copy.read_bytes() == shipped.read_bytes()
    # the copied rules and profiles are valid as they stand
    assert main(["rules", "check", str(station / "rules")]) == 0
    capsys.readouterr()

    station_toml = (station / "station.toml").read_bytes()
    assert main(["init", str(station)]) == 2
    assert capsys.readouterr() == (
        "",
        f"{station / 'station.toml'}: a station file is already there.\n"
        "  formgate init never overwrites a station file: edit it, or give another folder.\n",
    )
    assert (station / "station.toml").read_bytes() == station_toml


def test_version(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr() == (f"formgate {__version__}\n", "")


def test_unknown_option_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["check", "--colour", "x.csv"])
    assert exit_info.value.code == 2
    assert capsys.readouterr().err.splitlines()[-1] == ("formgate: error: unrecognized arguments: --colour")


def test_mail_retry_says_how_to_send_parked_mail(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    import datetime

    from pipeline.ledger.ledger import Ledger
    from pipeline.mail.letters import Letter
    from tests.station_kit import make_station

    s = make_station(tmp_path / "st")
    when = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
    with Ledger(s.ledger, now=when) as ledger:
        letter = Letter("alert", "<p-1@demo.example>", ("maintenance@example.com",), "alert", "text")
        mail_id = ledger.outbox.queue(letter, now=when)
        lease = when + datetime.timedelta(minutes=10)
        assert ledger.outbox.claim(mail_id, owner="test", now=when, until=lease) is not None
        ledger.outbox.park(mail_id, owner="test", now=when, reply="550 no such mailbox")
    assert main(["mail", "retry", str(s.root)]) == 2
    out = capsys.readouterr().out
    assert out.splitlines() == [
        "sent 0, delayed 0, parked 0; outbox now 0 pending, 1 parked",
        "  1 parked mail(s) were not retried: fix what the server refused (see formgate status), "
        f"then run: formgate mail retry {s.root} --parked",
    ]
