"""The documentation keeps up with the code: every command and option, profiles, the result schema.

docs/rules.md and docs/station-settings.md are compared with their generators in
test_rulebook.py and test_settings.py.
"""

from __future__ import annotations

import argparse
import json
import re
from collections.abc import Iterator

import pytest

from pipeline.cli.main import build_parser
from pipeline.judge.metricdefs import METRICS
from pipeline.read.profile_docs import SHIPPED_PROFILES, read_examples, render_profiles_doc
from tests.conftest import REPO

CLI_DOC = (REPO / "docs" / "cli.md").read_text(encoding="utf-8")
README = (REPO / "README.md").read_text(encoding="utf-8")


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    return {
        name: sub
        for action in parser._actions
        if isinstance(action, argparse._SubParsersAction)
        for name, sub in action.choices.items()
    }


def commands(
    parser: argparse.ArgumentParser, path: tuple[str, ...] = ()
) -> Iterator[tuple[tuple[str, ...], argparse.ArgumentParser, str]]:
    """Every command that runs something: (words after `formgate`, its parser, its one-line help)."""
    helps = {
        choice.dest: choice.help or ""
        for action in parser._actions
        if isinstance(action, argparse._SubParsersAction)
        for choice in action._choices_actions
    }
    for name, sub in _subparsers(parser).items():
        if _subparsers(sub):
            yield from commands(sub, (*path, name))
        else:
            yield (*path, name), sub, helps[name]


COMMANDS = list(commands(build_parser()))
IDS = [" ".join(path) for path, _, _ in COMMANDS]


def section(path: tuple[str, ...]) -> str:
    """The text of `## formgate <path>` in docs/cli.md, up to the next heading of that level."""
    heading = "## formgate " + " ".join(path)
    found = re.search(rf"^{re.escape(heading)}\n(.*?)(?=^## |\Z)", CLI_DOC, re.M | re.S)
    assert found, f"docs/cli.md has no section '{heading}'"
    return found[1]


def one_line(text: str) -> str:
    return " ".join(text.split())


def test_walk_finds_every_command() -> None:
    # guards the walk itself: a nested command (rules check, mail retry) must be found
    assert {"check", "rules check", "mail retry"} <= set(IDS)


@pytest.mark.parametrize(("path", "parser", "help_text"), COMMANDS, ids=IDS)
def test_every_command_is_documented_with_its_usage(
    path: tuple[str, ...], parser: argparse.ArgumentParser, help_text: str
) -> None:
    text = section(path)
    usage = one_line(parser.format_usage()).removeprefix("usage: ")
    block = re.search(r"```\n(.*?)\n```", text, re.S)
    assert block and one_line(block[1]) == usage, f"usage of formgate {' '.join(path)}"
    # the overview table repeats each command's one-line help from `formgate --help`
    assert f"| [`formgate {' '.join(path)}`](#formgate-{'-'.join(path)}) | {help_text} |" in CLI_DOC
    assert f"$ formgate {' '.join(path)}" in text, "each command needs an example"
    assert "Exit codes:" in text


@pytest.mark.parametrize(("path", "parser", "help_text"), COMMANDS, ids=IDS)
def test_every_option_and_argument_is_documented(
    path: tuple[str, ...], parser: argparse.ArgumentParser, help_text: str
) -> None:
    text = section(path)
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction):
            continue  # -h / --help is described once for every command
        if action.option_strings:
            for option in action.option_strings:
                assert re.search(rf"\| `{re.escape(option)}[ `]", text), f"{option} has no table row"
        else:
            name = action.metavar or action.dest
            assert f"| `{name}` |" in text, f"{name} has no table row"


def test_top_level_options_are_documented() -> None:
    parser = build_parser()
    usage = one_line(parser.format_usage()).removeprefix("usage: ")
    assert f"```\n{usage}\n```" in CLI_DOC
    for action in parser._actions:
        for option in action.option_strings:
            assert f"`{option}`" in CLI_DOC, option


def test_every_documented_command_exists() -> None:
    documented = re.findall(r"^## formgate (.+)$", CLI_DOC, re.M)
    assert sorted(documented) == sorted(IDS)


def test_every_top_level_command_is_in_the_readme() -> None:
    for name in _subparsers(build_parser()):
        assert re.search(rf"\bformgate {name}\b", README), f"README.md does not show formgate {name}"


def test_profiles_doc_is_generated() -> None:
    docs = (REPO / "docs" / "profiles.md").read_text(encoding="utf-8")
    expected = render_profiles_doc(read_examples(SHIPPED_PROFILES))
    assert docs == expected, "run: python -m pipeline.read.profile_docs > docs/profiles.md"


def test_the_profile_keys_of_an_accuracy_class_allow_what_the_reader_takes() -> None:
    """Each [accuracy] key's allowed values say whether 0 is one: the reader refuses a range
    of 0 A (a channel of no range measures nothing) and takes 0 for every other key."""
    from pipeline.read.accuracy import ACCURACY_KEYS, AccuracyValueError, accuracy_from
    from pipeline.read.profile_keys import PROFILE_KEYS

    allowed = {k.key: k.allowed for k in PROFILE_KEYS if k.table == "accuracy"}
    assert set(allowed) == {k.name for k in ACCURACY_KEYS}
    for key in ACCURACY_KEYS:
        try:
            accuracy_from({key.name: 0}, "t")
        except AccuracyValueError:
            assert allowed[key.name] == f"number above 0 ({key.unit})", key.name
        else:
            assert allowed[key.name] == f"number, 0 or more ({key.unit})", key.name


def test_profiles_doc_lists_every_shipped_profile() -> None:
    names = sorted(path.name for path in SHIPPED_PROFILES.glob("*.toml"))
    assert len(names) == 7
    docs = (REPO / "docs" / "profiles.md").read_text(encoding="utf-8")
    for name in names:
        assert f"[`{name}`](../rules/profiles/{name})" in docs


def test_every_metric_is_in_the_result_schema() -> None:
    schema = json.loads((REPO / "docs" / "result.schema.json").read_text(encoding="utf-8"))
    names = [m.name for m in METRICS]
    metrics = schema["properties"]["metrics"]
    assert list(metrics["properties"]) == names
    assert metrics["required"] == names
    check_metric = schema["properties"]["checks"]["items"]["properties"]["metric"]
    assert check_metric["enum"] == names


def _modules_with_examples() -> list[str]:
    """Every module of the package whose docstrings hold an example (``>>>``), found by
    reading the source, so that a new or moved module's examples are run without a list
    to keep (a ``__main__`` module runs when imported: it holds none)."""
    names = []
    for path in sorted((REPO / "pipeline").rglob("*.py")):
        if path.name != "__main__.py" and ">>> " in path.read_text(encoding="utf-8"):
            parts = path.relative_to(REPO).with_suffix("").parts
            names.append(".".join(parts[:-1] if parts[-1] == "__init__" else parts))
    return names


# Every docstring example is run, so that none of them goes stale.
DOCTESTED = _modules_with_examples()


def test_the_examples_are_found() -> None:
    assert {"pipeline.model", "pipeline.ledger.ledger", "pipeline.names"} <= set(DOCTESTED)


@pytest.mark.parametrize("name", DOCTESTED)
def test_docstring_examples_hold(name: str) -> None:
    import doctest
    import importlib

    failures, tried = doctest.testmod(importlib.import_module(name), optionflags=doctest.ELLIPSIS)
    assert tried > 0 and failures == 0
