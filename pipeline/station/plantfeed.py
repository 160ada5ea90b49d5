"""The station's plant feed: started beside the other threads when [plant] names a database.

Edge module. Reads the plant database's password file (refused if others may read it, as
the mail server's), starts pipeline.plant's feed thread over the station's ledger, and
gives it the station's way of raising an alert (a letter to ``[mail] alerts_to``, queued in
the outbox through the feed's own ledger connection). A password file that cannot be used
does not stop the station: the feed does not start, the log says why, and `formgate status`
shows it. Forwarding itself is pipeline.plant's job.
"""

from __future__ import annotations

import datetime
import logging
import threading
from collections.abc import Callable

from pipeline.errors import SettingsError
from pipeline.ledger.ledger import Ledger
from pipeline.mail.letters import alert_letter
from pipeline.plant.connect import PlantTarget
from pipeline.plant.feed import FEED_STATE, Alert, FeedState, PlantFeed
from pipeline.station.settings import Settings, read_credential_file
from pipeline.station.settings.records import PlantSettings

log = logging.getLogger("formgate.station")


def plant_target(
    plant: PlantSettings, read_text: Callable[..., str] = read_credential_file
) -> PlantTarget:
    """Where the feed connects, with the password from its file (first line).

    Raises SettingsError for a password file that others may read, or that cannot be read
    or is empty.
    """
    password = None
    if plant.password_file is not None:
        path = plant.password_file
        try:
            lines = read_text(path).splitlines()
        except OSError as exc:
            raise SettingsError(
                f"the plant database's password file {path} cannot be read "
                f"({exc.strerror or exc})",
                None,
                hint=f"Write the password on the file's first line and run chmod 600 {path}.",
            ) from None
        password = lines[0].strip() if lines else ""
        if not password:
            raise SettingsError(f"the plant database's password file {path} has an empty first line",
                                None, hint="Write the password on the first line.")
    return PlantTarget(plant.database, plant.station_id, password, plant.connect_timeout_s,
                       plant.statement_timeout_s)


def plant_alert(settings: Settings, clock: Callable[[], datetime.datetime]) -> Alert:
    """Queue an alert letter for ``[mail] alerts_to`` through the ledger the feed holds."""

    def alert(ledger: Ledger, subject: str, text: str, key: str) -> None:
        routing = settings.routing
        if not routing.alerts_to:
            return
        letter = alert_letter(subject, text, routing.alerts_to, station=settings.station_name,
                              key=key, domain=routing.domain)
        ledger.outbox.queue(letter, now=clock())

    return alert


class StationFeed:
    """The feed thread of a running station, or nothing when no plant database is set."""

    def __init__(self, settings: Settings, clock: Callable[[], datetime.datetime]) -> None:
        self.settings = settings
        self.clock = clock
        self.stop_event = threading.Event()
        self.feed: PlantFeed | None = None

    def start(self, ledger: Ledger) -> None:
        plant = self.settings.plant
        if plant is None:
            return
        try:
            target = plant_target(plant)
        except SettingsError as exc:
            log.error("the plant feed does not start: %s", exc)
            ledger.facts.note_state(FEED_STATE, FeedState(stopped=f"not started: {exc}").to_text(),
                                    now=self.clock())
            return
        self.feed = PlantFeed(
            self.settings.ledger, target, stop=self.stop_event, clock=self.clock,
            alert=plant_alert(self.settings, self.clock), batch_rows=plant.batch_rows,
            retry_max_s=plant.retry_max_s, alert_after_s=plant.alert_after_s,
        )
        self.feed.start()
        log.info("plant feed to %s as station %s", target.shown(), target.station_id)

    def stop(self, timeout_s: float = 60.0) -> None:
        """Stop the feed; a batch in flight ends within the database's statement timeout."""
        self.stop_event.set()
        if self.feed is not None and self.feed.is_alive():
            self.feed.join(timeout_s)
