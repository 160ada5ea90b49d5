"""`formgate plant demo`: two demo stations on one PostgreSQL database of the demo's own; the
lot over both with one yield, a cell formed at one and graded at the other decided once by the
plant, its failed cell's letter written by the plant command. Without server binaries the demo
says why and how to install them (and this test skips, or fails under CI=true)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import psycopg
import pytest

from tests.conftest import REPO
from tests.plant_server import require_server

pytestmark = pytest.mark.slow


def test_the_plant_demo_shows_both_stations_cells_with_one_yield_and_one_plant_decision(
    tmp_path: Path,
) -> None:
    require_server(os.environ)
    done = subprocess.run([sys.executable, "-m", "pipeline", "plant", "demo", str(tmp_path / "demo")],
                          cwd=REPO, capture_output=True, text=True, timeout=1200)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    out = done.stdout
    assert ("  lot DEMO-LOT-04: 24 cell(s) at 2 station(s) (hall-a, hall-b): 23 pass, 1 fail, "
            "0 hold; yield 95.8 %") in out
    assert "    S04-023  fail: grading_capacity_Ah " in out
    assert "    S04-001  pass  (station hall-a; hall-a)" in out
    assert "    S04-009  pass  (plant; hall-a, hall-b)" in out
    # the cell formed at hall A and graded at hall B: each hall waits, the plant decides it once
    assert "  cell S04-009, lot DEMO-LOT-04, at 2 station(s): hall-a, hall-b" in out
    assert "station hall-a  S04-009-formation.csv  formation  pass" in out
    assert "station hall-b  S04-009-grading.csv  grading  pass" in out
    assert "hold  (record): waiting for stage formation; waiting for stage aging" in out
    assert "    plant decision: pass\n" in out  # recorded once, by the lot show before it
    assert "  letter sent: decision letter for cell S04-023 of lot DEMO-LOT-04 (fail)" in out
    letters = list((tmp_path / "demo" / "quality-desk" / "mail").glob("*.eml"))
    assert len(letters) == 1
    text = letters[0].read_bytes().decode("ascii")
    assert "GENERAL CAUTION" in text and "qualified personnel" in text.replace("=\r\n", "")
    # the server stopped with the demo
    port = out.split("127.0.0.1:", 1)[1].split(",", 1)[0]
    with pytest.raises(psycopg.OperationalError):
        psycopg.connect(f"postgresql://plant_admin@127.0.0.1:{port}/formgate", connect_timeout=2)


def test_without_server_binaries_the_demo_says_why_and_how_to_install_them(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from pipeline.demo import plant_demo

    monkeypatch.setattr(plant_demo, "server_bin", lambda: None)
    assert plant_demo.run_plant_demo(tmp_path / "demo") == 2
    err = capsys.readouterr().err
    assert err.startswith("the plant demo cannot run: it starts a PostgreSQL server of its own, "
                          "and there are no PostgreSQL server binaries (initdb, postgres)")
    assert "apt-get install postgresql" in err
    assert not (tmp_path / "demo").exists()
