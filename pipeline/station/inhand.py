"""Remember, on disk, which input the station's main process has in hand, so a crash loop ends.

Before the station applies the effects of one input (claim, record, publish,
archive, quarantine) it writes the input's key to a small file beside the ledger;
once done it removes the file. If the process dies meanwhile (a bug in formgate or a
crash inside a library), the file is still there at the next start and counts one
death for that input. The start after a second death with the same input in hand
quarantines that input as "crashed the judge" before anything else, so a restart
never meets it a third time. (A death inside a worker process is the pool's
business: judges.py.)

The file is kept open and rewritten in place, without fsync (two system calls per
input): after a power cut it may be empty or stale, which costs at most one more try
of one input. An empty file means nothing was in hand.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from pipeline.station.troubles import is_environmental

log = logging.getLogger("formgate.station")

DEATHS_TO_QUARANTINE = 2


@dataclass(frozen=True, slots=True)
class Death:
    """An input that was in hand when the station process died: its key and deaths so far."""

    key: str  # "input:<ledger id>" or "path:<path of the file>"
    what: str  # the step it was in, e.g. "recording"
    deaths: int

    @property
    def input_id(self) -> int | None:
        kind, _, value = self.key.partition(":")
        return int(value) if kind == "input" else None

    @property
    def path(self) -> Path | None:
        kind, _, value = self.key.partition(":")
        return Path(value) if kind == "path" else None


def input_key(input_id: int) -> str:
    return f"input:{input_id}"


def path_key(path: Path) -> str:
    return f"path:{path}"


class InHand:
    """The marker file ``path``; :meth:`holding` wraps the handling of one input."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.deaths: dict[str, int] = {}
        self._fd: int | None = None

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def found_at_start(self) -> Death | None:
        """The input in hand when the last station process died (one more death), or None."""
        try:
            text = self.path.read_text(encoding="utf-8")
            if not text:
                return None
            data = json.loads(text)
            death = Death(str(data["key"]), str(data["what"]), int(data["deaths"]) + 1)
        except FileNotFoundError:
            return None
        except (OSError, ValueError, KeyError, TypeError) as exc:
            log.warning("ignoring an unreadable in-hand marker %s (%s)", self.path, exc)
            return None
        self.deaths[death.key] = death.deaths
        log.warning(
            "the last station process ended while %s %s (death %d of %d before quarantine)",
            death.what, death.key, death.deaths, DEATHS_TO_QUARANTINE,
        )
        return death

    def done_with(self, key: str) -> None:
        self.deaths.pop(key, None)
        self._write(b"")

    def _write(self, data: bytes) -> None:
        try:
            if self._fd is None:
                self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            os.ftruncate(self._fd, 0)
            if data:
                os.pwrite(self._fd, data, 0)
        except OSError as exc:
            if exc.filename is None:
                exc.filename = str(self.path)  # a failed write names no file by itself
            raise

    @contextlib.contextmanager
    def holding(self, key: str, what: str) -> Iterator[None]:
        """Mark ``key`` in hand while the block runs; a bug leaves the mark for the next start."""
        data = {"key": key, "what": what, "deaths": self.deaths.get(key, 0)}
        self._write(json.dumps(data).encode())
        try:
            yield
        except BaseException as exc:
            if isinstance(exc, Exception) and is_environmental(exc):
                self._write(b"")  # the surroundings failed, not this input: no death counted
            raise
        self._write(b"")
