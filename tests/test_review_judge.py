"""A person's review, deciding only: what it may do, what it gives, whether it stands, at a lot's close.

Pure: records in, records out (pipeline/judge/review.py), and a lot closed with its reviews
(pipeline/judge/lotclose.py). The [review] table of a rule file is checked with its lines.
"""

from __future__ import annotations

import dataclasses
import datetime
from typing import Any

import pytest
from hypothesis import given as for_all
from hypothesis import settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import SAFETY_HAZARDS, Hazard
from pipeline.errors import RulesError
from pipeline.judge.cellverdict import CYCLE_FILE, CheckOut, StageRecord
from pipeline.judge.lotclose import close_lot
from pipeline.judge.review import (
    ACTIONS,
    Asked,
    Decided,
    Reviewed,
    ReviewRefused,
    check,
    failed_checks,
    given,
    stands,
)
from pipeline.report.cellsummary import DecisionEntry
from pipeline.rulebook.book import load_rule_set
from pipeline.rulebook.schema import EXAMPLE
from tests.test_lotclose import BOOK, _lot

QE = "quality engineer A"
NEEDED = ("formation", "grading")
CAPACITY_OUT = CheckOut("capacity", "grading_capacity_Ah", "reject", "out_of_window")
EFFICIENCY_OUT = CheckOut("efficiency", "first_cycle_efficiency", "reject", "out_of_window")
MARGIN_OUT = CheckOut("margin", "grading_capacity_Ah", "review", "out_of_window")
FAILED = (StageRecord(CYCLE_FILE, "fail", "capacity low", ("abnormal_capacity",), "c.csv", "aa",
                      (CAPACITY_OUT, EFFICIENCY_OUT)),)
HELD = (StageRecord(CYCLE_FILE, "hold", "margin low", (), "c.csv", "aa", (MARGIN_OUT,)),)
FAIL = Decided("fail", "capacity low", ("abnormal_capacity",))
HOLD = Decided("hold", "margin low")


def _check(asked: Asked, decision: Decided, records: tuple[StageRecord, ...] = FAILED,
           **kw: Any) -> None:
    check(asked, decision, records, cell="C-1", needed=kw.pop("needed", NEEDED), **kw)


# ---------------------------------------------------------------- the decision a review gives


def test_each_action_gives_its_decision_and_keeps_the_hazards() -> None:
    release = given(Asked("release", QE, "meets order 7"), HOLD)
    assert release == Decided("pass", "released by quality engineer A: meets order 7")
    concession = given(Asked("release", QE, "concession 14", accepts=("capacity", "efficiency")),
                       FAIL, grade="B")
    assert concession == Decided(
        "pass",
        "released as a concession by quality engineer A accepting capacity, efficiency: "
        "concession 14",
        ("abnormal_capacity",),
        "B",
    )
    assert given(Asked("reject", "  quality\nengineer B ", "swollen"), HOLD) == Decided(
        "fail", "rejected by quality engineer B: swollen")
    assert given(Asked("reject", QE, "scrap"), FAIL).hazards == ("abnormal_capacity",)
    retest = given(Asked("retest", QE, "contact fault; rerun", stage="grading"), FAIL)
    assert retest.verdict == "hold" and retest.hazards == ("abnormal_capacity",)
    # the person's "; " would read as a reason of its own, and so as a hold for a person
    assert retest.reason == "waiting for stage grading (retest asked by quality engineer A: " \
                           "contact fault, rerun)"


def test_a_persons_reason_stays_one_reason_whatever_it_holds() -> None:
    """"; " separates a decision's reasons (the cell JSON's and certificate's list): a reason
    a person wrote with one in it is still one reason, for every action."""
    why = "thermocouple on channel misread; cell re-measured cold"
    for asked, decision in ((Asked("release", QE, why), HOLD),
                            (Asked("release", QE, why, accepts=("capacity",)), FAIL),
                            (Asked("reject", QE, why), FAIL),
                            (Asked("retest", QE, why, stage="grading"), FAIL)):
        out = given(asked, decision)
        entry = DecisionEntry(1, out.verdict, out.reason, out.hazards, None, "review",
                              datetime.datetime(2026, 12, 2, 9, 0, tzinfo=datetime.UTC))
        assert len(entry.reasons) == 1, entry.reasons
        assert "thermocouple on channel misread, cell re-measured cold" in entry.reasons[0]


