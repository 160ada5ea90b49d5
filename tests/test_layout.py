"""The package's layering holds: the judging core imports nothing from the edges, no circles.

The import graph is read from the source with the standard library's ``ast`` (every
``import`` and ``from ... import``, at module level or inside a function), so a lazy import
counts as much as one at the top.
"""

from __future__ import annotations

import ast
import functools
from collections.abc import Iterable, Mapping
from pathlib import Path

import pytest

from tests.conftest import REPO

PACKAGE = REPO / "pipeline"

# Which parts each part may not import. The core (read, judge, rulebook) is pure: no edge,
# no demo. Report and mail sit on the core; the station on all of those; only the command
# line (and the tests) may import the demo.
# What the shared records and helpers at the bottom may not import: the parts built on them.
SHARED_BARS = ("read", "judge", "rulebook", "report", "mail", "ledger", "station", "demo", "cli",
               "runner")
FORBIDDEN: Mapping[str, tuple[str, ...]] = {
    "read": ("judge", "report", "mail", "ledger", "station", "plant", "demo", "cli", "runner"),
    "judge": ("report", "mail", "ledger", "station", "plant", "demo", "cli", "runner"),
    "rulebook": ("report", "mail", "ledger", "station", "plant", "demo", "cli", "runner"),
    "report": ("mail", "ledger", "station", "plant", "demo", "cli", "runner"),
    "mail": ("ledger", "station", "plant", "demo", "cli", "runner"),
    # the ledger stores what others decide: the model's, acceptance's and the readers' records only
    "ledger": ("judge", "rulebook", "report", "mail", "station", "plant", "demo", "cli", "runner"),
    # the plant database: the ledger forwarded, and cells of several stations decided with
    # the core's own logic; the station runs its feed, the command line asks it
    "plant": ("station", "report", "regrade", "audit", "demo", "cli", "runner"),
    "station": ("audit", "regrade", "demo", "cli"),
    # a regrade judges again what the station judged; only the command line uses it
    "regrade": ("audit", "demo", "cli"),
    # an audit reads what the station wrote; only the command line uses it
    "audit": ("regrade", "demo", "cli"),
    "demo": ("cli",),
    "runner": ("ledger", "station", "mail", "demo", "cli"),
    # the records everyone shares, and the small helpers at the top of the package (names,
    # careful writing, where the shipped files are), import nothing of the package above them;
    # the rules' and results' records build on the model's, never the other way round
    "model": (*SHARED_BARS, "acceptance"),
    "acceptance": SHARED_BARS,
    "errors": SHARED_BARS,
    "names": SHARED_BARS,
    "writing": SHARED_BARS,
    "shipped": SHARED_BARS,
}


def module_name(path: Path) -> str:
    parts = path.relative_to(REPO).with_suffix("").parts
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


@functools.cache  # a function of the text alone: each test parses only what it changed
def imports_of(source: str, name: str) -> frozenset[str]:
    """The pipeline modules ``source`` (module ``name``) imports, anywhere in it."""
    found: set[str] = set()
    package = name.rsplit(".", 1)[0]  # the package relative imports start from
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("pipeline"))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                module = f"{base}.{node.module}" if node.module else base
            else:
                module = node.module or ""
            if not module.startswith("pipeline"):
                continue
            found.add(module)
            # "from pipeline.x import y" may import the module pipeline.x.y
            found.update(f"{module}.{a.name}" for a in node.names)
    return frozenset(found)


def graph(sources: Mapping[str, str]) -> dict[str, set[str]]:
    """Module -> the modules of ``sources`` it imports (names that are not modules dropped)."""
    known = set(sources)
    edges = {}
    for name, source in sources.items():
        targets = set()
        for imported in imports_of(source, name):
            # a name imported from a module counts as that module
            while imported and imported not in known:
                imported = imported.rpartition(".")[0]
            # a part's __init__ holds only its docstring (test below): importing it is
            # no dependency; the modules imported from it are
            if (imported and imported != name and imported.count(".") > 1) or imported in TOP:
                targets.add(imported)
        edges[name] = targets
    return edges


def package_sources() -> dict[str, str]:
    return {
        module_name(path): path.read_text(encoding="utf-8")
        for path in sorted(PACKAGE.rglob("*.py"))
    }


TOP = {name for name in package_sources() if name.count(".") == 1 and not (
    PACKAGE / name.split(".")[1] / "__init__.py"
).exists()}


def part(module: str) -> str:
    """The part a module belongs to: pipeline.judge.metrics -> judge, pipeline.cli -> cli."""
    pieces = module.split(".")
    return pieces[1] if len(pieces) > 1 else ""


