"""Set aside an inbox entry that cannot be taken as an input, so that it never stops the station.

A folder, a symbolic link, a named pipe, a file the station may not read, a marker
whose data never came: each is moved to the quarantine folder with a reason file
beside it, recorded in the ledger's ``set_aside`` table and alerted once. An entry
that cannot even be moved (the station may not rename it) is left in place, recorded
as "left in place: <reason>" and alerted; the station then leaves it alone until it
changes. An error that is not the entry's fault (the quarantine folder is read-only,
the disk is full) is raised, for the station to pause on (troubles.py).
"""

from __future__ import annotations

import datetime
import errno
import logging
import os
import tempfile
import threading
from pathlib import Path

from pipeline.ledger.ledger import Ledger
from pipeline.mail.letters import Letter, alert_letter
from pipeline.names import fit, to_text
from pipeline.station.settings import Settings
from pipeline.writing import move_into, require_folder, write_atomic

log = logging.getLogger("formgate.station")

ASIDE_PREFIX = "aside-"  # quarantine/aside-<set-aside id>_NAME; inputs are <input id>_NAME

REASON_SUFFIX = ".reason.txt"
# room kept after a name in quarantine for the reason file's suffix or a marker suffix
NAME_RESERVE_BYTES = 32

_WHAT = {
    "folder": (
        "a folder, not a file; the station takes only files placed directly in the inbox "
        "and never looks inside folders",
        "Put each file into the inbox itself (written under a temporary name, then renamed).",
    ),
    "fifo": (
        "a named pipe, not a file; reading it would wait for a writer that may never come",
        "Have the cycler write its records as ordinary files.",
    ),
    "socket": ("a socket, not a file", "Have the cycler write its records as ordinary files."),
    "device": ("a device, not a file", "Have the cycler write its records as ordinary files."),
}


def entry_reason(name: str, kind: str, points_to: str = "") -> str:
    """Why an entry of ``kind`` is not taken, and what to do (``name`` as text)."""
    if kind == "symlink":
        return (
            f"{name}: a symbolic link to {points_to or 'something'}, not a file; the station "
            "never follows links (a link can point anywhere on this machine, and its target "
            "can change while it is judged).\n  Copy the file itself into the inbox."
        )
    what, hint = _WHAT.get(kind, ("not a regular file", "Put only cycle files into the inbox."))
    return f"{name}: {what}.\n  {hint}"


def unreadable_reason(name: str, exc: OSError) -> str:
    return (
        f"{name}: the file cannot be read ({exc.strerror or exc}); it was not judged.\n  Let "
        "the station's user read it (and the cycler write files the station may read), then "
        "drop it into the inbox again."
    )


def writable(folder: Path) -> bool:
    """True if a file can be created and removed in ``folder`` (a real try, not a mode check)."""
    try:
        fd, probe = tempfile.mkstemp(prefix=".formgate-probe.", suffix=".tmp", dir=folder)
    except OSError:
        return False
    os.close(fd)
    try:
        os.unlink(probe)
    except OSError:
        return False
    return True


def move_failed_by_itself(exc: OSError, source: Path, target_folder: Path) -> bool:
    """True if a failed rename is the entry's own doing (its owner, a flag), not the folders'.

    Both folders are tried for real: if each takes a new file, the fault lies with the entry.
    """
    if exc.errno in (errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EXDEV, errno.ENOENT):
        return False
    return writable(source.parent) and writable(target_folder)


class SetAside:
    """Moves entries that are not inputs into quarantine (or leaves them) and records them."""

    def __init__(self, settings: Settings, mail_wake: threading.Event) -> None:
        self.settings = settings
        self.mail_wake = mail_wake  # set once an alert is queued: the mail thread sends it

    def _alert(self, subject: str, text: str, key: str) -> list[Letter]:
        routing = self.settings.routing
        if not routing.alerts_to:
            return []
        return [
            alert_letter(
                subject,
                text,
                routing.alerts_to,
                station=self.settings.station_name,
                key=key,
                domain=routing.domain,
            )
        ]

    def entry(
        self,
        ledger: Ledger,
        path: Path,
        *,
        inbox: str,
        kind: str,
        reason: str,
        now: datetime.datetime,
    ) -> Path | None:
        """Quarantine ``path`` with ``reason``; return where it went, or None if it stayed put.

        Raises OSError or sqlite3.Error for faults of the surroundings.
        """
        name = to_text(path.name)
        folder = self.settings.quarantine
        require_folder(folder)
        # its ledger row's id first, as inputs' quarantined names have theirs: each name leads
        # to its row, and two entries of one name never clash
        entry_id = ledger.facts.next_set_aside_id()
        base = f"{ASIDE_PREFIX}{entry_id:06d}_{name}"
        target = folder / fit(base, reserve_bytes=NAME_RESERVE_BYTES)
        n = 1
        while target.exists() or target.is_symlink():  # left by a crash before its row
            n += 1
            target = folder / fit(f"{base}~{n}", reserve_bytes=NAME_RESERVE_BYTES)
        reason_file = target.with_name(target.name + REASON_SUFFIX)
        text = (
            f"{name} was set aside by formgate (found in inbox {inbox}).\n\n{reason}\n\n"
            f"noticed: {now.isoformat(timespec='seconds')}\n"
        )
        write_atomic(text.encode("utf-8"), reason_file, make_parents=False)
        try:
            moved = move_into(path, folder, name=target.name, exact=True)
        except OSError as exc:
            reason_file.unlink(missing_ok=True)
            if not move_failed_by_itself(exc, path, folder):
                raise
            self.left_in_place(ledger, path, inbox=inbox, kind=kind, reason=reason, exc=exc, now=now)
            return None
        if moved is None:  # gone meanwhile: someone took it
            reason_file.unlink(missing_ok=True)
            return None
        mails = self._alert(f"set aside: {name}", reason, f"set-aside:{inbox}:{name}:{now.isoformat()}")
        ledger.facts.set_aside(
            inbox=inbox, name=name, kind=kind, reason=reason, now=now, final_path=str(moved),
            mails=mails, entry_id=entry_id,
        )
        self.mail_wake.set()
        log.warning("%s: set aside in %s: %s", name, folder, reason.splitlines()[0])
        return moved

    def left_in_place(
        self,
        ledger: Ledger,
        path: Path,
        *,
        inbox: str,
        kind: str,
        reason: str,
        exc: OSError,
        now: datetime.datetime,
    ) -> None:
        """Record (once) and alert an entry that cannot be moved out of the inbox."""
        name = to_text(path.name)
        text = (
            f"left in place: {reason.splitlines()[0].rstrip('.')}; the station cannot move it out of the "
            f"inbox ({exc.strerror or exc}).\n  It leaves it there and tries again only when it "
            "changes. Move it away by hand, or let the station's user rename it."
        )
        mails = self._alert(f"left in place: {name}", text, f"left:{inbox}:{name}")
        ledger.facts.set_aside(inbox=inbox, name=name, kind=kind, reason=text, now=now, mails=mails)
        self.mail_wake.set()
        log.error("%s: %s", name, text.replace("\n  ", " "))
