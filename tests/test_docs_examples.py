"""Examples in docs/cli.md that show a command's output are that command's real output.

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
