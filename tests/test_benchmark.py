"""The benchmark still runs end to end (its figures are not checked: speed is never asserted)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parent.parent


def test_smoke_run_of_the_benchmark_prints_every_part_of_its_table(tmp_path: Path) -> None:
    before = (REPO / "docs" / "performance.md").read_bytes()
    run = subprocess.run(
        [sys.executable, str(REPO / "benchmarks" / "run.py"), "--smoke"],
        capture_output=True,
        text=True,
        timeout=600,
        cwd=tmp_path,
        check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    for part in (
        "judge path ÷ pandas.read_csv",
        "workbook read ÷ pandas.read_csv",
        "Parquet read ÷ pandas.read_csv",
        "passed cell's certificate ÷ naive render",
        "failed cell's certificate ÷ naive render",
        "station throughput",
        "judged cells/s, certificates on ÷ certificates off",
        "queue catch-up after a 24-file burst",
        "peak RSS per worker",
        "RSS over 200 cells",
        "formgate check --no-pdf, start to exit",
        "formgate status, imports",
    ):
        assert part in run.stdout, part
    assert (REPO / "docs" / "performance.md").read_bytes() == before  # a smoke run writes nothing


def test_quick_accuracy_trial_prints_its_table_with_no_wrong_verdict(tmp_path: Path) -> None:
    run = subprocess.run(
        [sys.executable, str(REPO / "benchmarks" / "accuracy.py"), "--quick"],
        capture_output=True,
        text=True,
        timeout=600,
        cwd=tmp_path,
        check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    header, _rule, row = run.stdout.splitlines()
    assert header.split()[:4] == ["interval", "channel", "noise", "/"]
    assert row.split()[:8] == ["5s", "0.05", "%", "/", "0.01", "%", "yes", "0"]
