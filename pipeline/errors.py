"""formgate's error types (each user-fixable error knows where and what to do), and its log.

An error knows its file, line and column and what to do; printing it and the exit codes
are the command line's business, this module only shapes the message. The log set-up
(one line per event, to a rotating file and standard error) lives here too, so that the
command line and the demo share it without importing each other.
"""

from __future__ import annotations

import logging
import logging.handlers
import sys
import time
from pathlib import Path

from pipeline.model import SourceRef


class FormgateError(Exception):
    """Base for every error a user can fix. ``str()`` gives the one- or two-line message.

    >>> str(FormgateError("no column for voltage", SourceRef("a.csv", 1), hint="Rename it."))
    'a.csv, line 1: no column for voltage.\\n  Rename it.'
    """

    exit_code = 2

    def __init__(self, problem: str, where: SourceRef | None = None, hint: str = "") -> None:
        self.problem = problem.rstrip(".")
        self.where = where
        self.hint = hint
        super().__init__(self.message)

    @property
    def message(self) -> str:
        head = f"{self.where}: {self.problem}." if self.where else f"{self.problem}."
        return f"{head}\n  {self.hint}" if self.hint else head

    def __str__(self) -> str:
        return self.message


class InputError(FormgateError):
    """A cycle file that cannot be read or judged (goes to quarantine with this message)."""


class ProfileError(FormgateError):
    """An import profile that is not valid."""


class RulesError(FormgateError):
    """A rule file that is not valid."""


class SettingsError(FormgateError):
    """A station settings file that is not valid."""


class SettingsProblems(SettingsError):
    """Every problem of one station settings file at once, as ``rules check`` lists a rule file's.

    Behaves as its first problem (``where``, ``hint``); ``str()`` lists them all and counts.

    >>> first = SettingsError("unknown key 'x'", SourceRef("station.toml", 3))
    >>> second = SettingsError("workers = 0 is out of range", SourceRef("station.toml", 7))
    >>> print(SettingsProblems([first, second]))
    station.toml, line 3: unknown key 'x'.
    station.toml, line 7: workers = 0 is out of range.
    2 problems found in station.toml
    """

    def __init__(self, problems: list[SettingsError]) -> None:
        first = problems[0]
        self.problems = tuple(problems)
        super().__init__(first.problem, first.where, first.hint)

    @property
    def message(self) -> str:
        place = self.problems[0].where.path if self.problems[0].where else "the station file"
        lines = [str(p) for p in self.problems]
        return "\n".join([*lines, f"{len(lines)} problems found in {place}"])


def setup_logging(logs: Path, max_mb: float, keep: int, *, verbose: bool = True) -> None:
    """One line per event to a rotating log file and to standard error."""
    logs.mkdir(parents=True, exist_ok=True)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    fmt.converter = time.gmtime
    handler = logging.handlers.RotatingFileHandler(
        logs / "formgate.log", maxBytes=int(max_mb * 2**20), backupCount=keep, encoding="utf-8"
    )
    handler.setFormatter(fmt)
    root = logging.getLogger("formgate")
    root.setLevel(logging.INFO)
    root.handlers[:] = [handler]
    if verbose:
        console = logging.StreamHandler(sys.stderr)
        console.setFormatter(fmt)
        root.addHandler(console)
