"""Which rules the station judges with: reload the rules folder when it changes, never crash on it.

A broken edit keeps the last good rules in force and raises one alert naming file and
line. A station *started* while a rule file is broken judges with the last rules that
were valid, kept in the ledger (each good load records its rule sets there), and
alerts; with none kept, it pauses with the files waiting in the inboxes until the
rules are fixed. It never refuses to start over a rule file, so a service manager
that restarts it cannot loop.
"""

from __future__ import annotations

import datetime
import hashlib
import logging
import time
from collections.abc import Callable
from pathlib import Path

from pipeline.errors import FormgateError
from pipeline.ledger.ledger import Ledger
from pipeline.rulebook.book import (
    RuleBook,
    check_profiles_dir,
    check_rules_dir,
    load_rule_set,
    load_rules_dir,
    reused_revisions,
)
from pipeline.station.guard import Guard
from pipeline.station.settings import Settings

log = logging.getLogger("formgate.station")

REFUSED = "rules-refused"  # the trouble shown while an edit is refused and older rules judge


def refusal_summary(problems: list[FormgateError]) -> str:
    """One line for `status`: the first problem's file, line and words, and how many there are.

    >>> from pipeline.model import SourceRef
    >>> refusal_summary([FormgateError("unknown key 'lowe'", SourceRef("a.toml", 16)),
    ...                  FormgateError("x", SourceRef("b.toml"))])
    "a.toml, line 16: unknown key 'lowe'. (and 1 more problem: formgate rules check lists them)"
    """
    first = str(problems[0]).splitlines()[0] if problems else "the rules folder cannot be read"
    more = len(problems) - 1
    if more > 0:
        first += f" (and {more} more problem{'s' if more > 1 else ''}: formgate rules check lists them)"
    return first


