"""Starting a station: wait, without exiting, until its station.toml and folders can be used.

A station runs under a service manager that restarts it when it exits. A station.toml
with a typo, a missing folder or a password file with the wrong mode used to end
``formgate watch`` at once (exit 2), so the manager restarted it every few seconds for
as long as the mistake stood, and ``formgate status`` kept showing the last heartbeat
of the station that ran before. Now the station waits: it writes why, and since when,
to its log stream (standard error) once per distinct reason, and to a small state file
beside station.toml (:data:`STATE_FILE`) that ``formgate status`` reads; it looks again
every ``recheck_s`` (a cheap read of one small file), and starts as soon as everything
can be used.

A missing or unreadable *inbox* does not hold the start: it is a trouble of that inbox
alone, shown and alerted by the running station, which judges the other inboxes.
"""

from __future__ import annotations

import contextlib
import datetime
import json
import os
import sys
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.mail.smtp import SmtpSettings
from pipeline.station.settings import Settings, check_filesystems, read_settings, smtp_settings
from pipeline.writing import write_atomic

STATE_FILE = ".watch-state.json"  # beside station.toml: why a started station waits
RECHECK_S = 2.0  # how often a waiting station looks at its station.toml again


@dataclass(frozen=True, slots=True)
class Waiting:
    """A started station that waits for usable settings: why, since when, which process."""

    reason: str
    since: datetime.datetime
    pid: int


def state_path(folder: Path) -> Path:
    return Path(folder) / STATE_FILE


def read_waiting(folder: Path) -> Waiting | None:
    """The state file of a station waiting in ``folder``, if one is there and readable."""
    try:
        data = json.loads(state_path(folder).read_text(encoding="utf-8"))
        return Waiting(
            str(data["reason"]), datetime.datetime.fromisoformat(str(data["since"])),
            int(data["pid"]),
        )
    except (OSError, ValueError, KeyError, TypeError):
        return None


def usable_settings(
    folder: Path, environ: Mapping[str, str]
) -> tuple[Settings, SmtpSettings]:
    """Read and check the station's settings as a start needs them; FormgateError if not."""
    settings = read_settings(folder)
    check_filesystems(settings, inboxes_may_be_missing=True)
    return settings, smtp_settings(settings, environ)


def wait_for_settings(
    folder: Path,
    stop: threading.Event,
    environ: Mapping[str, str],
    *,
    now: Callable[[], datetime.datetime] = lambda: datetime.datetime.now(datetime.UTC),
    recheck_s: float = RECHECK_S,
) -> tuple[Settings, SmtpSettings] | None:
    """The settings once they can be used; None if ``stop`` was set while waiting."""
    state = state_path(folder)
    said = ""
    since: datetime.datetime | None = None
    while True:
        try:
            found = usable_settings(folder, environ)
        except FormgateError as exc:
            reason = str(exc)
        else:
            if said:
                print(f"formgate: the settings can be used now; starting ({folder})",
                      file=sys.stderr, flush=True)
            with contextlib.suppress(OSError):
                state.unlink(missing_ok=True)
            return found
        if reason != said:  # once per distinct reason: a waiting station must not flood its log
            since = since or now()
            print(f"formgate: waiting to start: {reason}\n  The station starts by itself as "
                  f"soon as this is fixed (it looks again every {recheck_s:g} s).",
                  file=sys.stderr, flush=True)
            said = reason
            _write_state(state, Waiting(reason, since, os.getpid()))
        if stop.wait(recheck_s):
            break
    with contextlib.suppress(OSError):
        state.unlink(missing_ok=True)
    return None


def _write_state(path: Path, waiting: Waiting) -> None:
    """Write the state file; a folder that cannot be written leaves only the log line."""
    text = json.dumps({
        "state": "waiting for usable settings",
        "reason": waiting.reason,
        "since": waiting.since.isoformat(timespec="seconds"),
        "pid": waiting.pid,
    }, indent=2) + "\n"
    with contextlib.suppress(OSError):
        write_atomic(text.encode("utf-8"), path, make_parents=False, sync=False)
