"""The station end to end with real folders, watchdog, SQLite and worker processes."""

from __future__ import annotations

import datetime
import email
import email.policy
import re
import threading
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import read_settings, smtp_settings
from pipeline.station.startup import STATE_FILE
from pipeline.station.station import Station
from pipeline.station.status import status_text
from tests.station_kit import (
    check_invariants,
    cycle_file,
    drop,
    make_station,
    running,
    settled,
    start_watch,
    station_toml,
    stop_watch,
    wait_until,
)

pytestmark = pytest.mark.slow


def test_pass_and_fail_cells_are_judged_recorded_published_archived_and_mailed(
    tmp_path: Path,
) -> None:
    # [mail] is the file's last table: the certificates' address joins it
    toml = station_toml() + 'certificates_url = "https://quality.example.com/certs/"\n'
    s = make_station(tmp_path / "st", toml)
    with running(s):
        drop(s.inboxes[0].folder, "good.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "low.csv", cycle_file("C-2", capacity_ah=1.5))
        wait_until(lambda: settled(s, 2), what="two cells judged")
        wait_until(lambda: len(list(s.mail.glob("*.eml"))) >= 2, what="failure mail and digest")
    check_invariants(s, {"good.csv", "low.csv"})
    assert (s.certificates / "LOT-A" / "C-1.pdf").exists()
    import hashlib
    import json

    archived = next(p for p in s.archive.rglob("*_good.csv"))
    doc = json.loads((s.results / "LOT-A" / "C-1.json").read_text())
    assert doc["input"]["sha256"] == hashlib.sha256(archived.read_bytes()).hexdigest()
    assert (s.results / "LOT-A" / "C-2.json").exists()
    subjects = sorted(
        email.message_from_bytes(p.read_bytes(), policy=email.policy.default)["Subject"]
        for p in s.mail.glob("*.eml")
    )
    assert any(x.startswith("formgate: FAIL cell C-2, lot LOT-A") for x in subjects)
    assert any("lot LOT-A, digest 1" in x for x in subjects)
    digests = [
        m.get_body().get_content()
        for m in (email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
                  for p in s.mail.glob("*.eml"))
        if m["X-Formgate-Kind"] == "digest"
    ]
    # the cells' own certificates are linked under the configured address, never by a path
    # on the station (the failed cell is in the digest only if it was judged before the lot
    # fell quiet)
    assert "https://quality.example.com/certs/LOT-A/C-1~cell.pdf" in digests[0]
    for body in digests:
        assert str(s.certificates) not in body
        assert ("C-2" not in body) == ("/certs/LOT-A/C-2~cell.pdf" not in body)


def test_slow_writer_is_judged_once_after_it_is_complete(tmp_path: Path) -> None:
    toml = station_toml(
        inboxes='[inbox.main]\nfolder = "inbox"\nhandover = "settle"\nsettle_s = 1.5\n'
    )
    s = make_station(tmp_path / "st", toml)
    data = cycle_file("SLOW-1")
    with running(s):
        path = s.inboxes[0].folder / "slow.csv"
        with path.open("wb") as fh:  # four chunks over about three seconds
            for k in range(4):
                fh.write(data[k * len(data) // 4 : (k + 1) * len(data) // 4])
                fh.flush()
                time.sleep(0.9)
        wait_until(lambda: settled(s, 1), what="the slow file judged")
    with Ledger(s.ledger) as ledger:
        rows = ledger.inputs.in_state("archived", "quarantined", "duplicate")
        assert [(r.name, r.state, r.size) for r in rows] == [("slow.csv", "archived", len(data))]
    check_invariants(s, {"slow.csv"})


def test_marker_handover_waits_for_the_marker_and_a_lone_marker_is_quarantined(
    tmp_path: Path,
) -> None:
    inbox = '[inbox.main]\nfolder = "inbox"\nhandover = "marker"\norphan_marker_s = 1.0\n'
    s = make_station(tmp_path / "st", station_toml(inboxes=inbox))
    folder = s.inboxes[0].folder
    with running(s):
        (folder / "waits.csv").write_bytes(cycle_file("M-1"))  # data, no marker yet
        (folder / "ghost.csv.done").write_bytes(b"")  # marker, no data
        time.sleep(2.5)
        assert (folder / "waits.csv").exists(), "data without its marker is never claimed"
        (folder / "waits.csv.done").write_bytes(b"")
        wait_until(
            lambda: not (folder / "waits.csv").exists() and settled(s, 1), what="marker file judged"
        )
        wait_until(
            lambda: bool(list(s.quarantine.glob("aside-*_ghost.csv.done"))),
            what="lone marker quarantined",
        )
    (reason,) = s.quarantine.glob("aside-*_ghost.csv.done.reason.txt")
    assert "marker file without its data file" in reason.read_text()
    archived = sorted(p.name for p in s.archive.rglob("*") if p.is_file())
    assert archived == ["000001_waits.csv", "000001_waits.csv.done"]


def test_temporary_names_are_never_claimed(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    folder = s.inboxes[0].folder
    with running(s):
        (folder / "half.csv.part").write_bytes(cycle_file("T-1")[:100])
        (folder / "other.csv.tmp").write_bytes(b"x")
        time.sleep(2.0)
        assert sorted(p.name for p in folder.iterdir()) == ["half.csv.part", "other.csv.tmp"]
        (folder / "half.csv.part").write_bytes(cycle_file("T-1"))
        (folder / "half.csv.part").rename(folder / "half.csv")
        wait_until(lambda: settled(s, 1), what="renamed file judged")


def test_bad_file_is_quarantined_with_a_reason_and_the_station_goes_on(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    bad = b"# cell_id: B-1\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A\n0,3.3,0\n10,x,0\n"
    with running(s):
        drop(s.inboxes[0].folder, "bad.csv", bad)
        drop(s.inboxes[0].folder, "good.csv", cycle_file("G-1"))
        wait_until(lambda: settled(s, 2), what="both files final")
    reason = (s.quarantine / "000001_bad.csv.reason.txt").read_text()
    assert "bad.csv, line 6, column 2: voltage_V is 'x', not a number." in reason
    assert (s.quarantine / "000001_bad.csv").read_bytes() == bad  # kept, never deleted
    check_invariants(s, {"bad.csv", "good.csv"})


def test_same_bytes_again_are_a_duplicate_and_new_bytes_under_an_old_name_a_new_version(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    first = cycle_file("D-1", seed=1)
    with running(s):
        drop(s.inboxes[0].folder, "d.csv", first)
        wait_until(lambda: settled(s, 1), what="first version")
        drop(s.inboxes[0].folder, "copy.csv", first)
        wait_until(lambda: settled(s, 2), what="duplicate")
        drop(s.inboxes[0].folder, "d.csv", cycle_file("D-1", seed=2))
        wait_until(lambda: settled(s, 3), what="second version")
    with Ledger(s.ledger) as ledger:
        rows = sorted(ledger.inputs.in_state("archived", "duplicate"), key=lambda r: r.id)
        assert [(r.name, r.state, r.version) for r in rows] == [
            ("d.csv", "archived", 1),
            ("copy.csv", "duplicate", 1),
            ("d.csv", "archived", 2),
        ]
        results = ledger.results.recent(10)
        assert len(results) == 2  # the duplicate was not judged
        old = min(results, key=lambda r: r.id)
        assert old.superseded_by == max(results, key=lambda r: r.id).id


def test_files_dropped_while_the_station_is_stopped_are_judged_after_start(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    for k in range(3):
        drop(s.inboxes[0].folder, f"early-{k}.csv", cycle_file(f"E-{k}", seed=k))
    with running(s):
        wait_until(lambda: settled(s, 3), what="files from before the start")
    check_invariants(s, {f"early-{k}.csv" for k in range(3)})


def test_broken_rules_edit_keeps_the_last_good_rules_and_alerts_with_file_and_line(
    tmp_path: Path,
) -> None:
    s = make_station(tmp_path / "st")
    rules = s.rules_dir / "test_cells.toml"
    with running(s):
        drop(s.inboxes[0].folder, "before.csv", cycle_file("R-1"))
        wait_until(lambda: settled(s, 1), what="first cell")
        rules.write_text(rules.read_text().replace("low = 0.9 ", "lowe = 0.9 "), encoding="utf-8")
        time.sleep(1.5)
        drop(s.inboxes[0].folder, "after.csv", cycle_file("R-2", seed=3))
        wait_until(lambda: settled(s, 2), what="cell judged with the last good rules")
        wait_until(
            lambda: any(
                "rules edit refused" in p.read_text(errors="replace") for p in s.mail.glob("*.eml")
            ),
            what="alert mail",
        )
        # status names the refused file, its line, the error and since when, until it is fixed
        refused = f"trouble: a rule file is not valid, the last good rules judge: {rules}, line 16: "
        wait_until(
            lambda: refused in status_text(s, datetime.datetime.now(datetime.UTC)),
            what="the refusal in status",
        )
        shown = status_text(s, datetime.datetime.now(datetime.UTC))
        assert "unknown key 'lowe' in [check.capacity]. since 20" in shown, shown
        rules.write_text(rules.read_text().replace("lowe = 0.9 ", "low = 0.9 "), encoding="utf-8")
        wait_until(
            lambda: "not valid" not in status_text(s, datetime.datetime.now(datetime.UTC)),
            what="the refusal gone from status once the file is fixed",
        )
    alert = next(
        p for p in s.mail.glob("*.eml") if "rules edit refused" in p.read_text(errors="replace")
    )
    body = (
        email.message_from_bytes(alert.read_bytes(), policy=email.policy.default)
        .get_body()
        .get_content()
    )
    assert (
        f"{rules}, line 16: unknown key 'lowe' in [check.capacity].\n  Did you mean 'low'?"
        in body.replace("\r\n", "\n")
    )
    with Ledger(s.ledger) as ledger:
        verdicts = sorted(r.verdict for r in ledger.results.recent(10))
    assert verdicts == ["pass", "pass"]


def test_a_changed_rule_text_under_the_same_revision_is_refused_until_it_gets_a_new_one(
    tmp_path: Path,
) -> None:
    """A rule file edited after its revision judged cells keeps its revision's text in force
    (certificates name the revision) and says so in status, with file and line, until the edit
    gets a revision of its own."""
    s = make_station(tmp_path / "st")
    rules = s.rules_dir / "test_cells.toml"
    with running(s):
        drop(s.inboxes[0].folder, "before.csv", cycle_file("V-1"))
        wait_until(lambda: settled(s, 1), what="first cell")
        rules.write_text(rules.read_text().replace("low = 0.9 ", "low = 0.91 "), encoding="utf-8")
        refused = (f"the last good rules judge: {rules}, line 4: rule set 'test-cells' revision '1' "
                   "judged cells with another text")
        wait_until(lambda: refused in status_text(s, datetime.datetime.now(datetime.UTC)),
                   what="the refusal in status")
        rules.write_text(rules.read_text().replace('revision = "1"', 'revision = "2"'), encoding="utf-8")
        wait_until(
            lambda: "not valid" not in status_text(s, datetime.datetime.now(datetime.UTC)),
            what="the edit in force under its new revision",
        )
        drop(s.inboxes[0].folder, "after.csv", cycle_file("V-2", seed=3))
        wait_until(lambda: settled(s, 2), what="second cell")
    with Ledger(s.ledger) as ledger:
        assert sorted(r[1] for r in ledger.results.rule_sets()) == ["1", "2"]


def test_sigterm_finishes_the_cell_in_hand_and_exits_0(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    proc = start_watch(s.root)
    try:
        wait_until(lambda: s.heartbeat.exists(), what="station started")
        drop(s.inboxes[0].folder, "t.csv", cycle_file("S-1"))
        wait_until(lambda: any(s.work.iterdir()) or settled(s, 1), what="file claimed")
    finally:
        code = stop_watch(proc)
    assert code == 0
    with Ledger(s.ledger) as ledger:  # the verdict is out; a pass certificate may still wait
        assert [r.name for r in ledger.inputs.in_state("archived")] == ["t.csv"]
    again = start_watch(s.root)  # ... and is rendered at the next start
    try:
        wait_until(lambda: settled(s, 1), what="the certificate rendered after the restart")
    finally:
        assert stop_watch(again) == 0
    check_invariants(s, {"t.csv"})


def test_sigterm_renders_a_failed_cells_certificate_before_it_exits(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    proc = start_watch(s.root)
    try:
        wait_until(lambda: s.heartbeat.exists(), what="station started")
        drop(s.inboxes[0].folder, "f.csv", cycle_file("S-2", capacity_ah=1.5))
        wait_until(lambda: any(s.work.iterdir()) or settled(s, 1), what="file claimed")
    finally:
        code = stop_watch(proc)
    assert code == 0
    # its failure letter attaches the certificate: the stop does not leave it waiting
    assert (s.certificates / "LOT-A" / "S-2.pdf").read_bytes().startswith(b"%PDF-")
    with Ledger(s.ledger) as ledger:
        assert ledger.certificates.backlog().waiting == 0


def test_watch_refuses_folders_on_different_filesystems(tmp_path: Path) -> None:
    other = Path("/dev/shm")
    if not other.exists() or other.stat().st_dev == tmp_path.stat().st_dev:
        pytest.skip("no second filesystem here")
    work = Path(tmp_pathname := str(other / f"formgate-work-{tmp_path.name}"))
    work.mkdir()
    try:
        toml = station_toml(extra=f'\n[folders]\nwork = "{tmp_pathname}"\n')
        s = make_station(tmp_path / "st", toml)
        proc = start_watch(s.root)
        # it waits (a service manager would otherwise restart it in a loop) and says why
        wait_until(lambda: (s.root / STATE_FILE).exists(), what="the waiting state written")
        assert proc.poll() is None
        report = status_text(read_settings(s.root), datetime.datetime.now(datetime.UTC))
        proc.terminate()
        _, err_bytes = proc.communicate(timeout=60)
        err = err_bytes.decode()
        assert proc.returncode == 0
        assert report.splitlines()[0] == "station test-station: waiting to start"
        assert "is on another filesystem than" in report
        assert "is on another filesystem than" in err
    finally:
        work.rmdir()


def test_threads_and_worker_processes_are_gone_after_stop(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    before = set(threading.enumerate())
    with running(s):
        drop(s.inboxes[0].folder, "x.csv", cycle_file("X-1"))
        wait_until(lambda: settled(s, 1), what="cell")
    left = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
    assert left == []


def test_oversized_and_decompression_bomb_files_are_quarantined_and_the_station_goes_on(
    tmp_path: Path,
) -> None:
    import gzip

    toml = station_toml(extra="max_input_MB = 0.5\nmax_uncompressed_MB = 2.0\n")
    s = make_station(tmp_path / "st", toml)
    header = b"# cell_id: Z-1\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A\n"
    bomb = gzip.compress(header + b"0" * (8 * 2**20), mtime=0)  # 8 MiB of text in a few kB
    with running(s):
        drop(s.inboxes[0].folder, "huge.csv", b"#" * (600 * 1024))
        drop(s.inboxes[0].folder, "bomb.csv.gz", bomb)
        drop(s.inboxes[0].folder, "good.csv", cycle_file("G-2"))
        wait_until(lambda: settled(s, 3), what="all three final")
    reasons = {p.name: p.read_text() for p in s.quarantine.glob("*.reason.txt")}
    assert len(reasons) == 2
    huge = next(t for n, t in reasons.items() if "huge.csv" in n)
    assert "above the station's limit of 0.5 MB" in huge
    assert any("bomb.csv.gz" in n for n in reasons)
    check_invariants(s, {"huge.csv", "bomb.csv.gz", "good.csv"})


def test_a_cell_that_takes_too_long_is_stopped_and_quarantined(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st", station_toml(extra="task_timeout_s = 0.002\n"))
    with running(s):
        # a fine record (some 40,000 rows): reading and judging it take well over 2 ms
        drop(s.inboxes[0].folder, "slow.csv", cycle_file("TO-1", dt_s=1.0))
        wait_until(lambda: settled(s, 1), what="timed-out file final")
    reason = next(s.quarantine.glob("*.reason.txt")).read_text()
    assert (
        "judging took longer than task_timeout_s = 0.002 s, on each of 2 tries; the file was not judged."
        in reason
    )


def test_polling_inbox_and_status_report(tmp_path: Path) -> None:
    import datetime

    from pipeline.station.status import status_text

    inbox = '[inbox.share]\nfolder = "inbox"\nhandover = "rename"\nwatch = "polling"\npoll_interval_s = 0.3\n'
    s = make_station(tmp_path / "st", station_toml(inboxes=inbox))
    with running(s):
        drop(s.inboxes[0].folder, "p.csv", cycle_file("P-9", capacity_ah=1.5))
        wait_until(lambda: settled(s, 1), what="file in a polled inbox judged")
        report = status_text(s, datetime.datetime.now(datetime.UTC))
        assert report.startswith("station test-station: running")
    assert "today (UTC): 0 pass, 1 fail, 0 hold, 0 error, 0 duplicate" in report
    assert re.search(  # the value with its expanded uncertainty U
        r"P-9  lot LOT-A  fail: grading_capacity_Ah 1\.500\d* ± [\d.]+ Ah < 1\.800\d* Ah \(reject\)"
        r"  hazard: abnormal_capacity", report
    )
    assert "ledger integrity: ok" in report
    assert "share (" in report and "0 file(s) waiting" in report


def test_a_settled_file_written_to_again_before_its_claim_is_left_for_the_next_listing(
    tmp_path: Path,
) -> None:
    toml = station_toml(
        inboxes='[inbox.main]\nfolder = "inbox"\nhandover = "settle"\nsettle_s = 1.5\n'
    )
    s = make_station(tmp_path / "st", toml)
    inbox = s.inboxes[0]
    data = cycle_file("RESUMED-1")
    path = inbox.folder / "resumed.csv"
    path.write_bytes(data[: len(data) // 2].rsplit(b"\n", 1)[0] + b"\n")
    station = Station(s, smtp_settings(s, {}))
    with Ledger(s.ledger) as ledger:
        station.wire(ledger, threading.Event())
        station.rules.load(first=True)
        claims = station.claims
        assert claims.list_inbox(inbox, now_s=0.0) == ()
        assert claims.list_inbox(inbox, now_s=10.0) == ("resumed.csv",)  # quiet 10 s: settled
        with path.open("ab") as fh:  # the writer resumes before the station claims the file
            fh.write(data[len(data) // 2 :])
        claims.claim(inbox, "resumed.csv")
    assert path.exists() and not any(s.work.iterdir())