class RulesInForce:
    """The rule book the station judges with (None while there is no valid one)."""

    def __init__(
        self,
        settings: Settings,
        ledger: Ledger,
        clock: Callable[[], datetime.datetime],
        guard: Guard,
    ) -> None:
        self.settings = settings
        self.ledger = ledger
        self.clock = clock
        self.guard = guard
        self.rulebook: RuleBook | None = None
        self.fingerprint: tuple[tuple[str, int, int], ...] | None = None  # None: never read
        self.alerted = ""  # the refusal last alerted, by the hash of its text

    def load(self, *, first: bool = False) -> None:
        """Load the rules folder if it changed; a broken edit keeps the last good rules in force.

        Started while a rule file is broken, the station judges with the last rules that
        were valid (kept in the ledger); with none, it is paused until the rules are fixed.
        """
        folder = self.settings.rules_dir
        try:
            files = sorted([*folder.glob("*.toml"), *folder.glob("profiles/*.toml")])
            fingerprint = tuple((str(p), st.st_size, st.st_mtime_ns) for p in files for st in [p.stat()])
        except OSError:  # a file went while listing, or the folder cannot be read
            fingerprint = (("(unreadable)", 0, 0),)  # checked once now, again once it changes
        if fingerprint == self.fingerprint and not first:
            return
        problems: list[FormgateError] = [
            *check_rules_dir(folder),
            *check_profiles_dir(folder / "profiles"),
        ]
        rulebook = None
        if not problems:
            try:
                rulebook = load_rules_dir(folder)
            except FormgateError as exc:  # edited again between the check and the load
                problems = [exc]
        if rulebook is not None:
            # a changed text under a revision that judged cells is refused like a broken file
            problems = [*reused_revisions(rulebook.rule_sets, self.ledger.results.rule_sets())]
            if problems:
                rulebook = None
        if rulebook is None:
            self.refuse_rules("\n".join(str(p) for p in problems), first=first)
            self.show_refusal(refusal_summary(problems))
            self.fingerprint = fingerprint
            return
        self.keep_rule_texts(rulebook)
        self.rulebook = rulebook
        self.fingerprint = fingerprint
        if self.guard.troubles.clear("rules", now=self.clock()) is not None:
            log.warning("rules valid again: the station resumes")
        if self.guard.troubles.clear(REFUSED, now=self.clock()) is not None:
            log.warning("rules valid again: the edited rules are in force")

    def keep_rule_texts(self, rulebook: RuleBook) -> None:
        kept = []
        for rs in rulebook.rule_sets:
            # keep the exact text in the ledger once per revision, so a restart can re-judge a
            # recorded cell with the rules that judged it; a file edited again since it was
            # loaded no longer matches its hash and is kept at the next reload instead
            data = Path(rs.source).read_bytes()
            if hashlib.sha256(data).hexdigest() == rs.sha256:
                self.ledger.facts.remember_text(
                    kind="rule_set",
                    sha256=rs.sha256,
                    name=Path(rs.source).name,
                    text=data.decode("utf-8"),
                    now=self.clock(),
                )
                kept.append(rs.sha256)
            log.info(
                "rules in force: %s revision %s (%s, sha256 %s)",
                rs.name,
                rs.revision,
                Path(rs.source).name,
                rs.sha256[:12],
            )
        self.ledger.facts.remember_rule_book(kept, now=self.clock())

    def show_refusal(self, summary: str) -> None:
        """While older rules judge in place of a refused edit, `status` shows why and since when.

        A paused station (no valid rules at all) shows its pause instead. The time is that
        of the first refusal: a second broken save changes the words, not the time.
        """
        if self.rulebook is None:
            return
        reason = f"a rule file is not valid, the last good rules judge: {summary}"
        if self.guard.troubles.report(REFUSED, reason, now=self.clock(), now_s=time.monotonic(),
                                blocking=False, kind="rules") is None:
            self.guard.troubles.reword(REFUSED, reason)

    def refuse_rules(self, text: str, *, first: bool) -> None:
        key = hashlib.sha256(text.encode()).hexdigest()
        if self.rulebook is None and first:
            self.rulebook = self.last_valid_rules()
            if self.rulebook is not None:
                names = ", ".join(f"{rs.name} {rs.revision}" for rs in self.rulebook.rule_sets)
                log.error("a rule file is not valid; starting with the last valid rules (%s):\n%s",
                          names, text)
                self.guard.alert(
                    "started with the last valid rules",
                    f"The station started while a rule file is not valid. It judges with the last "
                    f"rules that were valid, kept in its ledger ({names}), until it is fixed.\n\n"
                    f"{text}\n\nFix the file, then check it with `formgate rules check`.",
                    key=f"rules-start:{key}",
                )
                self.alerted = key
                return
        if self.rulebook is None:
            trouble = self.guard.troubles.report(
                "rules", "no valid rules to judge with", now=self.clock(), now_s=time.monotonic()
            )
            if trouble is not None:
                log.error("paused: no valid rules to judge with; files wait in the inboxes:\n%s",
                          text)
                self.guard.alert(
                    "station paused: no valid rules",
                    "The station has no valid rules to judge with, so it claims nothing; files "
                    f"wait in the inboxes and are judged once the rules are fixed.\n\n{text}\n\n"
                    "Fix the file, then check it with `formgate rules check`.",
                    key=f"rules-none:{key}",
                )
            return
        log.error("rules edit refused; the last good rules stay in force:\n%s", text)
        if key != self.alerted:
            self.alerted = key
            self.guard.alert(
                "rules edit refused, last good rules still in force",
                "A rule file was edited and is not valid. The station keeps judging with the "
                f"last good rules until it is fixed.\n\n{text}\n\nFix the file, then check it "
                "with `formgate rules check` before saving it into the rules folder.",
                key=f"rules:{key}",
            )

    def last_valid_rules(self) -> RuleBook | None:
        try:
            kept = self.ledger.facts.last_rule_book()
            return RuleBook(tuple(load_rule_set(text, name) for name, text in kept)) if kept else None
        except FormgateError as exc:  # kept by an older formgate and no longer valid
            log.error("the last valid rules in the ledger cannot be used: %s", exc)
            return None
