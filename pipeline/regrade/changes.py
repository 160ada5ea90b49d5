"""What a regrade would change: each cell decided again from its records judged under new rules.

Pure: the lot's records as judged before (result documents), the same inputs judged
again (by input SHA-256), the cell's readings, its standing decision and the new rule
book in; the cells whose verdict, grade, hazards or deciding checks would change out, each with
the checks behind it (value, old window and outcome, new window and outcome). A cell is
decided again exactly as the station decides it: from its records that count
(judge/lotclose.cell_stages) and its stages (judge/cellverdict.decide); in a closed lot,
with the lot's screens and grades (judge/lotclose.close_lot). A cell decided by a
person's review that still stands (judge/review.stands) is never changed: it is listed
for a new review exactly when the new rules change what the person saw, that is the
verdict or a check outcome of one of its records, or what its lot's screens make of it,
each compared without the review (the rules' own decision under the old rules and
under the new); a window moved under unchanged outcomes leaves it alone. An input the
new rules refuse (its cell type in no rule set, say), or that could not be judged again
(its archived copy changed or unreadable), is listed with the reason and leaves its cell
as it was.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.errors import FormgateError
from pipeline.judge.cellverdict import decide
from pipeline.judge.lotclose import cell_now, close_lot
from pipeline.judge.review import Reviewed, stands
from pipeline.read.readings import Reading, ReadingFile
from pipeline.rulebook.book import RuleBook

Doc = Mapping[str, Any]


@dataclass(frozen=True, slots=True)
class Standing:
    """A cell's decision in force, as the ledger holds it."""

    verdict: str
    reason: str
    hazards: tuple[str, ...]
    grade: str | None
    cause: str


@dataclass(frozen=True, slots=True)
class CheckChange:
    """One check of one record whose window or outcome the new rules change."""

    file_name: str
    rule_id: str
    metric: str
    old_value: float | None
    new_value: float | None
    old_low: float | None
    old_high: float | None
    new_low: float | None
    new_high: float | None
    old_outcome: str
    new_outcome: str


@dataclass(frozen=True, slots=True)
class CellChange:
    """A cell whose decision the regrade changes (or would, but for a person's review)."""

    lot: str
    cell_id: str
    old: Standing
    new: Standing
    checks: tuple[CheckChange, ...]
    reviewed: bool  # a person's review stands: listed for a new review, not applied
    inputs: tuple[str, ...]  # SHA-256 of the cell's inputs judged again
    files: tuple[tuple[str, str, str], ...] = ()  # (stage, file name, SHA-256) it rests on

    @property
    def kind(self) -> str:
        """'pass → fail', or 'fail → fail' where only hazards, reasons or grade change."""
        return f"{self.old.verdict} \N{RIGHTWARDS ARROW} {self.new.verdict}"


@dataclass(frozen=True, slots=True)
class Refused:
    """An input the new rules cannot judge: it leaves its cell as it was."""

    lot: str
    cell_id: str
    file_name: str
    sha256: str
    reason: str


@dataclass(frozen=True, slots=True)
class LotChanges:
    lot: str
    closed: bool
    cells: int  # cells decided again
    changes: tuple[CellChange, ...]
    refused: tuple[Refused, ...]
    problem: str = ""  # why the lot could not be decided again (e.g. rule sets mixed)


def _sha(doc: Doc) -> str:
    return str(doc["input"]["sha256"])


