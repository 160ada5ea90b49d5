"""The station commands' examples in docs/cli.md are those commands' real output.

The page's examples of commands on a station folder (``$ formgate ... station/ ...``) are run
on a copy of the station that ``formgate demo station/`` leaves, in the order the page states
(a review before the cell history that shows it, a regrade before the ledger check that finds a
hand edit), through ``main(argv)``; what each prints must be what the page shows. ``init`` and
the first ``status`` example run on a new station. Times, ages, process ids, row numbers and
hashes change on every run, so both sides have them replaced by placeholders before they are
compared; a line ``...`` in the page stands for any number of lines the page leaves out (a list
whose order depends on which of the station's two workers finished first, say). An example that
drifts from the code (a count, a cell's verdict, a message's wording) fails here, and so does a
station example the test does not know how to run: every one is either run or named below as not
run, with why.
"""

from __future__ import annotations

import json
import re
import shlex
import shutil
import sqlite3
from collections.abc import Callable
from pathlib import Path

import pytest

from pipeline.cli.main import main

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[1]
CLI_DOC = (REPO / "docs" / "cli.md").read_text(encoding="utf-8")

# Examples that are not run, with why.
NOT_RUN = {
    "formgate watch station/ --quiet": "runs the station until it is stopped, and prints nothing",
    "formgate rules check station/rules/": "tests/test_docs_examples.py runs it, on the rules the page describes",
}
# The plant commands need a plant database: tests/test_plant_*.py run them against a real server.
NOT_RUN_PREFIXES = ("formgate plant ",)


def examples() -> list[tuple[str, list[str]]]:
    """Every ``$ ...`` line of the page's code blocks with the lines it shows, in page order."""
    found: list[tuple[str, list[str]]] = []
    for block in re.findall(r"^```\n(.*?)^```", CLI_DOC, re.M | re.S):
        for command, shown in re.findall(r"^\$ (.*)\n((?:(?!\$ ).*\n)*)", block, re.M):
            found.append((command, shown.splitlines()))
    return found


def station_examples() -> list[tuple[str, list[str]]]:
    return [(c, s) for c, s in examples()
            if "station/" in c and c not in NOT_RUN and not c.startswith(NOT_RUN_PREFIXES)]


