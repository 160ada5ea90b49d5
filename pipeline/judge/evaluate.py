"""Judge one cell: RuleSet x CellType x CellMetrics (+ data-quality notes) -> Verdict.

Pure: no I/O. Each rule that applies to the cell type becomes one CheckResult;
the verdict is fail if a reject check is out of window, else hold if a review
check is out of window, a check could not be made, or the record is incomplete or
not the program the rule set describes, else pass. A record cut short is held, never
failed, even where a reject check is out of window on what it shows: the hazards of
those checks still come with the verdict, so their cautions are shown. A check that could not be made
is never "in window": it holds the cell, or, where its rule says it may be left
out, is listed as left out. Loading rules
is rulebook.py's job; wording cautions is hazards.py's.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable

from pipeline.acceptance.results import CheckResult, Outcome, Verdict, VerdictKind
from pipeline.acceptance.rules import (
    GUARDED_ACCEPTANCE,
    GUARDED_REJECTION,
    SIMPLE,
    CellType,
    Hazard,
    Program,
    Rule,
    RuleSet,
    Severity,
    Window,
)
from pipeline.judge.metricdefs import FORMATION, GRADING, judged_on
from pipeline.judge.program import HOLDING_CODES, INCOMPLETE, MISMATCH
from pipeline.judge.quantities import (
    format_uncertain,
    format_value,
    format_window,
    near_limit,
    nearer_bound,
    precision,
)
from pipeline.model import CellMetrics, Note

WHOLE: tuple[str, ...] = (FORMATION, GRADING)


def _clean(window: Window) -> Window:
    """Drop float noise from a resolved window (0.98 x 20 Ah is 19.6 Ah, not 19.599999999999998)."""
    low, high = window.low, window.high
    return Window(
        None if low is None else float(f"{low:.12g}"),
        None if high is None else float(f"{high:.12g}"),
    )


def _applies(rule: Rule, cell_type: CellType) -> bool:
    return not rule.cell_types or cell_type.name in rule.cell_types


def inside_by(value: float, window: Window) -> float:
    """How far ``value`` lies inside ``window`` (negative: how far outside), to its nearer limit."""
    margins = []
    if window.low is not None:
        margins.append(value - window.low)
    if window.high is not None:
        margins.append(window.high - value)
    return min(margins) if margins else math.inf


def against(metric: str, value: float, u: float | None, window: Window) -> str:
    """A value ± U against the limit it is nearest, to the digits that tell the two apart and
    write the limit as it is (quantities.near_limit).

    >>> against("grading_capacity_Ah", 18.981, 0.031, Window(19.0, None))
    '18.981 ± 0.031 Ah against ≥ 19.00 Ah'
    >>> against("grading_coulombic_efficiency", 0.993004, 0.00034, Window(0.993, None))
    '99.3004 ± 0.0340 % against ≥ 99.3000 %'
    """
    bound = nearer_bound(value, window)
    limit = Window(bound, None) if bound == window.low else Window(None, bound)
    extra = near_limit(metric, value, window)
    return f"{format_uncertain(metric, value, u, extra)} against {format_window(metric, limit, extra)}"


def _check(
    rule: Rule,
    cell_type: CellType,
    metrics: CellMetrics,
    blockers: dict[str, str],
    decision: str = SIMPLE,
) -> CheckResult:
    window = _clean(rule.window.resolve(cell_type)) if rule.window.relative_to else rule.window
    value = metrics.values.get(rule.metric)
    if value is not None and math.isnan(value):
        value = None
    u = metrics.uncertainty.get(rule.metric)
    u = u if u is not None and math.isfinite(u) and u > 0 else None
    too_close = False
    blocked = blockers.get(rule.metric)
    if blocked is not None or value is None:
        # a value the notes make untrustworthy is not judged; a missing one was not measured
        what = "not judged" if value is not None else "not measured"
        message = f"{rule.metric} {what}" + (f": {blocked}" if blocked else "")
        if rule.if_missing == "hold":
            outcome, message = Outcome.NOT_JUDGED, message + "."
        else:
            outcome = Outcome.SKIPPED
            message += " (the rule set lets this check be left out)."
    elif u is not None and decision == GUARDED_ACCEPTANCE and 0 <= inside_by(value, window) <= u:
        # inside, but by less than its uncertainty: conformity is not shown (ILAC-G8:09/2019)
        outcome, too_close = Outcome.NOT_JUDGED, True
        message = (
            f"{rule.metric} too close to the limit to decide: "
            f"{against(rule.metric, value, u, window)} ({decision})."
        )
    elif window.contains(value):
        outcome, message = Outcome.IN_WINDOW, ""
    elif u is not None and decision == GUARDED_REJECTION and -inside_by(value, window) <= u:
        # outside, but by less than its uncertainty: nonconformity is not shown
        outcome = Outcome.IN_WINDOW
        message = (
            f"{rule.metric} outside its window by less than its uncertainty: "
            f"{against(rule.metric, value, u, window)}, accepted ({decision})."
        )
    else:
        outcome = Outcome.OUT_OF_WINDOW
        # written as the certificate, the letters and the lot report write it (quantities.py)
        extra = precision(rule.metric, value, window)
        measured = f"{rule.metric} = {format_uncertain(rule.metric, value, u, extra)}"
        window_text = format_window(rule.metric, window, extra)
        if rule.message:
            message = f"{rule.message.rstrip('.')} ({measured}; window {window_text})."
        else:
            side = "below" if window.low is not None and value < window.low else "above"
            message = f"{measured} is {side} the window ({window_text})."
    return CheckResult(
        rule.id, rule.metric, value, window, outcome, rule.severity, rule.hazard, message,
        u, decision, too_close,
    )


# What a check row says of a program note, whose full text leads the verdict's reasons.
_PROGRAM_SHORT = {INCOMPLETE: "program incomplete", MISMATCH: "the record is not the program's"}


def program_findings(notes: Iterable[Note]) -> tuple[tuple[str, ...], frozenset[str]]:
    """The texts of the notes that hold a cell for its program (a cut record, another program),
    once each, and the metrics that only those notes kept from being measured.

    The reasons, the decision line and the certificate lead with the texts and leave those
    metrics' checks out: they would only repeat the note.
    """
    notes = tuple(notes)
    texts = tuple(dict.fromkeys(n.text for n in notes if n.code in HOLDING_CODES))
    by_program = {m for n in notes if n.code in HOLDING_CODES for m in n.blocks}
    by_other = {m for n in notes if n.code not in HOLDING_CODES for m in n.blocks}
    return texts, frozenset(by_program - by_other)


def _blockers(notes: Iterable[Note]) -> dict[str, str]:
    """Metric name -> what the notes that make it unmeasurable or untrustworthy say."""
    found: dict[str, list[str]] = {}
    for note in notes:
        for metric in note.blocks:
            text = _PROGRAM_SHORT.get(note.code, note.text.rstrip("."))
            if text not in found.setdefault(metric, []):
                found[metric].append(text)
    return {metric: "; ".join(texts) for metric, texts in found.items()}


def cycles_lacking(stages: tuple[str, ...], program: Program) -> int | None:
    """How many of the program's cycles a record of ``stages`` does not hold (None: unknown).

    A formation record lacks the grading cycle; a grading record lacks the formation
    cycles, which only the program's ``cycles`` tells; a record of both lacks none.
    """
    if FORMATION in stages and GRADING in stages:
        return 0
    if FORMATION in stages:
        return 1
    return None if program.cycles is None else program.cycles - 1


def _for_stage(rule: Rule, lacking: int) -> Rule:
    """``rule`` as it applies to a record of one stage: a cycle count window moved down by
    the cycles that stage does not hold (a window on the whole program's count)."""
    if rule.metric != "cycle_count" or lacking == 0:
        return rule
    low, high = rule.window.low, rule.window.high
    window = Window(
        None if low is None else max(0.0, low - lacking),
        None if high is None else max(0.0, high - lacking),
    )
    return dataclasses.replace(rule, window=window)


def evaluate(
    rule_set: RuleSet,
    cell_type: CellType,
    metrics: CellMetrics,
    notes: tuple[Note, ...] = (),
    *,
    stages: tuple[str, ...] = WHOLE,
) -> Verdict:
    """Judge one cell's record of ``stages`` against the rules of ``rule_set`` for ``cell_type``.

    A record is judged on the checks of its stages' metrics only (metricdefs.MetricDef
    ``stages``): a cycle file of the whole program on every cycle-file metric, one of
    formation or of grading on that stage's and on those every cycle file has, the
    aging readings (``stages=("aging",)``) on the aging metrics. A check of another
    stage is left out: it is judged on that stage's record. ``cycle_count`` is judged
    against the stage's own share of the program (:func:`cycles_lacking`).

    ``notes`` are the data-quality notes of reading and segmenting the file; the
    notes in ``metrics.notes`` count as well. A check whose metric a note blocks,
    or whose value is None or NaN, is not made: it holds the cell (NOT_JUDGED) or is
    left out (SKIPPED), as its rule's ``if_missing`` says. A note of the program
    (incomplete record, another program) holds the cell. ``CheckResult.message`` is
    empty for a value in window; ``Verdict.reasons`` lists the program notes, then the
    message of every check out of window or not made and holding, in rule order.
    """
    all_notes = (*notes, *metrics.notes)
    blockers = _blockers(all_notes)
    holding, quiet = program_findings(all_notes)
    stage_metrics = judged_on(stages)
    lacking = cycles_lacking(stages, rule_set.program) if GRADING in stages or FORMATION in stages else 0
    if lacking is None:
        why = "the rule set's [program] does not give its cycles, so a grading record's share is unknown"
        blockers["cycle_count"] = "; ".join(filter(None, (blockers.get("cycle_count"), why)))
    checks = tuple(
        _check(
            _for_stage(rule, lacking or 0), cell_type, metrics, blockers,
            rule.decision or rule_set.decision,
        )
        for rule in rule_set.rules
        if _applies(rule, cell_type) and rule.metric in stage_metrics
    )
    out = [c for c in checks if c.outcome is Outcome.OUT_OF_WINDOW]
    cut = any(n.code == INCOMPLETE for n in all_notes)
    if any(c.severity is Severity.REJECT for c in out) and not cut:
        kind = VerdictKind.FAIL
    elif out or holding or any(c.outcome is Outcome.NOT_JUDGED for c in checks):
        kind = VerdictKind.HOLD
    else:
        kind = VerdictKind.PASS
    failed_hazards = {c.hazard for c in out if c.severity is Severity.REJECT}
    hazards = tuple(h for h in Hazard if h in failed_hazards)
    # the record's own problem first: it explains the checks that could not be made
    reasons = tuple(f"{text[0].upper()}{text[1:]}." for text in holding) + tuple(
        dict.fromkeys(  # two checks on one unmeasured metric give one reason
            c.message
            for c in checks
            if c.outcome is Outcome.OUT_OF_WINDOW
            or (c.outcome is Outcome.NOT_JUDGED and c.metric not in quiet)
        )
    )
    return Verdict(kind, checks, hazards, reasons)


def deciding(verdict: Verdict) -> tuple[CheckResult, ...]:
    """The checks that decided the verdict, in rule order.

    A fail: its reject checks out of window. A hold: its review checks out of window and
    its checks not made that hold the cell. A pass: none.
    """
    if verdict.kind is VerdictKind.FAIL:
        return tuple(
            c for c in verdict.checks
            if c.outcome is Outcome.OUT_OF_WINDOW and c.severity is Severity.REJECT
        )
    if verdict.kind is VerdictKind.HOLD:
        # a record cut short is held even where a reject check is out of window
        return tuple(
            c for c in verdict.checks if c.outcome in (Outcome.OUT_OF_WINDOW, Outcome.NOT_JUDGED)
        )
    return ()


def phrase(check: CheckResult) -> str:
    """A check's finding in a few words, with the measured value and the bound it crossed.

    >>> phrase(CheckResult("c", "grading_capacity_Ah", 18.21, Window(19.0, 22.0),
    ...        Outcome.OUT_OF_WINDOW, Severity.REJECT, None, ""))
    'grading_capacity_Ah 18.21 Ah < 19.00 Ah (reject)'
    """
    if check.outcome is Outcome.OUT_OF_WINDOW and check.value is not None:
        low, high = check.window.low, check.window.high
        if low is not None and check.value < low:
            bound, sign = low, "<"
        else:
            assert high is not None
            bound, sign = high, ">"
        extra = precision(check.metric, check.value, check.window)
        value = format_uncertain(check.metric, check.value, check.uncertainty, extra)
        limit = format_value(check.metric, bound, extra)
        return f"{check.metric} {value} {sign} {limit} ({check.severity.value})"
    if check.too_close and check.value is not None:
        return (
            f"{check.metric} too close to the limit: "
            f"{against(check.metric, check.value, check.uncertainty, check.window)}"
        )
    if check.outcome in (Outcome.NOT_JUDGED, Outcome.SKIPPED):
        what = "not measured" if check.value is None else "not judged"
        return f"{check.metric} {what}"
    return f"{check.metric} in window"


def decision_line(verdict: Verdict, notes: Iterable[Note] = ()) -> str:
    """The deciding findings of a fail or hold in one short line (mail subject, log, status).

    ``notes`` are the cell's notes: a record cut short or not the program's leads.
    Checks not made because of such a note are not repeated.

    >>> decision_line(Verdict(VerdictKind.PASS, (), ()))
    'all checks in window'
    """
    program, quiet = program_findings(notes)
    findings = [
        phrase(c)
        for c in deciding(verdict)
        if not (c.outcome is Outcome.NOT_JUDGED and c.metric in quiet)
    ]
    parts = list(program) + list(dict.fromkeys(findings))
    if parts:
        return "; ".join(parts)
    return summarise(verdict)


def summarise(verdict: Verdict) -> str:
    """The verdict's reasons in one line, naming every check that was left out.

    >>> summarise(Verdict(VerdictKind.PASS, (), ()))
    'all checks in window'
    """
    text = "; ".join(r.rstrip(".") for r in verdict.reasons)
    left_out = verdict.left_out
    if not text:
        text = "every check made is in window" if left_out else "all checks in window"
    if left_out:
        names = ", ".join(dict.fromkeys(c.metric for c in left_out))
        text += f"; not made (the rule set allows it): {names}"
    return text
