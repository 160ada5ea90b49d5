"""The demo's staged lot tells a possible story: each cell is formed, rests on the aging shelf,
then is graded, and its files' times say so."""

from __future__ import annotations

import csv
import datetime
import io

from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_aging_file, demo_stage_files


def _header_and_end(data: bytes) -> tuple[dict[str, str], float]:
    lines = data.decode("utf-8").splitlines()
    meta = dict(line[2:].split(": ", 1) for line in lines if line.startswith("# "))
    return meta, float(lines[-1].split(",")[0])


def test_every_staged_cell_is_formed_then_aged_then_graded() -> None:
    rows = list(csv.DictReader(io.StringIO(
        "\n".join(line for line in demo_aging_file().decode("utf-8").splitlines() if not line.startswith("#")))))
    readings: dict[str, list[datetime.datetime]] = {}
    for row in rows:
        readings.setdefault(row["cell_id"], []).append(datetime.datetime.fromisoformat(row["time"]))
    for cell in DEMO_STAGED_CELLS:
        files = demo_stage_files(cell)
        formation, formed_s = _header_and_end(files["formation"])
        grading, _ = _header_and_end(files["grading"])
        formed_at = datetime.datetime.fromisoformat(formation["started_at"])
        graded_at = datetime.datetime.fromisoformat(grading["started_at"])
        shelf = sorted(readings[cell.cell_id])
        assert formed_at + datetime.timedelta(seconds=formed_s) < shelf[0], cell.cell_id
        assert shelf[-1] < graded_at, cell.cell_id
        assert formation["started_at"] != grading["started_at"]
