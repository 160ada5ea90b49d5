"""`formgate status`: what the station is doing, read from its ledger, heartbeat and folders.

Read-only: it never claims, moves or writes anything, so it is safe to run beside
a running station (SQLite WAL lets a reader in while the station writes, and opening
a current ledger takes no write lock). A ledger that cannot be read at all (another
process keeps even readers out) leaves the heartbeat and the folders to show.
"""

from __future__ import annotations

import datetime
import json
import os
import sqlite3
from pathlib import Path

from pipeline.ledger.certificates import Backlog
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.migrate import LedgerError
from pipeline.names import from_text, to_text
from pipeline.station.board import process_exists
from pipeline.station.handoff import is_temporary
from pipeline.station.heartbeat import read_heartbeat
from pipeline.station.mailtrouble import current as mail_trouble
from pipeline.station.settings import Settings
from pipeline.station.startup import read_waiting
from pipeline.station.troubles import describe
from pipeline.station.waiting import overdue_entries
from pipeline.station.watcher import list_entries

STALE_FACTOR = 3  # a heartbeat older than this many intervals means the station is not running


def health(settings: Settings, now: datetime.datetime) -> tuple[str, dict[str, object]]:
    """('running' | 'paused' | 'waiting to start' | 'stopped' | 'not responding' | 'never
    started', heartbeat contents); a station that waits to start shows its reason, never the
    heartbeat its predecessor left."""
    waiting = read_waiting(settings.root)
    if waiting is not None and process_exists(waiting.pid):
        return "waiting to start", {}
    try:
        beat = read_heartbeat(settings.heartbeat)
    except (FileNotFoundError, ValueError):
        return "never started", {}
    if beat.get("state") == "stopped":
        return "stopped", beat
    updated = datetime.datetime.fromisoformat(str(beat.get("updated_at")))
    age = (now - updated).total_seconds()
    if age > STALE_FACTOR * settings.heartbeat_s + 5 or not process_exists(int(str(beat.get("pid", 0)))):
        return "not responding", beat
    return ("paused" if beat.get("state") == "paused" else "running"), beat


def waiting_lines(folder: Path) -> list[str]:
    """What a station waiting to start in ``folder`` says: why, since when, its process."""
    waiting = read_waiting(folder)
    if waiting is None or not process_exists(waiting.pid):
        return []
    first, *rest = waiting.reason.splitlines() or [""]
    return [f"  since {waiting.since.isoformat(timespec='seconds')} (pid {waiting.pid}): {first}",
            *(f"  {line.strip()}" for line in rest)]


def _files(folder: Path) -> list[str]:
    """Regular files with final names, as text (a name may hold any bytes)."""
    try:
        names = list_entries(folder).files
    except OSError:
        return []
    return sorted(to_text(n) for n in names if not is_temporary(n))


def _overdue_lines(settings: Settings, now: datetime.datetime, left: dict[str, dict[str, str]]) -> list[str]:
    """Inbox entries unchanged for longer than waiting_alert_s and not taken, with age and reason."""
    lines = []
    for inbox in settings.inboxes:
        try:
            listing = list_entries(inbox.folder)
        except OSError as exc:
            lines.append(f"  {inbox.name}: the folder cannot be listed ({exc.strerror or exc})")
            continue
        for e in overdue_entries(
            listing,
            inbox,
            now_ns=int(now.timestamp() * 1e9),
            waiting_alert_s=settings.waiting_alert_s,
            left=left.get(inbox.name, {}),
        ):
            lines.append(f"  {inbox.name}: {e.name}: waiting {e.age}; {e.why}")
    return lines


def certificates_line(backlog: Backlog, now: datetime.datetime) -> str:
    """Certificates promised and not yet rendered (the station renders them when its workers
    have nothing to judge), and those given up.

    >>> t = datetime.datetime(2026, 1, 5, 8, 0, tzinfo=datetime.UTC)
    >>> certificates_line(Backlog(212, t, 0), t + datetime.timedelta(seconds=40))
    'certificates waiting: 212, oldest 40 s'
    >>> certificates_line(Backlog(0, None, 1), t)
    'certificates waiting: none (1 could not be rendered: see the station log)'
    """
    if backlog.waiting:
        age = max(0.0, (now - backlog.oldest).total_seconds()) if backlog.oldest else 0.0
        text = f"certificates waiting: {backlog.waiting:,}, oldest {age:.0f} s"
    else:
        text = "certificates waiting: none"
    if backlog.failed:
        text += f" ({backlog.failed:,} could not be rendered: see the station log)"
    return text