# ---------------------------------------------------------------- what a review may do


def test_a_held_cell_is_released_and_a_failed_one_only_as_a_concession_naming_each_check() -> None:
    _check(Asked("release", QE, "ok"), HOLD, HELD)
    with pytest.raises(ReviewRefused, match="not named: capacity, efficiency") as refused:
        _check(Asked("release", QE, "ok"), FAIL)
    assert "--accept capacity --accept efficiency" in refused.value.hint
    with pytest.raises(ReviewRefused, match="not named: efficiency"):
        _check(Asked("release", QE, "ok", accepts=("capacity",)), FAIL)
    with pytest.raises(ReviewRefused, match="--accept margin names a check that did not fail"):
        _check(Asked("release", QE, "ok", accepts=("capacity", "efficiency", "margin")), FAIL)
    _check(Asked("release", QE, "ok", accepts=("efficiency", "capacity")), FAIL)
    with pytest.raises(ReviewRefused, match="held, not failed"):
        _check(Asked("release", QE, "ok", accepts=("margin",)), HOLD, HELD)


@pytest.mark.parametrize(
    ("asked", "decision", "kw", "words"),
    [
        (Asked("release", QE, "ok"), Decided("pass", ""), {}, "is pass: only a held or failed"),
        (Asked("release", QE, " "), HOLD, {}, "a review needs a reason"),
        (Asked("reject", "", "why"), HOLD, {}, "a review needs the name of who decided"),
        (Asked("reject", QE, "why", accepts=("capacity",)), FAIL, {}, "--accept names the failed"),
        (Asked("release", QE, "ok"), Decided("hold", "waiting for stage aging"), {},
         "is waiting for stage aging: that stage's record decides it"),
        (Asked("retest", QE, "again", stage="aging"), FAIL, {}, "has no stage 'aging'"),
        (Asked("retest", QE, "again", stage="grading"), FAIL, {"counts": "worst"},
         "counts a stage's worst record"),
        (Asked("release", QE, "ok", accepts=("capacity", "efficiency")), FAIL,
         {"rejected_by": "quality engineer B"}, "was rejected by quality engineer B"),
        (Asked("reject", QE, "again"), FAIL, {"rejected_by": "quality engineer B"},
         "a reject stands until a new record"),
    ],
)
def test_a_refused_review_says_why_and_what_to_do(
    asked: Asked, decision: Decided, kw: dict[str, Any], words: str
) -> None:
    with pytest.raises(ReviewRefused) as refused:
        _check(asked, decision, **kw)
    assert words in str(refused.value)
    assert refused.value.hint  # every refusal says what to do instead


def test_a_failed_cell_whose_failed_checks_cannot_be_found_is_not_released() -> None:
    bare = (StageRecord(CYCLE_FILE, "fail", "capacity low", (), "c.csv", "aa"),)
    with pytest.raises(ReviewRefused, match="no failed check of it is found"):
        _check(Asked("release", QE, "ok"), FAIL, bare)
    _check(Asked("retest", QE, "ok", stage="grading"), FAIL, bare)  # a retest still may


def test_a_safety_hazard_is_released_only_when_the_rule_set_names_it() -> None:
    plated = Decided("fail", "capacity low", ("lithium_plating", "abnormal_capacity"))
    asked = Asked("release", QE, "ok", accepts=("capacity", "efficiency"))
    with pytest.raises(ReviewRefused, match="carries the safety hazard lithium_plating") as refused:
        _check(asked, plated)
    assert "[review] release_hazards" in refused.value.hint
    with pytest.raises(ReviewRefused, match="lithium_plating"):
        _check(asked, plated, release_hazards=("internal_short",))
    _check(asked, plated, release_hazards=("lithium_plating",))
    _check(Asked("reject", QE, "scrap"), plated)  # a reject or a retest is always allowed


