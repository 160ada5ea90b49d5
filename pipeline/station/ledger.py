"""The station's SQLite ledger: every input, result, check row and mail, and where each stands.

Edge module: it owns one SQLite connection and nothing else (no files moved, no
mail sent, no clock read; every time is an argument, timezone-aware, stored as UTC).
Every write is one explicit ``BEGIN IMMEDIATE`` ... ``COMMIT``, so the station can
be killed at any point and, on restart, find each input at a single state boundary:

    claimed -> judged -> published -> archived
    claimed -> quarantined            (also judged -> quarantined when publishing fails)
    claimed -> duplicate              (final once it has a final_path)

The schema and its migrations live in ``pipeline.station.migrations``. This module
only combines the ledger's parts into ``Ledger`` and names what others import: the row
records (ledger_rows), the connection (ledger_base), inputs and results (ledger_inputs),
the outbox and lot digests (ledger_outbox), set-aside entries and station values
(ledger_facts), aging readings, decisions on whole cells and closed lots (ledger_cells).

>>> import datetime, pathlib, tempfile
>>> t = datetime.datetime(2026, 1, 5, 8, 0, tzinfo=datetime.UTC)
>>> with Ledger(pathlib.Path(tempfile.mkdtemp()) / "ledger.sqlite") as ledger:
...     row, earlier = ledger.claim_input(sha256="ab" * 32, name="c1.csv", size=10,
...                                       arrived_at=t, work_path="work/c1.csv")
...     (row.state, row.version, earlier)
('claimed', 1, None)
"""

from __future__ import annotations

from pipeline.station.ledger_base import BUSY_TIMEOUT_MS as BUSY_TIMEOUT_MS
from pipeline.station.ledger_cells import CellsMixin
from pipeline.station.ledger_cells import DecisionRow as DecisionRow
from pipeline.station.ledger_cells import LotRow as LotRow
from pipeline.station.ledger_cells import StoredReading as StoredReading
from pipeline.station.ledger_facts import FactsMixin
from pipeline.station.ledger_inputs import InputsMixin
from pipeline.station.ledger_outbox import OutboxMixin
from pipeline.station.ledger_rows import FINAL_STATES as FINAL_STATES
from pipeline.station.ledger_rows import INPUT_STATES as INPUT_STATES
from pipeline.station.ledger_rows import CheckRowData as CheckRowData
from pipeline.station.ledger_rows import InputRow as InputRow
from pipeline.station.ledger_rows import MailRow as MailRow
from pipeline.station.ledger_rows import OutgoingMail as OutgoingMail
from pipeline.station.ledger_rows import ResultRow as ResultRow
from pipeline.station.ledger_rows import SetAsideRow as SetAsideRow
from pipeline.station.migrations import SCHEMA_VERSION as SCHEMA_VERSION
from pipeline.station.migrations import LedgerError as LedgerError

__all__ = [
    "SCHEMA_VERSION",
    "CheckRowData",
    "DecisionRow",
    "InputRow",
    "Ledger",
    "LedgerError",
    "LotRow",
    "MailRow",
    "OutgoingMail",
    "ResultRow",
    "SetAsideRow",
    "StoredReading",
]


class Ledger(InputsMixin, OutboxMixin, FactsMixin, CellsMixin):
    """One connection to ``ledger.sqlite``; open one per process, write from one thread.

    Durability: WAL with ``synchronous=FULL`` fsyncs the log at every commit. With
    ``NORMAL`` a power cut may undo the last commits while the file moves the station
    made after them (to archive/) survive, and ledger and folders would disagree.
    """
