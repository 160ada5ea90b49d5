"""A regrade at a real station: a tightened window, the cells it moves, applied once, on Dask.

Every part is real: a station judges invented cycle files in its workers, `formgate regrade`
judges its archived copies again on a Dask cluster of this machine (processes), writes the
change report, and with --apply records the changes in the SQLite ledger beside the old
decisions and publishes the changed cells' certificates anew.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import Settings, read_settings
from tests.station_kit import RULES, cycle_file, drop, make_station, running, settled, wait_until

pytestmark = pytest.mark.slow

# old window: 0.9 x 2.0 Ah = 1.80 Ah; the customer's new one starts at 0.94 x 2.0 = 1.88 Ah
TIGHTENED = RULES.replace("low = 0.9              # test window",
                          "low = 0.94             # tightened test window").replace(
                          'revision = "1"', 'revision = "2"')  # a changed text, a new revision
assert TIGHTENED.count('revision = "2"') == 1
CAPACITIES = {"C-01": 1.83, "C-02": 1.86, "C-03": 1.95, "C-04": 2.0, "C-05": 1.87, "C-06": 1.5,
              "C-07": 1.99}
QE = "quality engineer B"


@pytest.fixture(scope="module")
def judged(tmp_path_factory: pytest.TempPathFactory) -> Settings:
    """A station that has judged every cell, stopped."""
    s = make_station(tmp_path_factory.mktemp("regrade") / "st")
    assert TIGHTENED != RULES
    with running(s):
        for n, (cell, cap) in enumerate(CAPACITIES.items()):
            drop(s.inboxes[0].folder, f"{cell}.csv", cycle_file(cell, capacity_ah=cap, seed=n))
        wait_until(lambda: settled(s, len(CAPACITIES)), what="the files")
    return s


def _copy(s: Settings, to: Path) -> Settings:
    shutil.copytree(s.root, to)
    return read_settings(to)


def _between(s: Settings, low: float, high: float) -> set[str]:
    """The passed cells whose measured grading capacity lies in [low, high), from the results."""
    out = set()
    with Ledger(s.ledger) as ledger:
        for r in ledger.results.of_lot("LOT-A"):
            doc = json.loads(r.result_json)
            cap = next(c["value"] for c in doc["checks"] if c["metric"] == "grading_capacity_Ah")
            if doc["verdict"] == "pass" and low <= cap < high:
                out.add(doc["cell"]["cell_id"])
    return out


def _decisions(s: Settings) -> list[tuple[str, str, str, str]]:
    with Ledger(s.ledger) as ledger:
        return [(d.cell_id, d.verdict, d.cause, d.reason)
                for cell in sorted(CAPACITIES) for d in ledger.decisions.of_cell("LOT-A", cell)]


def _csv_cells(path: Path) -> dict[str, str]:
    rows = csv.DictReader(io.StringIO(path.read_text(encoding="utf-8")))
    return {r["cell_id"]: r["change"] for r in rows}


def test_a_dry_run_lists_exactly_the_cells_between_the_old_and_new_limits(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = _copy(judged, tmp_path / "st")
    proposed = tmp_path / "proposed"
    proposed.mkdir()
    (proposed / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    before = _decisions(s)
    assert main(["regrade", str(s.root), "--rules", str(proposed), "--workers", "1",
                 "--no-progress"]) == 0
    out = capsys.readouterr().out
    expected = _between(s, 1.80, 1.88)
    assert expected and expected != set(CAPACITIES)  # the window really moves some cells
    reports = sorted((s.root / "regrades").glob("dry-run-*-changes.csv"))
    assert len(reports) == 1 and reports[0].with_suffix(".pdf").exists()
    assert _csv_cells(reports[0]) == dict.fromkeys(expected, "pass → fail")
    assert f"pass → fail: {len(expected)}" in out and "dry run: nothing recorded" in out
    assert _decisions(s) == before  # a dry run records nothing
    # applying rules that are not the station's own is refused, with what to do
    assert main(["regrade", str(s.root), "--rules", str(proposed), "--apply", "--by", QE,
                 "--reason", "order 12 tightened", "--workers", "1", "--no-progress"]) == 2
    assert "--apply needs the station's own rules" in capsys.readouterr().err
    # the station's own rules edited without a new revision are refused, at the revision's line
    (s.rules_dir / "test_cells.toml").write_text(TIGHTENED.replace('revision = "2"', 'revision = "1"'),
                                                 encoding="utf-8")
    assert main(["regrade", str(s.root), "--apply", "--by", QE, "--reason", "order 12 tightened",
                 "--workers", "1", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "test_cells.toml, line 4: rule set 'test-cells' revision '1' judged cells with another text" in err
    assert _decisions(s) == before


def test_apply_records_the_changed_cells_once_with_their_cause_and_new_certificates(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = _copy(judged, tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    expected = _between(s, 1.80, 1.88)
    before = _decisions(s)
    args = ["regrade", str(s.root), "--apply", "--by", QE, "--reason", "order 12 tightened",
            "--workers", "1", "--no-progress"]
    assert main(args) == 0
    assert f"applied as regrade 1: {len(expected)} cell(s) decided anew" in capsys.readouterr().out
    after = _decisions(s)
    new = [d for d in after if d not in before]
    assert sorted(d[0] for d in new) == sorted(expected)
    assert all(d[1] == "fail" and d[2] == "regrade" for d in new)
    with Ledger(s.ledger) as ledger:
        regrade = ledger.regrades.get(1)
        assert regrade is not None and regrade.run_by == QE and regrade.finished_at is not None
        assert regrade.rule_sets[0][:2] == ("test-cells", "2")  # the tightened revision
        for cell in expected:
            latest = ledger.decisions.latest("LOT-A", cell)
            assert latest is not None and latest.basis[-1] == "regrade:1"
            [record] = ledger.results.of_cell("LOT-A", cell)  # the regrade's judgement counts
            assert (record.regrade_id, record.verdict) == (1, "fail")
        assert ledger.integrity_ok()
    # formgate verify finds every file published and the text of every rule set in the ledger
    assert main(["verify", str(s.root), "--ledger"]) == 0
    # each input judged again has its own certificate beside the old one, and it verifies
    victim = sorted(expected)[0]
    regraded = s.certificates / "LOT-A" / f"{victim}~regrade-1~{victim}.csv.pdf"
    assert (s.certificates / "LOT-A" / f"{victim}.pdf").exists() and regraded.exists()
    capsys.readouterr()
    assert main(["verify", str(s.root), str(regraded)]) == 0
    assert "verified" in capsys.readouterr().out
    # the cell's history shows both decisions and the cause
    assert main(["cell", "show", str(s.root), sorted(expected)[0]]) == 0
    shown = capsys.readouterr().out
    assert "(record)" in shown and "(regrade 1 under test-cells 2: order 12 tightened)" in shown
    # a second --apply finds nothing to change and records nothing
    assert main(args) == 0
    assert "nothing to apply" in capsys.readouterr().out
    assert _decisions(s) == after


def _published(s: Settings, since: int) -> set[tuple[str | None, ...]]:
    """The station's published rows after row ``since``, paths relative to its folder."""
    with Ledger(s.ledger) as ledger:
        rows = ledger.db.rows("SELECT path, sha256, kind, lot, cell_id, result_id, decision_id, "
                              "published_at FROM published WHERE id > ?", (since,))
        return {(str(Path(r[0]).resolve().relative_to(s.root.resolve())), *r[1:]) for r in rows}