@for_all(
    hazards=st.lists(st.sampled_from([h.value for h in Hazard]), unique=True),
    allowed=st.lists(st.sampled_from(SAFETY_HAZARDS), unique=True),
    accepts=st.lists(st.sampled_from(["capacity", "efficiency", "margin"]), unique=True),
)
@settings(max_examples=300, deadline=None)
def test_a_release_never_clears_a_hazard_the_rule_set_does_not_allow(
    hazards: list[str], allowed: list[str], accepts: list[str]
) -> None:
    decision = Decided("fail", "capacity low", tuple(hazards))
    asked = Asked("release", QE, "concession", accepts=tuple(accepts))
    try:
        _check(asked, decision, release_hazards=tuple(allowed))
    except ReviewRefused:
        unsafe = [h for h in hazards if h in SAFETY_HAZARDS and h not in allowed]
        assert unsafe or set(accepts) != {"capacity", "efficiency"}
        return
    assert set(accepts) == set(failed_checks(FAILED))
    assert all(h in allowed for h in hazards if h in SAFETY_HAZARDS)
    assert given(asked, decision).hazards == tuple(hazards)  # kept on the record, every one


# ---------------------------------------------------------------- whether a review stands

FILE_A = ("formation and grading", "c.csv", "aa")
FILE_B = ("formation and grading", "c-retest.csv", "bb")
AGING_FILE = ("aging", "aging.csv", "cc")


def _reviewed(action: str, *, stage: str | None = None, seen: tuple[tuple[str, str, str], ...]
              = (FILE_A,)) -> Reviewed:
    asked = Asked(action, QE, "why", stage)
    return Reviewed(asked, given(asked, FAIL), frozenset((n, h) for _, n, h in seen))


def test_a_release_or_reject_stands_until_a_file_it_did_not_see_counts() -> None:
    for action in ("release", "reject"):
        review = _reviewed(action)
        assert stands(review, FAILED, [FILE_A])
        assert not stands(review, FAILED, [FILE_B])  # a retest superseded the record it saw
        assert not stands(review, FAILED, [FILE_A, AGING_FILE])  # readings came in


def test_a_retest_stands_until_its_stage_comes_or_a_new_record_fails_the_cell() -> None:
    review = _reviewed("retest", stage="grading")
    assert stands(review, FAILED, [FILE_A])
    assert not stands(review, FAILED, [FILE_B])  # the retest's record: decided again
    passing_aging = (*FAILED, StageRecord(("aging",), "pass"))
    assert stands(review, passing_aging, [FILE_A, AGING_FILE])  # still waits for grading
    failing_aging = (*FAILED, StageRecord(("aging",), "fail", "k high", ("internal_short",)))
    assert not stands(review, failing_aging, [FILE_A, AGING_FILE])  # a failure is final


@for_all(
    action=st.sampled_from(("release", "reject")),
    seen=st.sets(st.sampled_from(["a", "b", "c", "d"])),
    now=st.sets(st.sampled_from(["a", "b", "c", "d"]), min_size=1),
)
def test_a_release_or_reject_stands_exactly_while_nothing_unseen_counts(
    action: str, seen: set[str], now: set[str]
) -> None:
    review = Reviewed(Asked(action, QE, "why"), Decided("pass", "x"),
                      frozenset((name, "00") for name in seen))
    files = [("formation and grading", name, "00") for name in sorted(now)]
    assert stands(review, FAILED, files) == (now <= seen)


# ---------------------------------------------------------------- a lot closed with its reviews


def _failing(doc: dict[str, Any]) -> dict[str, Any]:
    """The document of a cell that failed its capacity check."""
    return {**doc, "verdict": "fail", "decision": "grading_capacity_Ah 4.5 Ah < 4.9 Ah (reject)",
            "metrics": {**doc["metrics"], "grading_capacity_Ah": 4.5},
            "checks": [{"id": "capacity", "metric": "grading_capacity_Ah", "value": 4.5,
                        "outcome": "out_of_window", "severity": "reject"}]}


