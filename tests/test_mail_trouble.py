"""The mail trouble kept in the ledger: any run of failed and good deliveries by several senders."""

from __future__ import annotations

import datetime
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.ledger.ledger import Ledger
from pipeline.station import mailtrouble

T0 = datetime.datetime(2026, 3, 2, 6, 0, tzinfo=datetime.UTC)
AFTER_S = 10.0


def _alert(folder: Path | None) -> mailtrouble.OutageAlert:
    return mailtrouble.OutageAlert(
        alerts_to=("maintenance@example.com",), station="line-1", domain="example.com",
        after_s=AFTER_S, server="mail.example.com:587", sender="formgate@example.com",
        eml_folder=folder,
    )


EVENTS = st.lists(
    st.tuples(st.integers(0, 2), st.sampled_from(["fail", "ok", "look"]),
              st.sampled_from([0.0, 1.0, 4.0, 9.0, 30.0])),
    max_size=25,
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(events=EVENTS)
def test_any_run_of_deliveries_by_three_senders_keeps_one_trouble_and_one_alert_per_outage(
    events: list[tuple[int, str, float]],
) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "ledger.sqlite"
        senders = [Ledger(path, now=T0) for _ in range(3)]
        try:
            clock = 0.0
            since: float | None = None  # the model: when the outage began, and its alert
            alerted = False
            outages_alerted = 0
            for who, what, step in events:
                clock += step
                now = T0 + datetime.timedelta(seconds=clock)
                ledger = senders[who]
                if what == "fail":
                    mailtrouble.note_failure(ledger, f"421 busy ({who})", now=now)
                    if since is None:
                        since, alerted = clock, False
                elif what == "ok":
                    ended = mailtrouble.note_success(ledger, now=now)
                    assert (ended is None) == (since is None)
                    since = None
                letter = mailtrouble.alert_if_due(ledger, _alert(Path(folder) / "mail"), now=now)
                due = since is not None and not alerted and clock - since >= AFTER_S
                assert (letter is not None) == due
                if due:
                    alerted, outages_alerted = True, outages_alerted + 1
                trouble = mailtrouble.current(senders[(who + 1) % 3])  # as another sees it
                if since is None:
                    assert trouble is None
                else:
                    assert trouble is not None
                    assert trouble.since == T0 + datetime.timedelta(seconds=since)
                    assert (trouble.alerted_at is not None) == alerted
                    assert trouble.shown().startswith("trouble: mail cannot be delivered: 421")
            alerts = [m for m in senders[0].outbox.in_state("pending") if m.kind == "alert"]
            assert len(alerts) == len({m.message_id for m in alerts}) == outages_alerted
            assert len(list((Path(folder) / "mail").glob("*.eml"))) == outages_alerted
        finally:
            for ledger in senders:
                ledger.close()


def test_the_alert_says_how_it_reaches_people_and_where_its_copy_is(tmp_path: Path) -> None:
    with Ledger(tmp_path / "ledger.sqlite", now=T0) as ledger:
        mailtrouble.note_failure(ledger, "cannot connect to mail.example.com:587: refused", now=T0)
        later = T0 + datetime.timedelta(seconds=AFTER_S)
        letter = mailtrouble.alert_if_due(ledger, _alert(tmp_path / "mail"), now=later)
        assert letter is not None
        assert mailtrouble.alert_if_due(ledger, _alert(tmp_path / "mail"), now=later) is None
    (copy,) = (tmp_path / "mail").glob("*.eml")
    assert letter.subject == "formgate: ALERT \N{EM DASH} mail cannot be delivered since " \
        "2026-03-02T06:00:00+00:00"
    body = letter.body_text
    assert f"a copy of it was written at once as a file on the station, {copy}" in body
    assert "by mail it arrives only once the server takes mail again" in body
    assert "NOBODY IS TOLD BY MAIL OF A FAILED OR HELD CELL" in body
    assert "cannot connect to mail.example.com:587: refused" in body
    assert "keep failed cells apart as usual until qualified personnel release them" in body