def _stale_cell_files(s: Settings, cells: set[str]) -> list[str]:
    """Those of ``cells`` whose latest published cell certificate or cell JSON is not for their
    latest decision, or not on disk with the bytes recorded."""
    stale = []
    with Ledger(s.ledger) as ledger:
        for cell in sorted(cells):
            latest = ledger.decisions.latest("LOT-A", cell)
            for kind in ("cell certificate", "cell result"):
                row = ledger.db.one(
                    "SELECT path, sha256, decision_id FROM published WHERE lot = 'LOT-A' AND "
                    "cell_id = ? AND kind = ? ORDER BY id DESC LIMIT 1", (cell, kind))
                if (latest is None or row is None or row[2] != latest.id or not Path(row[0]).is_file()
                        or hashlib.sha256(Path(row[0]).read_bytes()).hexdigest() != row[1]):
                    stale.append(f"{cell} ({kind})")
    return stale


def test_an_apply_killed_half_way_and_run_again_gives_the_ledger_of_one_clean_run(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    clean, killed = _copy(judged, tmp_path / "clean"), _copy(judged, tmp_path / "killed")
    for s in (clean, killed):
        (s.rules_dir / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    expected = _between(judged, 1.80, 1.88)
    assert len(expected) >= 2  # one cell recorded before the kill, another after
    with Ledger(judged.ledger) as ledger:
        first_row = int(ledger.db.one("SELECT coalesce(max(id), 0) FROM published")[0])
    args = ["--apply", "--by", QE, "--reason", "order 12 tightened", "--mail", "--workers", "1",
            "--no-progress", "--analysed-at", "2026-12-06T08:00:00+00:00"]
    assert main(["regrade", str(clean.root), *args]) == 0
    clean_out = capsys.readouterr().out
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "regrade", str(killed.root), *args],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    recorded = 0
    try:  # killed once the regrade has recorded the decision of at least one cell
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and proc.poll() is None and not recorded:
            conn = sqlite3.connect(killed.ledger, timeout=10)
            try:
                recorded = conn.execute(
                    "SELECT count(*) FROM decisions WHERE cause = 'regrade'").fetchone()[0]
            except sqlite3.OperationalError:
                recorded = 0
            finally:
                conn.close()
            if not recorded:
                time.sleep(0.01)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    with Ledger(killed.ledger) as ledger:
        cut = ledger.regrades.get(1)
        cells_before = int(ledger.db.one(
            "SELECT count(DISTINCT cell_id) FROM decisions WHERE cause = 'regrade'")[0])
    assert cut is not None and cut.finished_at is None  # cut short, half-way
    assert 1 <= cells_before < len(expected)
    assert main(["regrade", str(killed.root), *args]) == 0
    killed_out = capsys.readouterr().out
    # the same decisions, summary, report, mail and published files as one clean run
    assert _decisions(killed) == _decisions(clean)
    assert f"applied as regrade 1: {len(expected)} cell(s) decided anew" in clean_out
    assert f"applied as regrade 1: {len(expected)} cell(s) decided anew ({cells_before} of them " in (
        killed_out)
    assert killed_out.splitlines()[1:-3] == clean_out.splitlines()[1:-3]  # the counts by change
    reports = [s.root / "regrades" / "regrade-1-changes.csv" for s in (clean, killed)]
    assert reports[0].read_bytes() == reports[1].read_bytes()
    assert _csv_cells(reports[1]) == dict.fromkeys(expected, "pass → fail")
    summaries = []
    for s in (clean, killed):
        with Ledger(s.ledger) as ledger:
            row = ledger.regrades.get(1)
            assert row is not None and row.finished_at is not None
            summaries.append(row.summary)
            mails = [m.subject for m in ledger.outbox.in_state("pending") if "regrade" in m.subject]
            assert mails == [f"[formgate] regrade 1: {len(expected)} cells changed"]
    assert summaries[0] == summaries[1] == {"pass → fail": len(expected)}
    assert _published(killed, first_row) == _published(clean, first_row)
    assert _stale_cell_files(killed, expected) == []
    with Ledger(killed.ledger) as ledger:
        assert [r.id for r in ledger.regrades.every()] == [1]
        regraded = list(ledger.db.rows("SELECT input_id, count(*) FROM results WHERE regrade_id IS NOT NULL "
                                  "GROUP BY input_id HAVING count(*) > 1"))
        assert regraded == []


from tests.test_regrade_grid import scheduler  # noqa: E402,F401  (a real `dask scheduler` and two workers)


@pytest.mark.parametrize("ship", [False, True], ids=["workers-read-the-archive", "bytes-shipped"])
def test_a_separately_started_scheduler_and_workers_regrade_alike(
    judged: Settings, tmp_path: Path, scheduler: str, ship: bool,  # noqa: F811
    capsys: pytest.CaptureFixture[str],
) -> None:
    s = _copy(judged, tmp_path / "st")
    proposed = tmp_path / "proposed"
    proposed.mkdir()
    (proposed / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    args = ["regrade", str(s.root), "--rules", str(proposed), "--scheduler", scheduler,
            "--workers", "2", "--no-progress", *(["--ship-bytes"] if ship else [])]
    assert main(args) == 0
    assert f"{len(CAPACITIES)} on the cluster" in capsys.readouterr().out
    [report] = sorted((s.root / "regrades").glob("dry-run-*-changes.csv"))
    assert _csv_cells(report) == dict.fromkeys(_between(s, 1.80, 1.88), "pass → fail")


def test_a_closed_lot_is_reported_again_and_one_summary_mail_is_queued(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = _copy(judged, tmp_path / "st")
    assert main(["lot", "close", str(s.root), "LOT-A"]) in (0, 1)
    report = s.certificates / "LOT-A" / "_lot-report.pdf"
    first = report.read_bytes()
    (s.rules_dir / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    capsys.readouterr()
    expected = _between(s, 1.80, 1.88)
    assert main(["regrade", str(s.root), "--apply", "--by", QE, "--reason", "order 12 tightened",
                 "--mail", "--workers", "1", "--no-progress"]) == 0
    assert report.read_bytes() != first  # the closed lot's report shows the new decisions
    with Ledger(s.ledger) as ledger:
        assert ledger.lots.get("LOT-A").closed_at is not None
        latest = ledger.decisions.latest_of_lot("LOT-A")
        assert {c for c, d in latest.items() if d.cause == "regrade"} == expected
        mails = [m for m in ledger.outbox.in_state("pending") if "regrade" in m.subject]
    assert [m.subject for m in mails] == [
        f"[formgate] regrade 1: {len(expected)} cells changed"
    ]
    assert mails[0].attachment_path.endswith("regrade-1-changes.pdf")
    assert "CAUTION" in mails[0].body_text and "qualified personnel" in mails[0].body_text


def test_a_regrade_applied_beside_a_running_station_stands_and_the_station_goes_on(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    s = _copy(judged, tmp_path / "st")
    expected = _between(s, 1.80, 1.88)
    with running(s):
        (s.rules_dir / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
        assert main(["regrade", str(s.root), "--apply", "--by", QE, "--reason", "order 12",
                     "--workers", "1", "--no-progress"]) == 0
        # the station keeps claiming and judging meanwhile, by the rules now in its folder
        drop(s.inboxes[0].folder, "C-08.csv", cycle_file("C-08", capacity_ah=1.84, seed=8))
        wait_until(lambda: settled(s, len(CAPACITIES) + 1), what="the new file")
        time.sleep(2 * s.reconcile_s)  # a round of the station's own decisions after the regrade
    with Ledger(s.ledger) as ledger:
        latest = ledger.decisions.latest_of_lot("LOT-A")
        assert {c for c, d in latest.items() if d.cause == "regrade"} == expected
        assert latest["C-08"].verdict == "fail"  # judged by the tightened window
        assert ledger.integrity_ok()


def test_an_archived_copy_changed_since_is_not_judged_and_leaves_its_cell_as_it_was(
    judged: Settings, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    expected = _between(judged, 1.80, 1.88)
    victim = sorted(expected)[0]
    with Ledger(judged.ledger) as ledger:
        [record] = ledger.results.of_cell("LOT-A", victim)
        row = ledger.inputs.get(record.input_id)
    assert row is not None and row.final_path is not None
    archived = Path(row.final_path)
    tampered = tmp_path / "tampered"
    shutil.copytree(judged.root, tampered)
    (tampered / archived.relative_to(judged.root)).write_bytes(b"# edited\n")
    t = read_settings(tampered)
    (t.rules_dir / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    with Ledger(t.ledger) as ledger:  # point the copy's ledger at its own, edited archive
        ledger.db.rows("UPDATE inputs SET final_path = replace(final_path, ?, ?)",
                       (str(judged.root), str(tampered)))
    assert main(["regrade", str(tampered), "--workers", "1", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "refused by the new rules: not judged again: " in out and "has changed" in out
    [report] = sorted((tampered / "regrades").glob("dry-run-*-changes.csv"))
    assert set(_csv_cells(report)) == expected - {victim}


def test_a_plain_folder_is_judged_on_the_cluster_into_a_new_output_folder(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = tmp_path / "files"
    folder.mkdir()
    for n, (cell, cap) in enumerate(list(CAPACITIES.items())[:4]):
        (folder / f"{cell}.csv").write_bytes(cycle_file(cell, capacity_ah=cap, seed=n))
    (folder / "notes.csv").write_bytes(b"not a cycle file\n")
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "test_cells.toml").write_text(TIGHTENED, encoding="utf-8")
    out = tmp_path / "new" / "out"  # made as needed
    assert main(["regrade", "--folder", str(folder), "--out", str(out), "--rules", str(rules),
                 "--workers", "1", "--no-progress"]) == 0
    assert "5 file(s) judged under" in capsys.readouterr().out
    rows = list(csv.DictReader(io.StringIO((out / "regrade-verdicts.csv").read_text("utf-8"))))
    assert [(r["file"], r["verdict"]) for r in rows][-1] == ("notes.csv", "error")
    assert {r["cell_id"] for r in rows if r["verdict"] != "error"} == set(list(CAPACITIES)[:4])
    assert len(list((out / "results" / "LOT-A").glob("*.json"))) == 4
