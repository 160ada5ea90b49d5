"""A short run of the fault trial (benchmarks/fault_trial.py): random SIGKILLs, bad inputs and a
mail outage, then every input reconciled. The full trial is run by hand (see its docstring)."""

from __future__ import annotations

import subprocess
import sys

import pytest

from tests.station_kit import REPO

pytestmark = pytest.mark.slow


def test_a_short_fault_trial_decides_every_input_once_with_no_loss_and_no_crash_loop() -> None:
    done = subprocess.run(
        [
            sys.executable,
            str(REPO / "benchmarks" / "fault_trial.py"),
            "--files", "24", "--kills", "3", "--gap-s", "0.12", "--seed", "11",
            "--no-disk-full",  # tests/test_station_faults.py fills a disk
        ],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=600,
        check=False,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert "reconciliation: 0 lost, 0 not decided exactly once, 0 judged twice" in done.stdout
    assert "0 crash loops" in done.stdout and "ended by itself 0 times" in done.stdout
    # every judged file's certificate is on disk as the ledger recorded it, none left waiting
    assert "0 missing, 0 waiting, 0 given up, 0 differing from the ledger" in done.stdout