def violations(edges: Mapping[str, Iterable[str]]) -> list[str]:
    found = []
    for module, targets in sorted(edges.items()):
        banned = FORBIDDEN.get(part(module), ())
        for target in sorted(targets):
            if part(target) in banned:
                found.append(f"{module} imports {target}")
    return found


def circles(edges: Mapping[str, Iterable[str]]) -> list[list[str]]:
    """Every strongly connected set of more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in edges.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(edges):
        if v not in index:
            visit(v)
    return found


def test_the_core_imports_nothing_from_the_edges_and_nothing_imports_the_demo() -> None:
    assert violations(graph(package_sources())) == []


def test_no_module_imports_itself_back_through_others() -> None:
    assert circles(graph(package_sources())) == []


def test_every_part_of_the_package_says_what_it_may_import_and_holds_nothing_else() -> None:
    for init in sorted(PACKAGE.glob("*/__init__.py")):
        tree = ast.parse(init.read_text(encoding="utf-8"))
        doc = ast.get_docstring(tree)
        assert doc and "import" in doc, init
        assert len(tree.body) == 1, f"{init} holds code besides its docstring"


@pytest.mark.parametrize(
    ("module", "line", "expected"),
    [
        ("pipeline.judge.metrics", "from pipeline.ledger.ledger import Ledger",
         ["pipeline.judge.metrics imports pipeline.ledger.ledger"]),
        ("pipeline.read.cyclefile", "import pipeline.demo.synth",
         ["pipeline.read.cyclefile imports pipeline.demo.synth"]),
        ("pipeline.judge.metrics", "def f():\n    from pipeline.mail import letters",
         ["pipeline.judge.metrics imports pipeline.mail.letters"]),
        ("pipeline.station.station", "from pipeline.judge import metrics", []),
        ("pipeline.writing", "from pipeline.station import status",
         ["pipeline.writing imports pipeline.station.status"]),
    ],
)
def test_the_check_catches_a_core_module_that_imports_an_edge(
    module: str, line: str, expected: list[str]
) -> None:
    sources = package_sources()
    sources[module] = sources[module] + "\n" + line + "\n"
    assert violations(graph(sources)) == expected


def test_the_check_catches_a_circle() -> None:
    sources = package_sources()
    sources["pipeline.judge.thin"] += "\ndef f():\n    from pipeline.judge import metrics\n"
    assert ["pipeline.judge.metrics", "pipeline.judge.thin"] in circles(graph(sources))


def test_the_ledger_imports_only_the_records_it_stores() -> None:
    """The ledger keeps what the others decide: it may use the model, the rules' and results'
    records (acceptance), the errors and the readers' records (aging readings), and nothing
    that composes, judges or sends."""
    allowed_parts = {"ledger", "model", "acceptance", "errors"}
    found = [
        f"{module} imports {target}"
        for module, targets in sorted(graph(package_sources()).items())
        if part(module) == "ledger"
        for target in sorted(targets)
        if part(target) not in allowed_parts and target != "pipeline.read.readings"
    ]
    assert found == []


# The package's size limits: few modules loose at the top, few long modules and none too
# long, and the station (its settings included) no more than its share of the package.
MOST_LOOSE = 8  # modules directly in pipeline/, __init__ and __main__ counted
LONG, MOST_LONG, TOO_LONG = 600, 2, 800  # lines
STATION_SHARE = 0.28


def module_lines() -> dict[Path, int]:
    """Every module of the package and its number of lines."""
    return {p: len(p.read_text(encoding="utf-8").splitlines()) for p in sorted(PACKAGE.rglob("*.py"))}


def test_at_most_eight_modules_sit_loose_at_the_top_of_the_package() -> None:
    loose = sorted(p.name for p in PACKAGE.glob("*.py"))
    assert len(loose) <= MOST_LOOSE, loose


def test_few_modules_are_long_none_too_long_and_each_long_one_says_why_it_is_one_piece() -> None:
    lines = module_lines()
    long = [p for p, n in lines.items() if n > LONG]
    assert len(long) <= MOST_LONG, [f"{p.relative_to(REPO)}: {lines[p]}" for p in long]
    assert [f"{p.relative_to(REPO)}: {n}" for p, n in lines.items() if n > TOO_LONG] == []
    for path in long:
        doc = ast.get_docstring(ast.parse(path.read_text(encoding="utf-8"))) or ""
        assert "one piece" in doc.lower(), f"{path.relative_to(REPO)} does not say why it is one piece"


def test_the_station_holds_at_most_its_share_of_the_package() -> None:
    lines = module_lines()
    station = sum(n for p, n in lines.items() if PACKAGE / "station" in p.parents)
    total = sum(lines.values())
    assert station <= STATION_SHARE * total, f"the station holds {station} of {total} lines"
