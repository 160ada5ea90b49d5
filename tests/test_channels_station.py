"""A station watches its channels: a channel whose cells start failing is alerted once, and the
failure letters of its later cells say the channel is suspect and keep every caution.

Invented line: station "bench-3", channels "R1-C01".."R1-C04", lot "L-CH-05", TEST-CELL cells.
"""

from __future__ import annotations

import datetime
from pathlib import Path

import pytest
from pypdf import PdfReader

from pipeline.cli.main import main
from pipeline.ledger.ledger import Ledger
from tests.station_kit import cycle_file, drop, make_station, running, settled, station_toml, wait_until

CHANNELS, TURNS, BAD, WORN_FROM = 4, 8, "R1-C03", 5


def _file(n: int) -> tuple[str, bytes]:
    slot, turn = (n - 1) % CHANNELS + 1, (n - 1) // CHANNELS + 1
    channel = f"R1-C{slot:02d}"
    failing = channel == BAD and turn >= WORN_FROM
    data = cycle_file(f"CH-{n:03d}", lot="L-CH-05", capacity_ah=1.5 if failing else 2.0, seed=n)
    start = datetime.datetime(2026, 3, 6, 6, tzinfo=datetime.UTC) + datetime.timedelta(hours=2 * turn, minutes=slot)
    head = f"# channel: {channel}\n# station: bench-3\n# started_at: {start.isoformat()}\n".encode()
    return f"CH-{n:03d}.csv", head + data


@pytest.mark.slow
def test_a_channel_whose_cells_start_failing_is_alerted_once_and_its_later_fails_say_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    settings = make_station(tmp_path / "st")
    with running(settings):
        for n in range(1, CHANNELS * TURNS + 1):
            name, data = _file(n)
            drop(settings.inboxes[0].folder, name, data)
            wait_until(lambda n=n: settled(settings, n), timeout_s=60, what=f"file {n} judged")
    with Ledger(settings.ledger) as ledger:
        alerts = ledger.channels.every()
        assert [(a.station, a.channel, a.cleared_at) for a in alerts] == [("bench-3", BAD, None)]
        assert "failed check capacity" in alerts[0].evidence
        mails = [dict(r) for r in ledger.db.rows("SELECT kind, subject, body_text FROM outbox ORDER BY id")]
    alerted = [m for m in mails if m["kind"] == "alert" and "is suspect" in m["subject"]]
    assert [m["subject"] for m in alerted] == ["formgate: ALERT \N{EM DASH} channel R1-C03 at bench-3 is suspect"]
    assert "Check the channel's contacts" in alerted[0]["body_text"]
    failures = [m for m in mails if m["kind"] == "failure"]
    assert len(failures) == TURNS - WORN_FROM + 1
    noted = [m for m in failures if "that tested this cell is suspect" in m["body_text"]]
    assert 1 <= len(noted) < len(failures)  # the fails after the alert, not the ones before it
    for m in failures:  # the note never takes a caution away
        assert m["subject"].startswith("formgate: FAIL cell") and "Do not release this cell" in m["body_text"]
        assert "qualified personnel" in m["body_text"] or "site" in m["body_text"]
    # the cell certificates of those cells say so too, beside their FAIL and their cautions
    for m in failures:
        cell = m["subject"].split("FAIL cell ")[1].split(",")[0]
        pdf = settings.certificates / "L-CH-05" / f"{cell}~cell.pdf"
        text = " ".join(" ".join(p.extract_text() for p in PdfReader(pdf).pages).split())
        assert "FAIL" in text and "qualified personnel" in text
        assert ("Suspect channel." in text) == (m in noted), cell
        if m in noted:
            assert "which was suspect when it was judged" in text and "applies in full" in text
        # and the record's own certificate, under its FAIL verdict
        record = settings.certificates / "L-CH-05" / f"{cell}.pdf"
        text = " ".join(" ".join(p.extract_text() for p in PdfReader(record).pages).split())
        assert "FAIL" in text and ("This record failed on channel R1-C03" in text) == (m in noted), cell
    # the channel's cells after the alert: their failure letters name it, and keep the cautions
    assert main(["channel", "list", str(settings.root)]) == 0
    listed = capsys.readouterr().out
    assert "R1-C03" in listed and "suspect" in listed
    assert main(["channel", "show", str(settings.root), "R1-C03"]) == 0
    shown = capsys.readouterr().out
    assert "failed check capacity" in shown
    assert main(["status", str(settings.root)]) == 0
    assert "suspect channel: R1-C03 at bench-3 since " in capsys.readouterr().out
    assert main(["channel", "clear", str(settings.root), "R1-C03", "--by", "technician C",
                 "--reason", "contact block replaced"]) == 0
    capsys.readouterr()
    with Ledger(settings.ledger) as ledger:
        (alert,) = ledger.channels.every()
        assert alert.cleared_by == "technician C" and alert.cleared_why == "contact block replaced"
    assert main(["status", str(settings.root)]) == 0
    assert "suspect channels: none" in capsys.readouterr().out


@pytest.mark.slow
def test_with_suspect_fails_retest_a_suspect_channels_later_fail_waits_for_a_retest(tmp_path: Path) -> None:
    """[channels] suspect_fails = "retest": a cell the suspect channel fails after its alert is
    held for a retest of its stage; its record stays failed, and the earlier fails stay failed."""
    toml = station_toml(extra='\n[channels]\nsuspect_fails = "retest"\n')
    settings = make_station(tmp_path / "st", toml)
    with running(settings):
        for n in range(1, CHANNELS * TURNS + 1):
            name, data = _file(n)
            drop(settings.inboxes[0].folder, name, data)
            wait_until(lambda n=n: settled(settings, n), timeout_s=60, what=f"file {n} judged")
    with Ledger(settings.ledger) as ledger:
        (alert,) = ledger.channels.every()
        bad = [f"CH-{n:03d}" for n in range(1, CHANNELS * TURNS + 1)
               if (n - 1) % CHANNELS + 1 == 3 and (n - 1) // CHANNELS + 1 >= WORN_FROM]
        decided = {c: ledger.decisions.latest("L-CH-05", c) for c in bad}
        records = {c: ledger.results.of_cell("L-CH-05", c)[-1].verdict for c in bad}
    assert set(records.values()) == {"fail"}  # every record stays failed
    waiting = [c for c, d in decided.items() if d is not None and d.verdict == "hold"]
    assert waiting and all("retest asked by station test-station" in decided[c].reason for c in waiting)
    assert decided[bad[0]] is not None and decided[bad[0]].verdict == "fail"  # before the alert
    assert alert.channel == BAD