def check_changes(old: Doc, new: Doc) -> list[CheckChange]:
    """The checks of one record whose value, window or outcome differ between two judgements.

    >>> c = {"id": "cap", "metric": "grading_capacity_Ah", "value": 19.0, "low": 18.9,
    ...      "high": 21.0, "outcome": "in_window"}
    >>> old = {"input": {"name": "a.csv"}, "checks": [c]}
    >>> new = {"input": {"name": "a.csv"}, "checks": [c | {"low": 19.1, "outcome": "out_of_window"}]}
    >>> [(x.rule_id, x.old_outcome, x.new_outcome, x.new_low) for x in check_changes(old, new)]
    [('cap', 'in_window', 'out_of_window', 19.1)]
    """
    before = {str(c["id"]): c for c in old.get("checks", ())}
    out = []
    for c in new.get("checks", ()):
        b = before.pop(str(c["id"]), None)
        keys = ("value", "low", "high", "outcome")
        if b is not None and all(b.get(k) == c.get(k) for k in keys):
            continue
        out.append(CheckChange(
            str(new["input"]["name"]), str(c["id"]), str(c["metric"]),
            None if b is None else b.get("value"), c.get("value"),
            None if b is None else b.get("low"), None if b is None else b.get("high"),
            c.get("low"), c.get("high"),
            "absent" if b is None else str(b["outcome"]), str(c["outcome"]),
        ))
    for b in before.values():  # a check the new rules no longer make
        out.append(CheckChange(
            str(old["input"]["name"]), str(b["id"]), str(b["metric"]), b.get("value"), None,
            b.get("low"), b.get("high"), None, None, str(b["outcome"]), "absent",
        ))
    return out


def lot_changes(
    lot: str,
    old_docs: Sequence[Doc],
    new_docs: Mapping[str, Doc],
    refused: Mapping[str, str],
    readings: Sequence[tuple[str, str, Reading]],
    standing: Mapping[str, Standing],
    reviews: Mapping[str, Reviewed],
    rulebook: RuleBook,
    *,
    closed: bool,
    old_rulebook: RuleBook | None = None,
) -> LotChanges:
    """Every cell of ``lot`` decided again with ``new_docs`` (by input SHA-256) in place of its
    old records; the cells that change. ``refused``: input SHA-256 -> why the new rules
    refuse it (the old record stays). ``readings``: (file name, SHA-256, reading).
    ``old_rulebook``: the rules that decided ``old_docs`` (the new ones when not known), for
    the rules' own decision on a reviewed cell before the change."""
    docs: list[Doc] = []
    out_refused: list[Refused] = []
    for doc in old_docs:
        sha = _sha(doc)
        if sha in refused:
            out_refused.append(Refused(lot, str(doc["cell"]["cell_id"]), str(doc["input"]["name"]),
                                       sha, refused[sha]))
        docs.append(new_docs.get(sha, doc))
    old_by_sha = {_sha(d): d for d in old_docs}
    # a cell with an input the new rules refuse (or that could not be judged) is left as it was
    untouched = {r.cell_id for r in out_refused}
    try:
        decided = _decide(lot, docs, readings, reviews, rulebook, closed=closed)
        reviewed = _decided_by_review(docs, readings, reviews, rulebook)
        # the rules' own decisions without any review (an open lot's are so already)
        rules_new = _decide(lot, docs, readings, {}, rulebook, closed=True) if (
            reviewed and closed) else decided
    except FormgateError as exc:
        return LotChanges(lot, closed, 0, (), tuple(out_refused), str(exc).splitlines()[0])
    rules_old = {}
    if reviewed:
        try:
            rules_old = _decide(lot, old_docs, readings, {}, old_rulebook or rulebook,
                                closed=closed)
        except FormgateError:  # not known as it was: every reviewed cell is asked again
            rules_old = {}
    changes = []
    for cell_id, (new, files) in sorted(decided.items()):
        old = standing.get(cell_id)
        if old is None or cell_id in untouched:
            continue
        shas = tuple(sha for _, _, sha in files if sha in new_docs)
        checks = [ch for sha in shas if sha in old_by_sha
                  for ch in check_changes(old_by_sha[sha], new_docs[sha])]
        if cell_id in reviewed:
            # a person decided the cell: asked again exactly when the new rules change what
            # the person saw (never changed here), whatever the review itself gave
            after = rules_new[cell_id][0]
            before = rules_old.get(cell_id)
            moved = any(old_by_sha[sha]["verdict"] != new_docs[sha]["verdict"]
                        for sha in shas if sha in old_by_sha)
            moved = moved or any(ch.old_outcome != ch.new_outcome for ch in checks)
            if not moved and before is not None and _same(before[0], after, grade=False):
                continue
            changes.append(
                CellChange(lot, cell_id, old, after, tuple(checks), True, shas, tuple(files))
            )
            continue
        if _same(old, new):
            continue
        changes.append(
            CellChange(lot, cell_id, old, new, tuple(checks), False, shas, tuple(files))
        )
    return LotChanges(lot, closed, len(decided), tuple(changes), tuple(out_refused))