_PLACEHOLDERS = [
    (re.compile(r"\b[0-9a-f]{16,}\b"), "<hash>"),
    (re.compile(r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d(:\d\d(\.\d+)?)?(\+00:00| UTC)?"), "<time>"),
    (re.compile(r"\d{8}T\d{6}Z"), "<time>"),
    (re.compile(r"\d{4}-\d\d-\d\d"), "<date>"),
    (re.compile(r"\bfor \d+(\.\d+)? (s|min|h)\b"), "for <age>"),
    (re.compile(r"\bpid \d+"), "pid <n>"),
    (re.compile(r"\b(row|result) \d+"), r"\1 <n>"),
    (re.compile(r"/\d{6}_"), "/<n>_"),
    (re.compile(r"\b[0-9a-f]{4}( [0-9a-f]{4}){3}\b"), "<code>"),
    (re.compile(r"\b[0-9a-f]{4,}(…|\.\.\.)"), r"<hash>\1"),
]


def normal(line: str) -> str:
    for pattern, placeholder in _PLACEHOLDERS:
        line = pattern.sub(placeholder, line)
    return line.rstrip()


def fits(shown: list[str], printed: list[str]) -> bool:
    """Whether the page's lines are the printed ones, a line ``...`` standing for any number."""
    if not shown:
        return not printed
    if shown[0].strip() == "...":
        return any(fits(shown[1:], printed[skip:]) for skip in range(len(printed) + 1))
    return bool(printed) and normal(shown[0]) == normal(printed[0]) and fits(shown[1:], printed[1:])


# --- what the page says was done before some of its examples -------------------------------

def _edited_result(root: Path) -> None:
    """edited/L01-005.json: the cell's published result with its capacity changed by hand."""
    result = json.loads((root / "station" / "results" / "DEMO-LOT-01" / "L01-005.json").read_text())
    result["metrics"]["grading_capacity_Ah"] = 21.5
    (root / "edited").mkdir(exist_ok=True)
    (root / "edited" / "L01-005.json").write_text(json.dumps(result, indent=2), encoding="utf-8")


def _proposed_rules(root: Path) -> None:
    """proposed-rules/: the station's rules with LFP cells' capacity window from 102 % of rated,
    under a new revision of the rule set."""
    shutil.copytree(root / "station" / "rules", root / "proposed-rules")
    lfp = root / "proposed-rules" / "lfp_graphite.toml"
    text = lfp.read_text(encoding="utf-8")
    assert "\nlow = 1.00 " in text and '\nrevision = "2026-12-02.2"\n' in text
    text = text.replace("\nlow = 1.00 ", "\nlow = 1.02 ", 1)
    lfp.write_text(text.replace('\nrevision = "2026-12-02.2"\n', '\nrevision = "2026-12-05.1"\n', 1), encoding="utf-8")


def _hand_edit(root: Path) -> None:
    """The first decision on cell L01-009 (a fail) changed by hand to a pass."""
    with sqlite3.connect(root / "station" / "ledger.sqlite") as db:
        db.execute("UPDATE decisions SET verdict = 'pass' WHERE id = "
                   "(SELECT min(id) FROM decisions WHERE cell_id = 'L01-009')")
    db.close()


BEFORE: dict[str, Callable[[Path], None]] = {
    "formgate verify station/ edited/L01-005.json": _edited_result,
    "formgate regrade station/ --rules proposed-rules/": _proposed_rules,
    "formgate verify station/ --ledger": _hand_edit,
}

# The order the page's station examples run in on the demo's station, by their first words;
# the exit code each must end with (0 unless named).
DEMO_ORDER = [
    ("formgate status station/", 0),
    ("formgate lot list station/", 0),
    ("formgate lot show station/ DEMO-LOT-04", 0),
    ("formgate cell show station/ S04-024", 0),
    ("formgate channel list station/", 0),
    ("formgate channel show station/ 5-03", 0),
    ("formgate review list station/", 0),
    ("formgate lot close station/ DEMO-LOT-04", 0),
    ("formgate lot report station/ DEMO-LOT-05", 0),
    ("formgate review release station/ S04-024 ", 0),
    ("formgate review release station/ L01-009 --by", 2),
    ("formgate review release station/ L01-009 --accept", 0),
    ("formgate review reject station/ S04-023 ", 0),
    ("formgate review retest station/ L05-039 ", 0),
    ("formgate cell show station/ L05-039", 0),
    ("formgate channel clear station/ 5-03 ", 0),
    ("formgate mail retry station/", 0),
    ("formgate verify station/ station/certificates/", 0),
    ("formgate verify station/ \"", 0),  # the code the certificate's check printed
    ("formgate verify station/ edited/", 1),
    ("formgate regrade station/ --rules proposed-rules/", 0),
    ("cp proposed-rules/lfp_graphite.toml station/rules/", 0),
    ("formgate regrade station/ --apply ", 0),
    ("formgate verify station/ --ledger", 1),
]
NEW_STATION_ORDER = [
    ("formgate init station/", 0),
    ("formgate init station/", 2),
    ("formgate status station/", 0),
]


def _run(command: str, root: Path, capsys: pytest.CaptureFixture[str], code_seen: str | None) -> tuple[int, list[str]]:
    argv = shlex.split(command)
    if argv[0] == "cp":
        shutil.copy(root / argv[1], root / argv[2])
        return 0, []
    assert argv[0] == "formgate"
    if code_seen is not None:
        argv = [code_seen if re.fullmatch(r"[0-9a-f]{4}( [0-9a-f]{4}){3}", a) else a for a in argv]
    code = main(argv[1:])
    out, err = capsys.readouterr()
    return code, (out + err).splitlines()


def _pair(order: list[tuple[str, int]], pool: list[tuple[str, list[str]]]) -> list[tuple[str, list[str], int]]:
    """Each entry of the order with the first example left in the pool that starts with it."""
    paired = []
    for start, code in order:
        index = next((i for i, (c, _) in enumerate(pool) if c.startswith(start) or c == start.strip()), None)
        assert index is not None, f"docs/cli.md shows no example '$ {start}...' any more"
        command, shown = pool.pop(index)
        paired.append((command, shown, code))
    return paired


def test_every_station_example_is_run_here() -> None:
    pool = station_examples()
    _pair(NEW_STATION_ORDER, pool)
    _pair(DEMO_ORDER, pool)
    assert not pool, f"station examples in docs/cli.md that this test does not run: {[c for c, _ in pool]}"


def _check(paired: list[tuple[str, list[str], int]], root: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code_seen = None
    for command, shown, expected in paired:
        if command in BEFORE:
            BEFORE[command](root)
        code, printed = _run(command, root, capsys, code_seen)
        seen = next((m.group(0) for line in printed
                     if (m := re.search(r"\b[0-9a-f]{4}( [0-9a-f]{4}){3}\b", line))), None)
        code_seen = seen or code_seen
        assert fits(shown, printed), (
            f"docs/cli.md, '$ {command}' shows:\n" + "\n".join(shown)
            + "\n\nthe command printed:\n" + "\n".join(printed))
        assert code == expected, f"'$ {command}' ended with {code}, not {expected}"


def test_the_examples_on_a_new_station_are_what_the_commands_print(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    pool = station_examples()
    _check(_pair(NEW_STATION_ORDER, pool), tmp_path, capsys)


def test_the_examples_on_the_demo_station_are_what_the_commands_print(
    demo_station: tuple[Path, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    shutil.copytree(demo_station[0], tmp_path / "station", symlinks=True)
    monkeypatch.chdir(tmp_path)
    pool = station_examples()
    _pair(NEW_STATION_ORDER, pool)
    _check(_pair(DEMO_ORDER, pool), tmp_path, capsys)
