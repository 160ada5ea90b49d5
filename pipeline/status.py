"""`formgate status`: what the station is doing, read from its ledger, heartbeat and folders.

Read-only: it never claims, moves or writes anything, so it is safe to run beside
a running station (SQLite WAL lets a reader in while the station writes).
"""

from __future__ import annotations

import datetime
import json
import os
from pathlib import Path

from pipeline.handoff import is_temporary
from pipeline.ledger import Ledger
from pipeline.settings import Settings

STALE_FACTOR = 3  # a heartbeat older than this many intervals means the station is not running


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def health(settings: Settings, now: datetime.datetime) -> tuple[str, dict[str, object]]:
    """('running' | 'stopped' | 'not responding' | 'never started', heartbeat contents)."""
    try:
        beat = json.loads(settings.heartbeat.read_text(encoding="utf-8"))
    except (FileNotFoundError, json.JSONDecodeError):
        return "never started", {}
    if beat.get("state") == "stopped":
        return "stopped", beat
    updated = datetime.datetime.fromisoformat(str(beat.get("updated_at")))
    age = (now - updated).total_seconds()
    if age > STALE_FACTOR * settings.heartbeat_s + 5 or not _pid_alive(int(beat.get("pid", 0))):
        return "not responding", beat
    return "running", beat


def _files(folder: Path) -> list[str]:
    if not folder.exists():
        return []
    return sorted(p.name for p in folder.iterdir() if p.is_file() and not is_temporary(p.name))


def status_text(settings: Settings, now: datetime.datetime) -> str:
    """The whole status report as text."""
    state, beat = health(settings, now)
    lines = [f"station {settings.station_name}: {state}"]
    if beat:
        lines.append(
            f"  last heartbeat {beat.get('updated_at')}, pid {beat.get('pid')}, "
            f"judged since start {beat.get('judged_since_start')}"
        )
        if beat.get("rules"):
            rules = beat["rules"]
            shown = ", ".join(str(r) for r in rules) if isinstance(rules, list) else str(rules)
            lines.append(f"  rules in force: {shown}")
        if beat.get("last_error"):
            lines.append(f"  last error: {beat['last_error']}")
    lines.append("")
    lines.append("queue")
    for inbox in settings.inboxes:
        waiting = _files(inbox.folder)
        lines.append(
            f"  {inbox.name} ({inbox.folder}, {inbox.handover}): {len(waiting)} file(s) waiting"
        )
        for name in waiting[:5]:
            lines.append(f"    {name}")
    lines.append(f"  work: {len(_files(settings.work))} file(s) being judged")
    if not settings.ledger.exists():
        lines.append("\nno ledger yet")
        return "\n".join(lines) + "\n"
    midnight = now.astimezone(datetime.UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    with Ledger(settings.ledger, now=now) as ledger:
        counts = ledger.counts_since(midnight)
        lines.append("")
        lines.append(
            "today (UTC): "
            + ", ".join(
                f"{counts.get(k, 0)} {k}" for k in ("pass", "fail", "hold", "error", "duplicate")
            )
        )
        lines.append("")
        lines.append("last cells")
        for r in ledger.recent_results(10):
            lines.append(
                f"  {r.analysed_at.isoformat()}  {r.cell_id}  lot {r.lot}  {r.verdict}"
                + (f"  hazard: {', '.join(r.hazards)}" if r.hazards else "")
            )
        outbox = ledger.outbox_counts()
        lines.append("")
        lines.append(
            "outbox: " + ", ".join(f"{outbox.get(k, 0)} {k}" for k in ("pending", "sent", "parked"))
        )
        errors = ledger.recent_errors(5)
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
    return "\n".join(lines) + "\n"
