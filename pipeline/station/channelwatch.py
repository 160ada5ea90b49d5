"""The station's watch on its channels: screen them as records arrive, alert once per suspect
channel, and word a failed cell's note when the channel that tested it is suspect.

Edge module: it reads the station's latest records back from the ledger (channel_alerts.py),
screens them with the pure :func:`pipeline.judge.channels.screen_channels`, and records an
alert on each newly suspect channel with its alert mail in one transaction. A channel stays
suspect until a person clears it (`formgate channel clear`); it is alerted once per episode
however many of its cells fail meanwhile.

A note that a channel is suspect never softens a failed cell's handling: the letter still
says FAIL, gives every caution and defers to the site's procedures; the note only adds that
the cell may be good and should be retested on another channel once a person allows it.
"""

from __future__ import annotations

import datetime
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from pipeline.acceptance.results import CellResult
from pipeline.judge.channels import ChannelRecord, ChannelScreen, Suspect, channel_label, screen_channels
from pipeline.ledger.channel_alerts import ChannelAlert
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import ResultRow
from pipeline.mail.letters import alert_letter
from pipeline.station.settings import Settings

log = logging.getLogger("formgate.station")


@dataclass(frozen=True, slots=True)
class ChannelWatch:
    """How a station watches its channels: the screen, and how many of its latest records
    (over all lots) the screen looks at."""

    screen: ChannelScreen = field(default_factory=ChannelScreen)
    window: int = 2000


DEFAULT_WATCH = ChannelWatch()
# A passed record can only move the bias test, which needs many cells: the station screens
# after every failed or held record, and after every this many passed ones (a screen of
# 2,000 records costs tens of milliseconds: benchmarks/channel_screen.py).
PASSES_PER_SCREEN = 20


def watch_of(settings: Settings) -> ChannelWatch:
    """The watch station.toml's [channels] table asks for."""
    c = settings.channels
    screen = ChannelScreen(false_alarm=c.false_alarm, recent=c.recent, min_records=c.min_records,
                           min_run=c.min_run)
    return ChannelWatch(screen, c.window)


def place_of(result: CellResult) -> tuple[str, str]:
    """(station, channel) as the record's file names them ("" where it names none)."""
    meta = dict(result.metadata)
    return str(meta.get("station") or ""), str(meta.get("channel") or "")


def station_records(ledger: Ledger, window: int) -> list[ChannelRecord]:
    return [
        ChannelRecord(r.station, r.channel, r.started_at, r.cell_id, r.lot, r.verdict, r.checks_out,
                      r.metrics)
        for r in ledger.channels.recent_records(window)
    ]


def alert_text(suspect: Suspect, cell_id: str, lot: str) -> str:
    lines = [f"{channel_label(suspect.key).capitalize()} is suspect, as of cell {cell_id} of lot {lot}:"]
    lines += [f"- {e.text}" for e in suspect.evidence]
    lines += [
        "",
        suspect.advice,
        "Cells this channel failed may be good: retest them on another channel once a person "
        "allows it; until then they stay failed and are handled as failed cells. Clear the "
        "alert with `formgate channel clear` when the channel has been checked.",
    ]
    return "\n".join(lines)


def watch_channels(
    ledger: Ledger, settings: Settings, result: CellResult, *, now: datetime.datetime,
    watch: ChannelWatch | None = None,
) -> list[Suspect]:
    """Screen the station's channels after ``result`` was recorded; raise one alert (with its
    mail) on each suspect channel that has none open. Returns the channels newly alerted."""
    if not place_of(result)[1]:
        return []
    watch = watch or watch_of(settings)
    raised = []
    records = station_records(ledger, watch.window)
    for suspect in screen_channels(records, watch.screen):
        station, channel = suspect.key
        if ledger.channels.open_alert(station, channel) is not None:
            continue
        last = max((r for r in records if r.key == suspect.key), key=lambda r: (r.order, r.cell_id))
        text = alert_text(suspect, last.cell_id, last.lot)
        routing = settings.routing
        mail = alert_letter(
            f"{channel_label(suspect.key)} is suspect", text, routing.alerts_to,
            station=settings.station_name, key=f"channel:{station}:{channel}:{now.isoformat()}",
            domain=routing.domain,
        ) if routing.alerts_to else None
        if ledger.channels.raise_alert(
            station=station, channel=channel, cell_id=last.cell_id, lot=last.lot,
            evidence="; ".join(e.text for e in suspect.evidence), advice=suspect.advice,
            mail=mail, now=now,
        ):
            log.warning("%s is suspect: %s", channel_label(suspect.key),
                        "; ".join(e.text for e in suspect.evidence))
            raised.append(suspect)
    return raised


def suspect_note(alert: ChannelAlert | None) -> str:
    """The words a failed cell's letter adds when its channel is suspect ("" when it is not)."""
    if alert is None:
        return ""
    return (
        f"The {channel_label((alert.station, alert.channel))} that tested this cell is suspect "
        f"(alert raised {alert.raised_at.isoformat(timespec='minutes')}: {alert.evidence}). The "
        "cell may be good and can be retested on another channel once a person allows it; until "
        "then it is a failed cell: the cautions below apply in full."
    )


def suspect_notes(
    ledger: Ledger, rows: Sequence[ResultRow], docs: Sequence[Mapping[str, Any]], *,
    record_words: bool = True,
) -> tuple[str, ...]:
    """For a cell certificate: one line per failed record of the cell that a channel failed
    while it was suspect (an alert raised before the record was judged, not cleared by then).
    The same ledger gives the same lines, whenever the certificate is made again.
    ``record_words`` False: for the record's own certificate ("This record failed on ...")."""
    notes = []
    for row, doc in zip(rows, docs, strict=True):
        where = doc.get("cell", {})
        channel, station = str(where.get("channel") or ""), str(where.get("station") or "")
        if row.verdict != "fail" or not channel:
            continue
        for alert in ledger.channels.every(station, channel):
            if alert.raised_at <= row.analysed_at and (alert.cleared_at is None
                                                       or alert.cleared_at > row.analysed_at):
                what = (f"Record {doc.get('input', {}).get('name') or row.cell_id}" if record_words
                        else "This record")
                notes.append(
                    f"{what} failed on "
                    f"{channel_label((station, channel))}, which was suspect when it was judged "
                    f"(alert raised {alert.raised_at.isoformat(timespec='minutes')}: "
                    f"{alert.evidence}). The cell may be good and can be retested on another "
                    "channel once a person allows it; until then it is a failed cell and every "
                    "caution on this certificate applies in full."
                )
                break
    return tuple(notes)


def open_alert_for(ledger: Ledger, result: CellResult) -> ChannelAlert | None:
    station, channel = place_of(result)
    return ledger.channels.open_alert(station, channel) if channel else None


__all__ = [
    "DEFAULT_WATCH",
    "PASSES_PER_SCREEN",
    "ChannelWatch",
    "open_alert_for",
    "suspect_note",
    "suspect_notes",
    "watch_channels",
    "watch_of",
]
