"""The station's periodic duties besides claiming and judging: lot digests, the heartbeat, and
entries that wait too long or were left in place.

A heartbeat file shows a monitor (and `formgate status`) that the station runs, and
whether it is paused and why. A lot's digest of passed cells goes out once the lot
has been quiet for ``digest_quiet_s``. An inbox entry unchanged for
``waiting_alert_s`` and not taken raises one alert (waiting.py).
"""

from __future__ import annotations

import contextlib
import datetime
import hashlib
import json
import logging
import os
import time
import urllib.parse
from collections import deque
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import InputRow, ResultRow
from pipeline.mail.letters import DigestRow, digest_letter
from pipeline.names import to_text
from pipeline.rulebook.book import RuleBook
from pipeline.station.guard import Guarded
from pipeline.station.judges import JudgePool
from pipeline.station.settings import InboxSettings, Settings
from pipeline.station.taken import HOLD_SETTLES, Original, give_back, originals, same_bytes, tidy
from pipeline.station.troubles import describe
from pipeline.station.waiting import overdue_entries
from pipeline.station.watcher import Listing
from pipeline.station.worker import Task
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.station")


def certificate_link(pdf_path: str, certificates: Path, base_url: str | None) -> str:
    """How a digest names a certificate: a link under ``base_url``, else its full path.

    The link is the base address followed by the certificate's path under the
    certificates folder, each part percent-encoded (RFC 3986), so any cell id stays one
    working link.

    >>> certificate_link("out/certificates/L 1/C#1.pdf", Path("out/certificates"),
    ...                  "https://qa.example.com/certs")
    'https://qa.example.com/certs/L%201/C%231.pdf'
    >>> certificate_link("", Path("c"), "https://qa.example.com/")
    ''
    """
    if not pdf_path:
        return ""
    path = Path(os.path.abspath(pdf_path))
    if base_url is None:
        return str(path)
    try:
        under = path.relative_to(os.path.abspath(certificates))
    except ValueError:  # written elsewhere by an older configuration: the path says where
        return str(path)
    return base_url.rstrip("/") + "/" + "/".join(urllib.parse.quote(part) for part in under.parts)


def lot_rows(ledger: Ledger, lot: str, settings: Settings) -> list[DigestRow]:
    """Every cell of ``lot`` once, as it stands: its decision over all its stages where it has
    one (else its latest record's verdict), its grade, the grading capacity and certificate of
    its latest record that covers grading (else of its latest record)."""
    routing = settings.routing
    latest: dict[str, ResultRow] = {}
    grading: dict[str, ResultRow] = {}
    for r in ledger.results.current_of_lot(lot):  # by cell, oldest first
        latest[r.cell_id] = r
        if "grading" in json.loads(r.result_json).get("stages", ("grading",)):
            grading[r.cell_id] = r
    decisions = ledger.decisions.latest_of_lot(lot)
    cells = sorted(set(latest) | set(decisions))
    rows = []
    for cell in cells:
        record = grading.get(cell) or latest.get(cell)
        document = json.loads(record.result_json) if record is not None else {}
        decision = decisions.get(cell)
        if decision is not None:
            verdict, reason, grade = decision.verdict, decision.reason, decision.grade
        else:
            verdict = record.verdict if record is not None else "hold"
            reason = document.get("decision", "") if verdict != "pass" else ""
            grade = None
        rows.append(
            DigestRow(
                cell,
                verdict,
                document.get("metrics", {}).get("grading_capacity_Ah"),
                certificate_link(
                    (record.pdf_path or "") if record is not None else "",
                    settings.certificates,
                    routing.certificates_url,
                ),
                reason,
                grade,
            )
        )
    return rows


