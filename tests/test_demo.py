"""`formgate demo`: the station demo drains every file; the batch demo gives each cell its verdict."""

from __future__ import annotations

import email
import email.policy
import re
import subprocess
import sys
import urllib.parse
from pathlib import Path

import pytest
from pypdf import PdfReader

from tests.station_kit import REPO

pytestmark = pytest.mark.slow


def test_station_demo_accounts_for_every_file(demo_station: tuple[Path, str]) -> None:
    root, stdout = demo_station
    # 30 whole-program files, a bad file, a duplicate; 24 cells as formation and grading
    # files and the lot's aging tester file; the worn rack's 40 whole-program files
    assert "every file accounted for: 121 of 121" in stdout
    # one certificate per cycle file, one per cell (70 whole-program cells, 24 in stages), and
    # the lot reports of the two closed lots
    assert len(list((root / "certificates").rglob("*.pdf"))) == 70 + 48 + 94 + 2
    assert len(list((root / "certificates").rglob("*~cell.pdf"))) == 94
    assert len(list((root / "quarantine").glob("*.reason.txt"))) == 1
    mails = [p.read_text(errors="replace") for p in (root / "mail").glob("*.eml")]
    # the staged lot: its low-capacity cell fails at grading; its slow self-discharger passes
    # every check but is held by the lot's screen on the K-value at the close, with a letter
    assert re.search(r"S04-023  fail: grading_capacity_Ah 4\.49\S* (\S+ \S+ )?Ah < 5\.000 Ah \(reject\)", stdout)
    assert "S04-024  hold (was pass): outlier in lot: k_value_mV_per_day" in stdout
    assert "grades: A " in stdout and "lot report (PDF)" in stdout
    assert (root / "certificates" / "DEMO-LOT-04" / "_lot-report.pdf").exists()
    assert any("HOLD cell S04-024" in m for m in mails)
    assert any("lot DEMO-LOT-04, closed" in m for m in mails)
    _check_cell_certificates(root)
    _check_worn_channel(root, stdout)
    _check_summary_table(stdout)


def _check_summary_table(stdout: str) -> None:
    """The summary lists every cell once, the staged lot's too, as its cell JSON stands: its
    standing verdict, hazards and the reasons that decide it."""
    lines = stdout.splitlines()
    start = next(n for n, line in enumerate(lines) if line.startswith("cell "))
    assert lines[start].split() == ["cell", "lot", "verdict", "hazards", "reason"]
    rows = {}
    for line in lines[start + 1:]:
        if not line.strip():
            break
        rows[line.split()[0]] = line
    assert len(rows) == 94, sorted(rows)  # 70 whole-program cells and 24 in stages
    assert re.match(r"S04-024 +DEMO-LOT-04 +hold +outlier in lot: k_value_mV_per_day", rows["S04-024"])
    assert re.match(r"S04-023 +DEMO-LOT-04 +fail +grading_capacity_Ah 4\.49", rows["S04-023"])
    assert re.match(r"S04-001 +DEMO-LOT-04 +pass *$", rows["S04-001"])
    assert re.match(r"L01-014 +DEMO-LOT-01 +fail +over_temperature +max_temperature_C 62\.7",
                    rows["L01-014"])
    assert re.match(r"L01-015 +DEMO-LOT-01 +hold +\S", rows["L01-015"])  # a hold says why


def _check_worn_channel(root: Path, stdout: str) -> None:
    """The worn channel 5-03 alone is alerted, once; its later fails' letters say so; lot
    DEMO-LOT-05's report has the by-channel page and the charts beside it."""
    assert "channel 5-03 at demo-line-1: SUSPECT since cell L05-" in stdout
    assert "EXPECTED ONE ALERT" not in stdout
    letters = [email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
               for p in (root / "mail").glob("*.eml")]
    subjects = [str(m["Subject"]) for m in letters]
    assert sum("is suspect" in s for s in subjects) == 1
    assert any("channel 5-03 at demo-line-1 is suspect" in s for s in subjects)
    noted = [m for m in letters if m["X-Formgate-Kind"] == "failure"
             and "that tested this cell is suspect" in (m.get_body(("plain",)) or m).get_content()]
    assert noted and all("L05-" in str(m["Subject"]) for m in noted)
    lot = root / "certificates" / "DEMO-LOT-05"
    text = " ".join(" ".join(p.extract_text() for p in PdfReader(lot / "_lot-report.pdf").pages).split())
    assert "By channel" in text and "Suspect channel:" in text and "The lot over time" in text
    assert (lot / "_chart-dcir_mOhm.svg").exists() and (lot / "_chart-by-channel.svg").exists()


def _page1(pdf: Path) -> str:
    return " ".join(PdfReader(pdf).pages[0].extract_text().split())


def _check_cell_certificates(root: Path) -> None:
    """S04-024's cell certificate shows the lot's hold over both its stages and its readings,
    its grading certificate says first that it covers one stage, and every digest links only
    cell certificates, each there."""
    lot = root / "certificates" / "DEMO-LOT-04"
    cell = " ".join(" ".join(p.extract_text() for p in PdfReader(lot / "S04-024~cell.pdf").pages).split())
    page1 = _page1(lot / "S04-024~cell.pdf")
    assert "Cell certificate" in page1 and "HOLD" in page1
    assert "lot screen: k_value_mV_per_day" in page1 and "outlier" in cell.lower()
    assert "Caution: this cell is held" in page1 and "qualified personnel" in page1
    for name in ("DEMO-LOT-04_S04-024_formation.csv", "DEMO-LOT-04_S04-024_grading.csv",
                 "DEMO-LOT-04_aging-readings.csv"):
        assert name in cell.replace("- ", "-"), name
    assert "K-value 1.80 mV/day" in cell
    grading = _page1(lot / "S04-024~grading.pdf")
    assert "This certificate covers one stage of cell S04-024" in grading
    assert grading.index("one stage of cell S04-024") < grading.upper().index("STAGE VERDICT")
    assert "S04-024~cell.pdf" in grading
    links = []
    for path in (root / "mail").glob("*.eml"):
        message = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
        if message["X-Formgate-Kind"] == "digest":
            body = message.get_body(("plain",))
            assert body is not None
            links += re.findall(r"file://\S+?\.pdf", body.get_content())
    cells = [link for link in links if not link.endswith("_lot-report.pdf")]
    assert cells and all(link.endswith("~cell.pdf") for link in cells), cells
    for link in cells:
        assert Path(urllib.parse.unquote(urllib.parse.urlsplit(link).path)).exists(), link
    assert any(link.endswith("/DEMO-LOT-04/S04-024~cell.pdf") for link in cells)


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
