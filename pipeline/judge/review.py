"""A person's review of a held or failed cell: whether it is allowed, what it decides, whether it stands.

Pure: records in, records out. ISO 9001:2015 clause 8.7 (control of nonconforming
outputs) asks for a record of the nonconformity, the action taken, any concession and
the authority that decided; the ledger keeps that record (pipeline/ledger/reviews.py) and
this module decides:

- whether a review may be made (:func:`check`): only a held or failed cell is reviewed; a
  failed cell is released only as a concession that names every failed check; a cell
  carrying a safety hazard only when its rule set's ``[review] release_hazards`` names
  the hazard; a hold that only waits for a stage is left to that stage's record; a retest
  only of a stage the cell needs;
- the decision a review gives (:func:`given`): release -> pass, reject -> fail, retest ->
  hold "waiting for stage X (retest asked by ...)"; the hazards are always kept, and the
  person's reason stays one reason of the decision (its "; " is written ", ");
- whether it still stands when the cell is decided again (:func:`stands`): a release or a
  reject stands until a record or reading arrives that the review did not see; a retest
  stands until a record of its stage arrives, or a new record fails the cell;
- which of its lot's screens still apply to a released cell (:func:`screens_after_release`).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from pipeline.acceptance.rules import SAFETY_HAZARDS, WAITING_FOR_STAGE, only_waiting
from pipeline.errors import FormgateError
from pipeline.judge.cellverdict import StageRecord, outlier_phrase
from pipeline.judge.lotscreens import Outlier, RobustLimits, outliers
from pipeline.judge.metricdefs import RULE_BY_NAME

ACTIONS = ("release", "reject", "retest")


class ReviewRefused(FormgateError):
    """A review that may not be recorded as asked; the hint says what to do instead."""


@dataclass(frozen=True, slots=True)
class Decided:
    """A cell's decision as a review sees it and gives it."""

    verdict: str  # pass, fail or hold
    reason: str
    hazards: tuple[str, ...] = ()
    grade: str | None = None


@dataclass(frozen=True, slots=True)
class Asked:
    """A review as a person asks for it: the action, who, why, and its stage or accepted checks."""

    action: str  # one of ACTIONS
    reviewer: str
    reason: str
    stage: str | None = None  # retest only
    accepts: tuple[str, ...] = ()  # a failed cell's concession only: the failed checks accepted


@dataclass(frozen=True, slots=True)
class Reviewed:
    """A recorded review as deciding needs it.

    ``seen``: (file name, SHA-256) of every record and reading file the cell's decision rested
    on when the review was made; ``after_close``: its lot had been closed by then, so the
    person saw what the lot's screens made of the cell.
    """

    asked: Asked
    given: Decided
    seen: frozenset[tuple[str, str]]
    after_close: bool = False


def failed_checks(records: Iterable[StageRecord]) -> tuple[str, ...]:
    """The ids of the reject checks out of window in the failed records, each once."""
    return tuple(dict.fromkeys(
        c.rule_id for r in records if r.verdict == "fail" for c in r.checks_out if c.failed
    ))


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _in_reason(text: str) -> str:
    """A person's words as part of one reason of a decision: "; " separates a decision's
    reasons, so a person's own would read as reasons of their own (the review row keeps the
    words as written)."""
    return _one_line(text).replace("; ", ", ")


def _refuse(problem: str, hint: str) -> ReviewRefused:
    return ReviewRefused(problem, None, hint)


def check(
    asked: Asked,
    decision: Decided,
    records: Sequence[StageRecord],
    *,
    cell: str,
    needed: Sequence[str],
    release_hazards: Sequence[str] = (),
    counts: str = "latest",
    rejected_by: str | None = None,
) -> None:
    """Raise ReviewRefused when ``asked`` may not answer ``decision`` (the cell's standing one).

    ``records``: the cell's records that count (their failed checks); ``needed``: the stages
    its cell type needs; ``release_hazards``: its rule set's ``[review] release_hazards``;
    ``counts``: its ``[records] counts``; ``rejected_by``: who rejected it, when its standing
    decision is a person's reject.
    """
    if asked.action not in ACTIONS:
        raise ValueError(f"action must be one of {ACTIONS}, got {asked.action!r}")
    if not _one_line(asked.reason):
        raise _refuse("a review needs a reason", 'Say why with --reason "...".')
    if not _one_line(asked.reviewer):
        raise _refuse("a review needs the name of who decided", 'Give it with --by "NAME".')
    if asked.accepts and asked.action != "release":
        raise _refuse("--accept names the failed checks a release accepts",
                      f"Leave it out of a {asked.action}.")
    if decision.verdict not in ("fail", "hold"):
        raise _refuse(
            f"cell {cell} is {decision.verdict}: only a held or failed cell is reviewed",
            "formgate review list shows the cells that wait for a person.",
        )
    if rejected_by is not None and asked.action != "retest":
        raise _refuse(
            f"cell {cell} was rejected by {rejected_by}; a reject stands until a new record of "
            "the cell arrives",
            "Ask for a retest of a stage if the cell is to be tested again.",
        )
    if asked.action == "retest":
        _check_retest(asked, cell, needed, counts)
    elif asked.action == "release":
        _check_release(asked, decision, records, cell, release_hazards)


def _check_retest(asked: Asked, cell: str, needed: Sequence[str], counts: str) -> None:
    if asked.stage not in needed:
        raise _refuse(
            f"cell {cell}'s rule set has no stage {asked.stage!r} for its cell type",
            f"Its stages: {', '.join(needed)}.",
        )
    if counts == "worst":
        raise _refuse(
            f"cell {cell}'s rule set counts a stage's worst record ([records] counts = "
            '"worst"), so a retest could never replace the record it answers',
            "Release or reject the cell instead.",
        )


