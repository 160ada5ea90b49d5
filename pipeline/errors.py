"""formgate's error types: each user-fixable error knows where (file, line, column) and what to do.

Printing and exit codes are the CLI's business; this module only shapes the message.
"""

from __future__ import annotations

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