def status_text(settings: Settings, now: datetime.datetime) -> str:
    """The whole status report as text."""
    state, beat = health(settings, now)
    lines = [f"station {settings.station_name}: {state}"]
    if state == "waiting to start":
        lines += waiting_lines(settings.root)
    if beat:
        lines.append(
            f"  last heartbeat {beat.get('updated_at')}, pid {beat.get('pid')}, "
            f"judged since start {beat.get('judged_since_start')}"
        )
        if beat.get("rules"):
            rules = beat["rules"]
            shown = ", ".join(str(r) for r in rules) if isinstance(rules, list) else str(rules)
            lines.append(f"  rules in force: {shown}")
        troubles = beat.get("troubles")
        if isinstance(troubles, list):
            lines += [f"  {t}" for t in troubles]
        if beat.get("last_error"):
            lines.append(f"  last error: {beat['last_error']}")
    lines.append("")
    lines.append("queue")
    for inbox in settings.inboxes:
        if not inbox.folder.is_dir():
            lines.append(f"  {inbox.name} ({inbox.folder}, {inbox.handover}): the folder is "
                         "not there (a share not mounted, or removed)")
            continue
        waiting = _files(inbox.folder)
        lines.append(
            f"  {inbox.name} ({inbox.folder}, {inbox.handover}): {len(waiting)} file(s) waiting"
        )
        for name in waiting[:5]:
            lines.append(f"    {name}")
    lines.append(f"  work: {len(_files(settings.work))} file(s) being judged")
    if not settings.ledger.exists():
        overdue = _overdue_lines(settings, now, {})
        if overdue:
            lines += ["", f"waiting too long (unchanged for over {settings.waiting_alert_s:g} s)"]
            lines += overdue
        lines.append("\nno ledger yet")
        return "\n".join(lines) + "\n"
    try:
        lines = _with_ledger(settings, now, state, list(lines))
    except (LedgerError, sqlite3.Error) as exc:
        # another process keeps even readers out (an exclusive lock), or the file is damaged:
        # what the heartbeat and the folders say is shown all the same
        lines += ["", f"ledger: cannot be read now: {_why_unreadable(exc, settings.ledger)}"]
    return "\n".join(lines) + "\n"


def _why_unreadable(exc: LedgerError | sqlite3.Error, ledger: Path) -> str:
    cause = exc.__cause__ if isinstance(exc, LedgerError) else exc
    if isinstance(cause, sqlite3.Error) and getattr(cause, "sqlite_errorname", "") in (
        "SQLITE_BUSY", "SQLITE_LOCKED"
    ):
        return f"{describe(cause, ledger=ledger)}; the rest of the status is in it"
    return str(exc).replace("\n", " ")


