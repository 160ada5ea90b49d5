"""Several inboxes share one station: a backlog in one keeps no other waiting, and an inbox that
goes away shows at once, even while nothing can be claimed.

A real station (in a thread of the test), real inbox folders, a real SQLite ledger; the order
of the claims is read from the ledger, whose input ids are given as the files are claimed.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import Settings
from tests.station_kit import (
    cycle_file,
    drop,
    heartbeat_troubles,
    make_station,
    running,
    settled,
    station_toml,
    wait_until,
)

pytestmark = pytest.mark.slow

THREE_INBOXES = (
    '[inbox.hall-a]\nfolder = "inbox-a"\nhandover = "rename"\n\n'
    '[inbox.hall-b]\nfolder = "inbox-b"\nhandover = "rename"\n\n'
    '[inbox.hall-c]\nfolder = "inbox-c"\nhandover = "rename"\n'
)


def _final(s: Settings, expected: int) -> bool:
    """``expected`` inputs archived or quarantined (settled() lists every inbox: one is gone)."""
    if not s.ledger.exists():
        return False
    with Ledger(s.ledger) as ledger:
        return len(ledger.inputs.in_state("archived", "quarantined")) >= expected


def test_a_backlog_in_the_first_inbox_keeps_neither_the_second_waiting_nor_a_missing_third_unseen(
    tmp_path: Path,
) -> None:
    # one worker: four files in hand at most, so the backlog is claimed over many turns
    toml = station_toml(inboxes=THREE_INBOXES).replace("workers = 2", "workers = 1")
    s = make_station(tmp_path / "st", toml)
    hall_a, hall_b, hall_c = (i.folder for i in s.inboxes)
    for n in range(12):
        drop(hall_a, f"a{n:02d}.csv", cycle_file(f"A-{n:02d}", seed=n))
    for n in range(4):
        drop(hall_b, f"b{n:02d}.csv", cycle_file(f"B-{n:02d}", seed=100 + n))
    hall_c.rename(s.root / "inbox-c-unmounted")  # a share not mounted
    with running(s):
        wait_until(lambda: _final(s, 16), timeout_s=300, what="both backlogs judged")
    with Ledger(s.ledger) as ledger:
        claimed = sorted(ledger.inputs.in_state("archived", "quarantined"), key=lambda r: r.id)
        alerts = [m for state in ("pending", "sent") for m in ledger.outbox.in_state(state)
                  if m.kind == "alert" and "inbox hall-c is missing" in m.subject]
    order = [r.name[0] for r in claimed]
    # the inboxes take turns: hall-b's files are claimed one in two, not after hall-a's twelve
    assert order[:8] == ["a", "b"] * 4, order
    # hall-c was looked at in the first turn, before its neighbours' files were claimed
    assert len(alerts) == 1 and alerts[0].created_at <= claimed[0].arrived_at, (alerts, claimed[0])


def test_an_inbox_that_goes_while_nothing_can_be_claimed_shows_at_once(tmp_path: Path) -> None:
    """No valid rules: the station claims nothing, and still sees an inbox go."""
    s = make_station(tmp_path / "st", station_toml(inboxes=THREE_INBOXES))
    rules = s.rules_dir / "test_cells.toml"
    good = rules.read_text(encoding="utf-8")
    rules.write_text(good.replace("low = 0.9 ", "lowe = 0.9 "), encoding="utf-8")
    hall_a, hall_b, hall_c = (i.folder for i in s.inboxes)
    drop(hall_a, "waits.csv", cycle_file("W-1"))
    with running(s):
        wait_until(lambda: any("no valid rules" in t for t in heartbeat_troubles(s)), what="paused")
        hall_b.rename(s.root / "inbox-b-unmounted")
        wait_until(lambda: any("inbox hall-b is missing" in t for t in heartbeat_troubles(s)),
                   what="the missing inbox shown while nothing is claimed")
        assert (hall_a / "waits.csv").exists()
        (s.root / "inbox-b-unmounted").rename(hall_b)
        rules.write_text(good, encoding="utf-8")
        wait_until(lambda: settled(s, 1), what="judged once the rules are fixed")
        wait_until(lambda: not heartbeat_troubles(s), what="every trouble cleared")
    assert hall_c.is_dir()