class Duties(Guarded):
    """Digests, heartbeat, waiting entries; the station's Station class sets these attributes."""

    rulebook: RuleBook | None
    queue: deque[tuple[InputRow, Task | None]]
    judges: JudgePool
    judged: int
    started_at: datetime.datetime
    left: dict[tuple[str, str], tuple[int, int]]  # left in place, as it was then
    overdue_alerted: set[tuple[str, str]]
    originals_checked: dict[Path, tuple[int, int]]  # (size, mtime) when found unchanged

    def queue_digests(self) -> None:
        routing = self.settings.routing
        if not routing.digests_to:
            return
        now = self.clock()
        for lot in self.ledger.digests.pending_lots():
            latest = self.ledger.digests.latest_activity(lot)
            if latest is not None and (now - latest).total_seconds() < routing.digest_quiet_s:
                continue
            cells = self.ledger.digests.passed_cells(lot)
            if not cells:
                continue
            # the digest covers the new pass cells and lists the whole lot as it stands
            rows = lot_rows(self.ledger, lot, self.settings)
            letter = digest_letter(
                lot,
                rows,
                routing.digests_to,
                station=self.settings.station_name,
                digest_no=self.ledger.digests.count(lot) + 1,
                domain=routing.domain,
            )
            self.ledger.digests.queue(letter, [c.id for c in cells], now=now)
            self.mail_wake.set()
            log.info(
                "digest queued for lot %s: %d cell(s), %d newly passed", lot, len(rows), len(cells)
            )

    def write_heartbeat(self, state: str = "running") -> None:
        """Rewrite the heartbeat file; one that cannot be written is a trouble, not a stop."""
        if state == "running" and self.troubles.paused:
            state = "paused"
        beat = {
            "state": state,
            "pid": os.getpid(),
            "station": self.settings.station_name,
            "updated_at": self.clock().isoformat(),
            "started_at": self.started_at.isoformat(),
            "judged_since_start": self.judged,
            "queued": len(self.queue),
            "in_flight": self.judges.busy(),
            "rules": [
                f"{rs.name} {rs.revision}"
                for rs in (self.rulebook.rule_sets if self.rulebook else ())
            ],
            "troubles": self.troubles.shown(),
            "last_error": self.last_error,
        }
        try:
            write_atomic(
                (json.dumps(beat, indent=2) + "\n").encode(), self.settings.heartbeat, sync=False
            )
        except OSError as exc:
            trouble = self.troubles.report(
                "heartbeat", f"the heartbeat file cannot be written ({describe(exc)})",
                now=self.clock(), now_s=time.monotonic(), blocking=False,
            )
            if trouble is not None:
                log.error("%s", trouble.reason)
            return
        self.troubles.clear("heartbeat", now=self.clock())

    def note_left(self, inbox: InboxSettings, name: str, path: Path) -> None:
        """Remember an entry that stayed in the inbox, as it is now: it is tried again once it changes."""
        try:
            st = path.lstat()
        except FileNotFoundError:
            return
        self.left[(inbox.name, name)] = (st.st_size, st.st_mtime_ns)

    def still_left(self, inbox: InboxSettings, name: str, stat: tuple[int, int]) -> bool:
        was = self.left.get((inbox.name, name))
        if was is not None and was != stat:
            del self.left[(inbox.name, name)]  # it changed: try again
            return False
        return was is not None

    def alert_overdue(self, inbox: InboxSettings, listing: Listing, ready: tuple[str, ...]) -> None:
        """One alert for the entries of ``inbox`` that have newly waited too long."""
        entries = [
            e
            for e in overdue_entries(
                listing, inbox, now_ns=time.time_ns(),
                waiting_alert_s=self.settings.waiting_alert_s, ready=ready,
            )
            if (inbox.name, e.name) not in self.overdue_alerted
            and not any(key == (inbox.name, e.name) for key in self.left)
        ]
        if not entries:
            return
        self.overdue_alerted |= {(inbox.name, e.name) for e in entries}
        lines = [f"- {e.name}: waiting {e.age}; {e.why}" for e in entries[:50]]
        if len(entries) > 50:
            lines.append(f"- and {len(entries) - 50} more (formgate status lists them)")
        for e in entries:
            log.warning("inbox %s: %s waits (%.0f s unchanged): %s", inbox.name, e.name, e.age_s, e.why)
        key = hashlib.sha256("\n".join(lines).encode()).hexdigest()[:16]
        self.alert(
            f"{len(entries)} file(s) waiting in inbox {inbox.name}",
            f"These entries of {inbox.folder} have waited more than "
            f"{self.settings.waiting_alert_s:g} s without being taken:\n\n" + "\n".join(lines)
            + "\n\nCheck the cycler's hand-over; `formgate status` shows what still waits.",
            key=f"waiting:{inbox.name}:{key}",
        )

    def review_originals(self) -> None:
        """Watch the writers' originals that settle mode keeps aside (taken.py).

        One that changed goes back into its inbox, to be taken as a new version, with one
        alert; one unchanged for HOLD_SETTLES times settle_s and equal to its copy is removed.
        A fault here is logged and tried again at the next review: it never pauses the station.
        """
        now_ns = time.time_ns()
        inboxes = {i.name: i for i in self.settings.inboxes}
        try:
            found = list(originals(self.settings.work))
        except OSError as exc:
            log.warning("the originals kept aside cannot be listed now (%s)", describe(exc))
            return
        for original in found:
            inbox = inboxes.get(original.inbox)
            if inbox is not None and not original.sha256:  # its copy was never completed
                with contextlib.suppress(OSError):
                    if give_back(original, inbox.folder) is not None:
                        log.info("%s: back in inbox %s (its copy was not completed)",
                                 to_text(original.name), inbox.name)
                continue
            quiet_s = (now_ns - original.mtime_ns) / 1e9
            if inbox is None or quiet_s < inbox.settle_s:
                continue  # still being written (or its inbox is gone): look again later
            stat = (original.size, original.mtime_ns)
            try:
                if self.originals_checked.get(original.path) != stat:
                    if not same_bytes(original.path, original.sha256):
                        self.changed_after_taken(original, inbox)
                        continue
                    self.originals_checked[original.path] = stat
                if quiet_s >= HOLD_SETTLES * inbox.settle_s:
                    original.path.unlink()  # the archive holds the same bytes
                    self.originals_checked.pop(original.path, None)
            except OSError as exc:
                log.warning("%s: cannot be checked now (%s)", original.path, describe(exc))
        if found:
            tidy(self.settings.work)

    def changed_after_taken(self, original: Original, inbox: InboxSettings) -> None:
        back = give_back(original, inbox.folder)
        name = to_text(original.name)
        if back is None:
            log.warning("%s changed after it was taken; its name is in use in inbox %s, so it "
                        "waits in %s", name, inbox.name, original.path.parent)
            return
        self.originals_checked.pop(original.path, None)
        log.warning("%s: file changed after it was taken; back in inbox %s as a new version",
                    name, inbox.name)
        self.alert(
            f"file changed after it was taken: {name}",
            f"{name} in inbox {inbox.name} was written to again after the station had taken "
            f"it (it had been unchanged for settle_s = {inbox.settle_s:g} s). The station judged "
            "and archived the file as it was then; the file as it is now goes back into the "
            "inbox and is judged as a new version, whose result supersedes the earlier one.\n\n"
            "A writer that pauses for longer than settle_s is taken too early: hand files over "
            "by rename or with a marker file instead (docs/station.md), or raise settle_s.",
            key=f"changed:{inbox.name}:{name}:{original.sha256}",
        )

