"""Settle hand-over: a writer that pauses longer than settle_s, then goes on writing.

The station judges its own copy of what it took; the writer's later bytes never reach
the archived file (the archive always matches the ledger's hash), and the grown file
comes back as a new version with one alert "file changed after it was taken".
"""

from __future__ import annotations

import email
import email.policy
import hashlib
import time
from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from tests.station_kit import cycle_file, make_station, running, settled, station_toml, wait_until

pytestmark = pytest.mark.slow

SETTLE = '[inbox.main]\nfolder = "inbox"\nhandover = "settle"\nsettle_s = 1.0\n'


def test_a_writer_that_pauses_then_appends_gives_a_new_version_and_never_alters_the_archive(
    tmp_path: Path,
) -> None:
    # originals kept 7.2 s here (a day by default): longer than the writer's pause below
    s = make_station(tmp_path / "st", station_toml(inboxes=SETTLE, extra="keep_originals_h = 0.002\n"))
    data = cycle_file("PW-1")
    cut = data.rindex(b"\n", 0, len(data) // 2) + 1  # half of it, ending on a whole line
    path = s.inboxes[0].folder / "paused.csv"
    with running(s):
        with path.open("wb") as writer:
            writer.write(data[:cut])
            writer.flush()
            wait_until(lambda: not path.exists(), what="the first half taken")
            # the writer comes back after 5 x settle_s (its handle follows its file): past the
            # four settles an original used to be kept, which lost the rest without an alert
            time.sleep(5.0)
            writer.write(data[cut:])
        wait_until(lambda: settled(s, 2), what="the whole file taken as a new version")
        wait_until(lambda: not (s.work / ".taken").exists(), timeout_s=30,
                   what="originals removed once unchanged for keep_originals_h and equal to their copies")
        wait_until(lambda: bool(_alerts(s)), what="alert")
    with Ledger(s.ledger) as ledger:
        rows = sorted(ledger.inputs.in_state("archived", "quarantined"), key=lambda r: r.id)
        assert [(r.name, r.version, r.size) for r in rows] == [
            ("paused.csv", 1, cut),
            ("paused.csv", 2, len(data)),
        ]
        for row in rows:  # the archive (or quarantine) holds exactly the bytes the ledger hashed
            kept = Path(row.final_path or "").read_bytes()
            assert hashlib.sha256(kept).hexdigest() == row.sha256
        latest = ledger.results.of_input(rows[1].id)
        assert latest is not None and latest.verdict == "pass"
        first = ledger.results.of_input(rows[0].id)
        assert first is None or first.superseded_by == latest.id
    alert = _alerts(s)[0]
    assert "paused.csv in inbox main was written to again after the station had taken it" in alert
    assert "hand files over by rename or with a marker file instead" in alert


def _alerts(s) -> list[str]:  # type: ignore[no-untyped-def]
    out = []
    for p in s.mail.glob("*.eml"):
        msg = email.message_from_bytes(p.read_bytes(), policy=email.policy.default)
        if "file changed after it was taken" in str(msg["Subject"]):
            out.append(msg.get_body().get_content().replace("\r\n", "\n"))  # type: ignore[union-attr]
    return out