def _with_ledger(
    settings: Settings, now: datetime.datetime, state: str, lines: list[str]
) -> list[str]:
    """``lines`` (heartbeat and queue) with what the ledger adds: the report's rest."""
    midnight = now.astimezone(datetime.UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    with Ledger(settings.ledger, now=now) as ledger:
        noted = ledger.facts.state("paused")
        if noted and noted[0] and state not in ("running", "paused"):
            lines.insert(1, f"  last noted in the ledger: {noted[0]}")
        mail = mail_trouble(ledger)  # noted by whichever sender tried last: the ledger knows
        if mail is not None:
            lines.insert(lines.index("queue") - 1, f"  {mail.shown()}")
        if settings.plant is not None:  # noted by the feed: the ledger knows how far behind it is
            from pipeline.plant.connect import PlantTarget  # the database driver: only then
            from pipeline.plant.feed import status_line as feed_status_line

            shown = PlantTarget(settings.plant.database, settings.plant.station_id).shown()
            lines.insert(lines.index("queue") - 1, f"  {feed_status_line(ledger, shown)}")
        left: dict[str, dict[str, str]] = {}
        still_there = []
        folders = {i.name: i.folder for i in settings.inboxes}
        for row in reversed(ledger.facts.set_aside_rows(1000, state="left_in_place")):
            name = from_text(row.name)
            left.setdefault(row.inbox, {})[name] = row.reason.splitlines()[0]
            if row.inbox in folders and os.path.lexists(folders[row.inbox] / name):
                still_there.append(f"  {row.inbox}: {row.reason.splitlines()[0]}")
        if still_there:
            lines += ["", "left in place (the station cannot move them out of the inbox)"]
            lines += sorted(set(still_there))
        overdue = _overdue_lines(settings, now, left)
        if overdue:
            lines += ["", f"waiting too long (unchanged for over {settings.waiting_alert_s:g} s)"]
            lines += overdue
        aside = ledger.facts.set_aside_rows(5, state="quarantined")
        if aside:
            lines += ["", "set aside lately (not inputs; in quarantine with a reason)"]
            for a in aside:
                lines.append(f"  {a.noticed_at.isoformat(timespec='seconds')}  {a.inbox}: "
                             f"{a.reason.splitlines()[0]}")
        counts = ledger.inputs.counts_since(midnight)
        lines.append("")
        lines.append(
            "today (UTC): "
            + ", ".join(
                f"{counts.get(k, 0)} {k}" for k in ("pass", "fail", "hold", "error", "duplicate")
            )
            # an OCV reading file has no verdict of its own: it is counted as what it is
            + f", {counts.get('readings', 0)} reading file"
            + ("" if counts.get("readings", 0) == 1 else "s")
        )
        people = ledger.reviews.waiting()  # fails and holds no person has reviewed, oldest first
        if people:
            from pipeline.station.reviewing import age_words  # imports the lot-judging stack

            lines.append(
                f"waiting for a person: {len(people)} cell(s), the oldest for "
                f"{age_words((now - people[0][4]).total_seconds())} (cell {people[0][1]} of lot "
                f"{people[0][0]}, {people[0][2]}); formgate review list shows them"
            )
        else:
            lines.append("waiting for a person: none")
        lines.append(certificates_line(ledger.certificates.backlog(), now))
        suspect = [c for c in ledger.channels.every() if c.cleared_at is None]
        for alert in suspect:  # formgate channel show says why, formgate channel clear ends it
            where = f" at {alert.station}" if alert.station else ""
            lines.append(f"suspect channel: {alert.channel}{where} since "
                         f"{alert.raised_at.isoformat(timespec='seconds')}: {alert.evidence}")
        if not suspect:
            lines.append("suspect channels: none")
        lines.append("")
        lines.append("last cells")
        seen: set[tuple[str, str]] = set()
        for r in ledger.results.recent(50):
            if (r.lot, r.cell_id) in seen or len(seen) == 10:
                continue  # one line per cell: its latest record, and which of how many it is
            seen.add((r.lot, r.cell_id))
            # a fail or hold names what decided it (the result's deciding line)
            decision = json.loads(r.result_json).get("decision", "") if r.verdict != "pass" else ""
            stages = json.loads(r.result_json).get("stages")
            records = [  # of the same stages: a cell's formation and grading files are one each
                x for x in ledger.results.of_cell(r.lot, r.cell_id)
                if json.loads(x.result_json).get("stages") == stages
            ]
            number = next((n for n, x in enumerate(records, 1) if x.id == r.id), len(records))
            cell = ledger.decisions.latest(r.lot, r.cell_id)
            lines.append(
                f"  {r.analysed_at.isoformat()}  {r.cell_id}  lot {r.lot}  {r.verdict}"
                + (f": {decision}" if decision else "")
                + (f"  hazard: {', '.join(r.hazards)}" if r.hazards else "")
                + (f"  (record {number} of {len(records)})" if len(records) > 1 else "")
            )
            if cell is not None and (cell.verdict != r.verdict or cell.reason != decision):
                lines.append(f"      the cell: {cell.verdict}" + (f": {cell.reason}" if cell.reason else ""))
        outbox = ledger.outbox.counts()
        held = ledger.outbox.waiting_for_files(now)
        lines.append("")
        lines.append(
            "outbox: " + ", ".join(f"{outbox.get(k, 0)} {k}" for k in ("pending", "sent", "parked"))
            + (f" ({held} waiting for the certificate they attach or link)" if held else "")
        )
        errors = ledger.inputs.recent_errors(5)
        if errors:
            lines.append("")
            lines.append("recent errors")
            for e in errors:
                first = (e.reason or "").splitlines()[0] if e.reason else ""
                lines.append(f"  {e.name}: {first}")
        lines.append("")
        lines.append(
            f"ledger integrity: {'ok' if ledger.integrity_ok() else 'DAMAGED - see docs/station.md'}"
        )
    return lines