def test_a_lot_close_keeps_releases_and_its_screens_hold_only_what_a_release_did_not_answer() -> None:
    docs, readings = _lot()
    slow, other = "LOT-K-007", "LOT-K-011"  # LOT-K-007 is the lot's slow self-discharger
    docs = [_failing(d) if d["cell"]["cell_id"] in (slow, other) else d  # type: ignore[index]
            for d in docs]
    plain = {c.cell_id: c for c in close_lot("LOT-K", docs, [readings], BOOK).cells}
    assert plain[slow].decision.verdict == "fail" and plain[other].decision.verdict == "fail"

    def concession(cell: str, *, after_close: bool = False) -> Reviewed:
        asked = Asked("release", QE, "concession 14", accepts=("capacity",))
        seen = frozenset((n, h) for _, n, h in plain[cell].records)
        return Reviewed(asked, given(asked, FAIL), seen, after_close)

    closed = close_lot("LOT-K", docs, [readings], BOOK,
                       reviews={slow: concession(slow), other: concession(other)})
    cells = {c.cell_id: c for c in closed.cells}
    # a released cell passes the close; ungraded here, as 4.5 Ah is in no grade's range
    assert cells[other].decision.verdict == "pass" and cells[other].grade is None
    assert cells[other].decision.reason.startswith("released as a concession by " + QE)
    # the slow one: the release answered its capacity, not its self-discharge, which only the
    # lot's screen could show: held again, saying so
    assert cells[slow].before_screens.verdict == "pass" and cells[slow].changed
    assert cells[slow].decision.verdict == "hold"
    assert cells[slow].decision.reasons[0].startswith("outlier in lot: k_value_mV_per_day")
    assert cells[slow].decision.reasons[-1] == (
        "found at the lot's close, after the release by quality engineer A")
    assert slow in {o.cell_id for o in closed.statistics.outliers}
    # a concession never widens the lot's limits: they are those of the lot without reviews
    assert closed.statistics.limits == close_lot("LOT-K", docs, [readings], BOOK).statistics.limits
    assert closed.statistics.tally.by_verdict["pass"] == plain_passes(plain) + 1
    # a release made after the close saw the screens: it stands as it is
    again = close_lot("LOT-K", docs, [readings], BOOK,
                      reviews={slow: concession(slow, after_close=True)})
    assert next(c for c in again.cells if c.cell_id == slow).decision.verdict == "pass"
    # a review that no longer stands (a new file counts) leaves the cell to its records
    stale = dataclasses.replace(concession(other), seen=frozenset())
    gone = close_lot("LOT-K", docs, [readings], BOOK, reviews={other: stale})
    assert next(c for c in gone.cells if c.cell_id == other).decision.verdict == "fail"


def plain_passes(cells: dict[str, Any]) -> int:
    return sum(1 for c in cells.values() if c.decision.verdict == "pass")


def test_every_action_is_known() -> None:
    assert ACTIONS == ("release", "reject", "retest")


# ---------------------------------------------------------------- the [review] table


def test_the_review_table_of_a_rule_file_is_read() -> None:
    text = EXAMPLE + '\n[review]\nrelease_hazards = ["lithium_plating"]\nwait_h = 8\n'
    rule_set = load_rule_set(text, "rules/demo.toml")
    assert (rule_set.release_hazards, rule_set.review_wait_h) == (("lithium_plating",), 8.0)
    plain = load_rule_set(EXAMPLE, "rules/demo.toml")
    assert (plain.release_hazards, plain.review_wait_h) == ((), None)


@pytest.mark.parametrize(
    ("lines", "problem", "hint"),
    [
        ('release_hazards = ["lithium_plate"]', 'holds "lithium_plate", which is not a hazard',
         "Did you mean 'lithium_plating'?"),
        ('release_hazards = ["abnormal_capacity"]', "which is not a safety hazard", "remove it"),
        ('release_hazards = ["over_voltage", "over_voltage"]', "names a hazard twice",
         "Name each hazard once"),
        ('release_hazards = "over_voltage"', "must be a list of text", '["over_voltage"]'),
        ("wait_h = 0", "wait_h = 0 h is out of range", "greater than 0 h"),
        ("wait_hours = 4", "unknown key 'wait_hours' in [review]", "Did you mean 'wait_h'?"),
    ],
)
def test_a_wrong_review_table_is_refused_with_its_line(lines: str, problem: str, hint: str) -> None:
    text = EXAMPLE + "\n[review]\n" + lines + "\n"
    line = text.splitlines().index(lines) + 1
    with pytest.raises(RulesError) as refused:
        load_rule_set(text, "rules/demo.toml")
    assert problem in refused.value.problem and hint in refused.value.hint
    assert refused.value.where is not None and refused.value.where.line == line
