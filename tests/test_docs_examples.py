"""Examples in docs/cli.md that show a command's output are that command's real output
(rules check, check, profile show; the station commands' examples name times and folders of
one run, and are not checked here).

Each example is found in the page by the command line it shows (``$ formgate ...``), the
folder it names is built in a temporary directory as the page tells it (the shipped rules,
or a station's rules with the edits the example describes), the command is run through
``main(argv)`` there, and its standard output and error must be the lines the page shows,
whole. An example that drifts from the code (a count of shipped files, a line number, a
message's wording) fails here.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from pipeline.cli.main import main
from pipeline.shipped import RULES_DIR

REPO = Path(__file__).resolve().parents[1]
CLI_DOC = (REPO / "docs" / "cli.md").read_text(encoding="utf-8")


def shown_after(command: str) -> list[str]:
    """The lines docs/cli.md shows after ``$ <command>``, up to the next prompt or the block's end."""
    found = re.search(rf"^\$ {re.escape(command)}\n((?:(?!\$ |```).*\n)*)", CLI_DOC, re.M)
    assert found, f"docs/cli.md shows no example of '$ {command}'"
    return found.group(1).splitlines()


def _station_rules(root: Path) -> None:
    """The example's station rules: the shipped ones, with a resistance check whose low bound
    someone added above its high one, and a lab profile with a current sign it does not know."""
    rules = root / "station" / "rules"
    shutil.copytree(RULES_DIR, rules)
    lfp = rules / "lfp_graphite.toml"
    lfp.write_text(lfp.read_text(encoding="utf-8").replace("[check.dcir_20A]\n", "[check.dcir_20A]\nlow = 20.0\n"),
                   encoding="utf-8")
    (rules / "profiles" / "lab.toml").write_text('[units]\ncurrent_sign = "negative"\n', encoding="utf-8")


def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, list[str]]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, (out + err).splitlines()


def test_rules_check_of_the_shipped_rules_shows_what_the_command_prints(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    shutil.copytree(RULES_DIR, tmp_path / "rules")
    monkeypatch.chdir(tmp_path)
    code, lines = _run(["rules", "check", "rules/"], capsys)
    assert code == 0 and lines == shown_after("formgate rules check rules/")


def test_rules_check_of_broken_station_rules_shows_what_the_command_prints(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _station_rules(tmp_path)
    monkeypatch.chdir(tmp_path)
    code, lines = _run(["rules", "check", "station/rules/"], capsys)
    assert code == 2 and lines == shown_after("formgate rules check station/rules/")


def test_the_exit_codes_example_is_the_first_problem_rules_check_prints(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """The located problem under "Exit codes" is the one `rules check` prints for the example's file."""
    _station_rules(tmp_path)
    monkeypatch.chdir(tmp_path)
    _, lines = _run(["rules", "check", "station/rules/"], capsys)
    block = re.search(r"^## Exit codes\n.*?```\n(.*?)```", CLI_DOC, re.M | re.S)
    assert block, "docs/cli.md: no example block under 'Exit codes'"
    shown = block.group(1).splitlines()
    assert ["station/" + shown[0], shown[1]] == lines[:2]


def _check_inbox(root: Path) -> None:
    """The example's inbox: three demo cells of lot 1 (a pass, a DCIR fail, a hot fail) and a
    file without a cell id."""
    from pipeline.demo.lots import DEMO_CELLS, demo_file_bytes

    inbox = root / "inbox"
    inbox.mkdir()
    for index in (0, 10, 13):
        cell = DEMO_CELLS[index]
        (inbox / cell.file_name).write_bytes(demo_file_bytes(cell))
    (inbox / "bad.csv").write_text("time_s,voltage_V,current_A\n0,3.3,0\n", encoding="utf-8")
    shutil.copytree(RULES_DIR, root / "rules")


def test_check_shows_what_the_command_prints_with_its_exit_code(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _check_inbox(tmp_path)
    monkeypatch.chdir(tmp_path)
    files = sorted(str(p.relative_to(tmp_path)) for p in (tmp_path / "inbox").glob("*.csv"))
    # the shell sorts the glob the same way: bad.csv after the DEMO- files
    files = sorted(files, key=lambda f: (f.endswith("bad.csv"), f))
    code, lines = _run(["check", *files, "--rules", "rules/", "--out", "out/"], capsys)
    assert lines == shown_after("formgate check inbox/*.csv --rules rules/ --out out/")
    after = CLI_DOC.split("$ formgate check inbox/*.csv", 1)[1].split("```", 1)[0]
    assert after.rstrip("\n").endswith(f"$ echo $?\n{code}") and code == 2


def test_profile_show_shows_what_the_command_prints(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    shutil.copytree(RULES_DIR, tmp_path / "rules")
    (tmp_path / "inbox").mkdir()
    shutil.copy(REPO / "tests" / "data" / "traces" / "good" / "LOT-A7_CELL-0012.csv", tmp_path / "inbox")
    monkeypatch.chdir(tmp_path)
    command = "profile show rules/profiles/semicolon_decimal_comma.toml inbox/LOT-A7_CELL-0012.csv"
    code, lines = _run(command.split(), capsys)
    assert code == 0 and lines == shown_after(f"formgate {command}")
