"""`formgate demo`: the station demo drains every file; the batch demo gives each cell its verdict."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from tests.station_kit import REPO

pytestmark = pytest.mark.slow


def test_station_demo_accounts_for_every_file(tmp_path: Path) -> None:
    out = subprocess.run(
        [sys.executable, "-m", "pipeline", "demo", str(tmp_path / "demo")],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=900,
    )
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    assert "every file accounted for: 32 of 32" in out.stdout
    root = tmp_path / "demo"
    assert len(list((root / "certificates").rglob("*.pdf"))) == 30
    assert len(list((root / "quarantine").glob("*.reason.txt"))) == 1
    assert list((root / "mail").glob("*.eml"))


def test_batch_demo_gives_every_invented_defect_a_fail_and_every_normal_cell_a_pass(
    tmp_path: Path,
) -> None:
    out = subprocess.run(
        [sys.executable, "-m", "pipeline", "demo", "--batch", str(tmp_path / "batch")],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=900,
    )
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    assert "30 file(s): 18 pass, 11 fail, 1 hold, 0 error" in out.stdout
    assert "unexpected" not in out.stdout