def _check_release(
    asked: Asked,
    decision: Decided,
    records: Sequence[StageRecord],
    cell: str,
    release_hazards: Sequence[str],
) -> None:
    if decision.verdict == "hold":
        if only_waiting(decision.reason):
            raise _refuse(
                f"cell {cell} is {decision.reason}: that stage's record decides it",
                "Wait for the record, or reject the cell.",
            )
        if asked.accepts:
            raise _refuse(
                f"cell {cell} is held, not failed: --accept is for a failed cell's concession",
                "Release it without --accept.",
            )
        return
    failed = failed_checks(records)
    if not failed:
        raise _refuse(
            f"cell {cell} failed, but no failed check of it is found in its records",
            "Look at its records (formgate cell show); reject it or ask for a retest.",
        )
    listing = ", ".join(failed)
    flags = " ".join(f"--accept {c}" for c in failed)
    wrong = [a for a in asked.accepts if a not in failed]
    if wrong:
        raise _refuse(
            f"cell {cell}: --accept {wrong[0]} names a check that did not fail",
            f"Its failed checks: {listing}. Name each of them: {flags}.",
        )
    missing = [c for c in failed if c not in asked.accepts]
    if missing:
        raise _refuse(
            f"cell {cell} failed: it is released only as a concession that names every "
            f"failed check; not named: {', '.join(missing)}",
            f"Its failed checks: {listing}. Name each of them: {flags}.",
        )
    unsafe = [h for h in decision.hazards if h in SAFETY_HAZARDS and h not in release_hazards]
    if unsafe:
        raise _refuse(
            f"cell {cell} carries the safety hazard {', '.join(unsafe)}, which its rule set "
            "does not let a concession release",
            "Reject the cell or ask for a retest. A rule set may name the hazards a "
            "concession may release under [review] release_hazards (docs/rules.md).",
        )


def given(asked: Asked, decision: Decided, *, grade: str | None = None) -> Decided:
    """The decision ``asked`` gives a cell whose standing decision is ``decision``.

    The hazards are kept whatever the action: a release never removes a hazard's record.
    ``grade``: a released cell's grade, when its lot was closed (else None).

    >>> fail = Decided("fail", "grading_capacity_Ah 1.5 Ah < 1.8 Ah (reject)", ("abnormal_capacity",))
    >>> given(Asked("release", "quality engineer A", "customer accepts 1.5 Ah",
    ...             accepts=("capacity",)), fail).reason
    'released as a concession by quality engineer A accepting capacity: customer accepts 1.5 Ah'
    >>> given(Asked("retest", "B", "channel 12 suspect; rerun", stage="grading"), fail).reason
    'waiting for stage grading (retest asked by B: channel 12 suspect, rerun)'
    """
    who, why = _in_reason(asked.reviewer), _in_reason(asked.reason)
    if asked.action == "release":
        if decision.verdict == "fail":
            accepting = ", ".join(asked.accepts)
            reason = f"released as a concession by {who} accepting {accepting}: {why}"
        else:
            reason = f"released by {who}: {why}"
        return Decided("pass", reason, decision.hazards, grade)
    if asked.action == "reject":
        return Decided("fail", f"rejected by {who}: {why}", decision.hazards)
    return Decided(
        "hold", f"{WAITING_FOR_STAGE} {asked.stage} (retest asked by {who}: {why})", decision.hazards
    )


def _stages(words: str) -> tuple[str, ...]:
    return tuple(words.split(" and "))


def stands(
    review: Reviewed,
    records: Sequence[StageRecord],
    files: Sequence[tuple[str, str, str]],
) -> bool:
    """Whether ``review`` still decides the cell, given what counts for the cell now.

    ``records``: the cell's records that count, one per stage; ``files``: (stage words, file
    name, SHA-256) of the files they come from (pipeline.judge.lotclose.cell_stages). A file
    the review did not see is new about the cell: a release or a reject stands until one
    arrives; a retest stands until a new file covers its stage, or a new record fails the
    cell (a failure is final, and its hazards must not wait for the retest).
    """
    fresh = [f for f in files if (f[1], f[2]) not in review.seen]
    if review.asked.action != "retest":
        return not fresh
    if any(review.asked.stage in _stages(f[0]) for f in fresh):
        return False
    fresh_words = {f[0] for f in fresh}
    return not any(r.verdict == "fail" and " and ".join(r.stages) in fresh_words for r in records)


def screens_after_release(
    review: Reviewed,
    records: Sequence[StageRecord],
    values: Mapping[str, float | None],
    limits: Sequence[RobustLimits],
    cell: str,
) -> tuple[Outlier, ...]:
    """Where its lot's screens find a cell released before the lot closed outside them.

    The screens compare the cell with its lot, which nobody could do before the close, so
    they are new about the cell; but the metrics of the checks the person looked at (out of
    window or not judged on its records) were answered by the release, and only the other
    metrics' screens apply. A release made after the close saw the screens: none apply.
    """
    if review.given.verdict != "pass" or review.after_close:
        return ()
    answered = {c.metric for r in records for c in r.checks_out}
    found: list[Outlier] = []
    for limit in limits:
        if limit.metric not in answered:
            found.extend(outliers({cell: values.get(limit.metric)}, limit))
    return tuple(found)


def held_after_release(found: Sequence[Outlier], review: Reviewed) -> tuple[str, ...]:
    """The reasons of the hold a released cell's outliers (:func:`screens_after_release`) give."""
    units = {o.metric: RULE_BY_NAME[o.metric].unit for o in found if o.metric in RULE_BY_NAME}
    who = _in_reason(review.asked.reviewer)
    return (*(outlier_phrase(o, units.get(o.metric, "")) for o in found),
            f"found at the lot's close, after the release by {who}")
