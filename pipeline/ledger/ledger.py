"""The ledger's face: one SQLite connection and the table families that read and write it.

Edge module: the ledger owns one SQLite connection and nothing else (no files moved, no
mail sent, no clock read; every time is an argument, timezone-aware, stored as UTC).
Every write is one explicit ``BEGIN IMMEDIATE`` ... ``COMMIT``, so the station can be
killed at any point and, on restart, find each input at a single state boundary:

    claimed -> judged -> published -> archived
    claimed -> quarantined            (also judged -> quarantined when publishing fails)
    claimed -> duplicate              (final once it has a final_path)

Why small objects over one connection, and not one class: each table family's queries live
in a module of their own (inputs.py, results.py, outbox.py, digests.py, readings.py,
decisions.py, reviews.py, regrades.py, lots.py, published.py, facts.py, certificates.py,
channel_alerts.py), and a family is an object that holds only the shared
:class:`~pipeline.ledger.connection.Connection` (reviews and regrades also the decisions
family: a review, or a regrade of a cell, and the decision it gives are one transaction). A
caller names the family it uses (``ledger.inputs.claim(...)``, ``ledger.outbox.due(...)``),
so a reader finds every query where its table is, and no family can reach another's state: a
write that spans tables (a result with its letters) is one method that opens one transaction
and inserts the letters with :func:`pipeline.ledger.outbox.insert_mail`. The schema's
migrations are migrations.py's and the code that applies them migrate.py's; the records a
row reads as are rows.py's; the hash chain over decisions and reviews is chain.py's.

>>> import datetime, pathlib, tempfile
>>> t = datetime.datetime(2026, 1, 5, 8, 0, tzinfo=datetime.UTC)
>>> with Ledger(pathlib.Path(tempfile.mkdtemp()) / "ledger.sqlite") as ledger:
...     row, earlier = ledger.inputs.claim(sha256="ab" * 32, name="c1.csv", size=10,
...                                        arrived_at=t, work_path="work/c1.csv")
...     (row.state, row.version, earlier)
('claimed', 1, None)
"""

from __future__ import annotations

import datetime
import pathlib
from typing import Self

from pipeline.ledger.certificates import Certificates
from pipeline.ledger.channel_alerts import ChannelAlerts
from pipeline.ledger.connection import Connection
from pipeline.ledger.decisions import Decisions
from pipeline.ledger.digests import Digests
from pipeline.ledger.facts import Facts
from pipeline.ledger.inputs import Inputs
from pipeline.ledger.lots import Lots
from pipeline.ledger.outbox import Outbox
from pipeline.ledger.published import Published
from pipeline.ledger.readings import Readings
from pipeline.ledger.regrades import Regrades
from pipeline.ledger.results import Results
from pipeline.ledger.reviews import Reviews


class Ledger:
    """One connection to ``ledger.sqlite``; open one per process, write from one thread.

    Durability: WAL with ``synchronous=FULL`` fsyncs the log at every commit. With
    ``NORMAL`` a power cut may undo the last commits while the file moves the station
    made after them (to archive/) survive, and ledger and folders would disagree.
    """

    def __init__(self, path: pathlib.Path, *, now: datetime.datetime | None = None) -> None:
        """Open or create the ledger at ``path`` and apply pending migrations (``now`` is
        recorded as each migration's time)."""
        self.db = Connection(path, now=now)
        self.inputs = Inputs(self.db)
        self.results = Results(self.db)
        self.outbox = Outbox(self.db)
        self.digests = Digests(self.db)
        self.readings = Readings(self.db)
        self.decisions = Decisions(self.db)
        self.lots = Lots(self.db)
        self.facts = Facts(self.db)
        self.reviews = Reviews(self.db, self.decisions)
        self.published = Published(self.db)
        self.regrades = Regrades(self.db, self.decisions)
        self.certificates = Certificates(self.db)
        self.channels = ChannelAlerts(self.db)

    @property
    def path(self) -> pathlib.Path:
        return self.db.path

    def integrity_ok(self) -> bool:
        """``PRAGMA integrity_check`` says 'ok' and no foreign key points nowhere."""
        return self.db.integrity_ok()

    def close(self) -> None:
        self.db.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
