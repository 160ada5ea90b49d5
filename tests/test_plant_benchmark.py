"""The plant benchmark still runs end to end (its figures are not checked: speed is never asserted)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.plant_server import require_server

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parent.parent


def test_smoke_run_of_the_plant_benchmark_prints_its_table(tmp_path: Path) -> None:
    require_server(os.environ)
    run = subprocess.run(
        [sys.executable, str(REPO / "benchmarks" / "plant.py"), "--smoke"],
        capture_output=True, text=True, timeout=600, cwd=tmp_path, check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    for row in ("no plant database", "feeding a database that is up",
                "with a database that is down", "feed alone, batch rows"):
        assert row in run.stdout
