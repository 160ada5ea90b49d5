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
    # 30 whole-program files, a bad file, a duplicate; 24 cells as formation and grading
    # files and the lot's aging tester file
    assert "every file accounted for: 81 of 81" in out.stdout
    root = tmp_path / "demo"
    # one certificate per cycle file, and the lot report of the closed lot
    assert len(list((root / "certificates").rglob("*.pdf"))) == 30 + 48 + 1
    assert len(list((root / "quarantine").glob("*.reason.txt"))) == 1
    mails = [p.read_text(errors="replace") for p in (root / "mail").glob("*.eml")]
    # the staged lot: its low-capacity cell fails at grading; its slow self-discharger passes
    # every check but is held by the lot's screen on the K-value at the close, with a letter
    assert "S04-023  fail: grading_capacity_Ah 4.491 Ah < 5.000 Ah (reject)" in out.stdout
    assert "S04-024  hold (was pass): outlier in lot: k_value_mV_per_day" in out.stdout
    assert "grades: A " in out.stdout and "lot report (PDF)" in out.stdout
    assert (root / "certificates" / "DEMO-LOT-04" / "_lot-report.pdf").exists()
    assert any("HOLD cell S04-024" in m for m in mails)
    assert any("lot DEMO-LOT-04, closed" in m for m in mails)


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