def _decided_by_review(
    docs: Sequence[Doc],
    readings: Sequence[tuple[str, str, Reading]],
    reviews: Mapping[str, Reviewed],
    rulebook: RuleBook,
) -> set[str]:
    """The reviewed cells whose review still decides them (nothing new came after it)."""
    out = set()
    for cell_id, review in reviews.items():
        cell = cell_now(
            [d for d in docs if d["verdict"] != "error" and str(d["cell"]["cell_id"]) == cell_id],
            [r for r in readings if r[2].cell_id == cell_id],
            rulebook,
        )
        if cell is not None and stands(review, cell.stages.records, cell.stages.files):
            out.add(cell_id)
    return out


_NUMBER = re.compile(r"[-+]?\d[\d.,]*(?:[eE][-+]?\d+)?")


def _same(old: Standing, new: Standing, *, grade: bool = True) -> bool:
    """Whether a decision stands as it was: the same verdict, grade and hazards, decided by the
    same checks for the same reasons. A window moved under a cell that fails (or is held)
    by the same check anyway changes only the numbers in its reason: that is no change.
    ``grade=False``: the grades are not compared.

    >>> a = Standing("fail", "grading_capacity_Ah 1.50 Ah < 1.80 Ah", (), None, "record")
    >>> _same(a, Standing("fail", "grading_capacity_Ah 1.50 Ah < 1.88 Ah", (), None, "regrade"))
    True
    """
    return (old.verdict, _NUMBER.sub("#", old.reason), set(old.hazards)) == (
        new.verdict, _NUMBER.sub("#", new.reason), set(new.hazards)
    ) and (not grade or old.grade == new.grade)


def _decide(
    lot: str,
    docs: Sequence[Doc],
    readings: Sequence[tuple[str, str, Reading]],
    reviews: Mapping[str, Reviewed],
    rulebook: RuleBook,
    *,
    closed: bool,
) -> dict[str, tuple[Standing, tuple[tuple[str, str, str], ...]]]:
    """cell id -> (its decision under the new rules, the records behind it)."""
    judged = [d for d in docs if d["verdict"] != "error"]
    if closed:
        files: dict[str, list[Reading]] = {}
        sha: dict[str, str] = {}
        for name, digest, reading in readings:
            files.setdefault(name, []).append(reading)
            sha[name] = digest
        closed_lot = close_lot(
            lot, judged, [ReadingFile(n, {}, tuple(rs)) for n, rs in files.items()], rulebook,
            sha256=sha, reviews=reviews,
        )
        return {
            c.cell_id: (
                Standing(c.decision.verdict, c.decision.reason, c.decision.hazards, c.grade,
                         "regrade"),
                c.records,
            )
            for c in closed_lot.cells
        }
    by_cell: dict[str, list[Doc]] = {}
    for d in judged:
        by_cell.setdefault(str(d["cell"]["cell_id"]), []).append(d)
    read_by_cell: dict[str, list[tuple[str, str, Reading]]] = {}
    for item in readings:
        read_by_cell.setdefault(item[2].cell_id, []).append(item)
    out = {}
    for cell_id in sorted(set(by_cell) | set(read_by_cell)):
        cell = cell_now(by_cell.get(cell_id, []), read_by_cell.get(cell_id, []), rulebook)
        if cell is None:
            continue
        decision = decide(cell.needed, cell.stages.records)
        out[cell_id] = (
            Standing(decision.verdict, decision.reason, decision.hazards, None, "regrade"),
            cell.stages.files,
        )
    return out
