"""Shared test fixtures: state-folder isolation and a guard against leaked threads."""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
RULES_DIR = REPO / "rules"
TEMPLATES_DIR = REPO / "templates"
DATA_DIR = Path(__file__).resolve().parent / "data"


@pytest.fixture(autouse=True)
def _no_leaked_threads() -> Iterator[None]:
    """Fail a test that leaves a thread running (the station must shut down cleanly)."""
    before = set(threading.enumerate())
    yield
    leaked = [
        t for t in threading.enumerate()
        if t not in before and t.is_alive() and not t.daemon
    ]
    for t in leaked:
        t.join(timeout=5)
    still = [t.name for t in leaked if t.is_alive()]
    assert not still, f"test leaked threads: {still}"


@pytest.fixture(autouse=True)
def _isolated_home(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """Point formgate's state folder at a temporary one so no test touches a real station."""
    monkeypatch.setenv("FORMGATE_HOME", str(tmp_path_factory.mktemp("formgate-home")))


@pytest.fixture(scope="session")
def plant_server() -> Iterator[object]:
    """A PostgreSQL server of the tests' own (tests/plant_server.py); skipped without the
    server binaries, except under CI=true, where that is a failure."""
    from tests.plant_server import remove, require_server, start_server

    require_server(os.environ)
    server = start_server()
    try:
        yield server
    finally:
        remove(server)


@pytest.fixture(scope="session")
def demo_station(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """The station `formgate demo` leaves (its folder, named ``station``, and what the demo
    printed), run once for the session: tests that change it work on a copy."""
    parent = tmp_path_factory.mktemp("demo")
    env = dict(os.environ, FORMGATE_HOME=str(tmp_path_factory.mktemp("demo-home")))
    out = subprocess.run(
        [sys.executable, "-m", "pipeline", "demo", str(parent / "station")],
        cwd=REPO, env=env, capture_output=True, text=True, timeout=900,
    )
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    return parent / "station", out.stdout
