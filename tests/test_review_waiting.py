"""Which cells wait for a person, over any history of decisions and reviews: a real SQLite ledger.

A cell waits for a person exactly when its standing decision is a fail, or a hold for a
reason other than a stage still to come, and no review came after it; it waits since the
first decision of that verdict after its last review or change of verdict.
"""

from __future__ import annotations

import datetime
import tempfile
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.acceptance.rules import only_waiting
from pipeline.ledger.ledger import Ledger

T0 = datetime.datetime(2026, 6, 1, 8, 0, tzinfo=datetime.UTC)
REASONS = {
    "pass": [""],
    "fail": ["grading_capacity_Ah 1.5 Ah < 1.8 Ah (reject)", "k_value_mV_per_day 3 > 1 (reject)"],
    "hold": ["waiting for stage aging", "grading_capacity_Ah 1.86 Ah < 1.9 Ah (review)",
             "waiting for stage aging; outlier in lot: dcir_mOhm 31 > lot limit 25"],
}
GIVES = {"release": ("pass", "released by quality engineer A: ok"),
         "reject": ("fail", "rejected by quality engineer A: scrap"),
         "retest": ("hold", "waiting for stage grading (retest asked by quality engineer A: x)")}

decision_step = st.tuples(
    st.just("decide"), st.sampled_from(["C-1", "C-2"]), st.sampled_from(["pass", "fail", "hold"]),
    st.integers(0, 2),
)
review_step = st.tuples(
    st.just("review"), st.sampled_from(["C-1", "C-2"]), st.sampled_from(sorted(GIVES)),
    st.just(0),
)


@given(st.lists(st.one_of(decision_step, review_step), max_size=14))
@settings(max_examples=60, deadline=None)
def test_a_cell_waits_for_a_person_exactly_while_its_fail_or_hold_is_unreviewed(
    steps: list[tuple[str, str, str, int]],
) -> None:
    # the model: per cell, its rows as (verdict, reason, by a review, minute)
    rows: dict[str, list[tuple[str, str, bool, int]]] = {}
    with tempfile.TemporaryDirectory() as folder, Ledger(Path(folder) / "l.sqlite", now=T0) as ledger:
        for minute, (kind, cell, word, n) in enumerate(steps, start=1):
            now = T0 + datetime.timedelta(minutes=minute)
            if kind == "decide":
                reason = REASONS[word][n % len(REASONS[word])]
                _, _, new = ledger.decisions.decide(
                    cell_id=cell, lot="LOT-W", verdict=word, reason=reason, hazards=(),
                    grade=None, cause="record", basis=[], now=now,
                )
                if new:
                    rows.setdefault(cell, []).append((word, reason, False, minute))
                continue
            latest = ledger.decisions.latest("LOT-W", cell)
            if latest is None:
                continue
            verdict, reason = GIVES[word]
            ledger.reviews.record(
                cell_id=cell, lot="LOT-W", action=word, stage="grading" if word == "retest" else None,
                accepts=(), reviewer="quality engineer A", reason="why", now=now, answers=latest.id,
                decision=lambda _r, v=verdict, w=reason: (v, w, (), None),
            )
            rows.setdefault(cell, []).append((verdict, reason, True, minute))
        waiting = {(w[1], w[2], w[4]) for w in ledger.reviews.waiting()}
    expected = set()
    for cell, history in rows.items():
        verdict, reason, reviewed, _ = history[-1]
        if reviewed or verdict == "pass" or (verdict == "hold" and only_waiting(reason)):
            continue
        streak = history[-1][3]
        for v, _, by_review, minute in reversed(history):
            if by_review or v != verdict:
                break
            streak = minute
        expected.add((cell, verdict, T0 + datetime.timedelta(minutes=streak)))
    assert waiting == expected


def test_a_hold_only_for_its_stages_and_a_retest_need_no_person() -> None:
    # (the judge, the ledger and the station read a hold with the model's one rule)
    for reason in [*REASONS["hold"], GIVES["retest"][1]]:
        assert only_waiting(reason) == (reason.startswith("waiting for stage") and ";" not in reason)


def test_a_retest_waits_for_its_stage_from_when_it_was_asked(tmp_path: Path) -> None:
    # (the overdue alert of [stages] overdue_h counts from then, not from the cell's first record)
    with Ledger(tmp_path / "l.sqlite", now=T0) as ledger:
        for cell in ("C-1", "C-2"):
            ledger.decisions.decide(cell_id=cell, lot="LOT-W", verdict="hold",
                                    reason="waiting for stage aging", hazards=(), grade=None,
                                    cause="record", basis=[], now=T0)
        failed, _, _ = ledger.decisions.decide(
            cell_id="C-1", lot="LOT-W", verdict="fail", reason=REASONS["fail"][0], hazards=(),
            grade=None, cause="readings", basis=[], now=T0 + datetime.timedelta(days=3))
        asked = T0 + datetime.timedelta(days=4)
        ledger.reviews.record(
            cell_id="C-1", lot="LOT-W", action="retest", stage="grading", accepts=(),
            reviewer="quality engineer A", reason="why", now=asked, answers=failed.id,
            decision=lambda _r: ("hold", GIVES["retest"][1], (), None),
        )
        waiting = {c: since for _, c, _, since in ledger.decisions.waiting_cells()}
    assert waiting == {"C-1": asked, "C-2": T0}
