"""A cell's fail that stands as it was is mailed once: a later stage coming in does not mail it again.

A real station with a rule set that needs the aging stage: a cell fails on its cycle file
(its letter goes out), then its aging readings come in. The cell's decision is recorded
again (the reason no longer waits for the aging stage), but its verdict and hazards are
what they were, so nobody gets a second FAIL letter nor an "UPDATE ... now fail, was fail".
Where the readings add a hazard, the new decision is mailed with that hazard's cautions.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.ledger.ledger import Ledger
from pipeline.station.settings import Settings
from tests.station_kit import cycle_file, drop, make_station, running, settled, wait_until
from tests.test_station_cells import AGING_RULES, _readings

pytestmark = pytest.mark.slow


def _subjects(s: Settings, cell: str) -> list[str]:
    """Every mail's subject about ``cell``, sent or not, in the order it was queued."""
    with Ledger(s.ledger) as ledger:
        rows = [m for state in ("pending", "sent", "parked") for m in ledger.outbox.in_state(state)]
    return [m.subject for m in sorted(rows, key=lambda m: m.id) if f"cell {cell}," in m.subject]


def _decisions(s: Settings, cell: str) -> list[tuple[str, str, str, tuple[str, ...]]]:
    with Ledger(s.ledger) as ledger:
        return [(d.verdict, d.cause, d.reason, d.hazards)
                for d in ledger.decisions.of_cell("LOT-A", cell)]


def test_a_fail_whose_verdict_and_hazards_stand_is_not_mailed_again(tmp_path: Path) -> None:
    s = make_station(tmp_path / "st")
    (s.rules_dir / "test_cells.toml").write_text(AGING_RULES, encoding="utf-8")
    with running(s):
        drop(s.inboxes[0].folder, "f1.csv", cycle_file("F-1", capacity_ah=1.5))
        drop(s.inboxes[0].folder, "f2.csv", cycle_file("F-2", capacity_ah=1.5, seed=3))
        wait_until(lambda: settled(s, 2), what="the two failed records")
        # F-1: K = 0.6 mV/day, in window; F-2: K = 3.03 mV/day, rejected as an internal short
        drop(s.inboxes[0].folder, "aging.csv", _readings([
            ("F-1", "2026-11-02T08:00:00Z", 3.6512), ("F-1", "2026-11-09T08:00:00Z", 3.6470),
            ("F-2", "2026-11-02T08:00:00Z", 3.6512), ("F-2", "2026-11-09T08:00:00Z", 3.6300),
        ]))
        wait_until(lambda: settled(s, 3), what="the tester file")
        wait_until(lambda: len(_decisions(s, "F-1")) == 2 and len(_decisions(s, "F-2")) == 2,
                   what="both cells decided again on their readings")
    first, second = _decisions(s, "F-1")
    assert (first[0], first[1], second[0], second[1]) == ("fail", "record", "fail", "readings")
    assert first[2].endswith("; waiting for stage aging") and first[2] != second[2]
    assert first[3] == second[3] == ("abnormal_capacity",)
    # one letter for F-1: its cycle file's, when it failed
    (only,) = _subjects(s, "F-1")
    assert only.startswith("formgate: FAIL cell F-1, lot LOT-A \N{EM DASH} ")
    # F-2's readings add a hazard: that is a new decision, and it is mailed
    subjects = _subjects(s, "F-2")
    assert len(subjects) >= 2 and subjects[0].startswith("formgate: FAIL cell F-2, lot LOT-A")
    assert any(x.startswith("formgate: FAIL cell F-2") and "k_value_mV_per_day" in x
               for x in subjects[1:])


def test_a_hold_stands_while_its_reasons_apart_from_waiting_stand() -> None:
    import datetime

    from pipeline.judge.cellverdict import CellDecision
    from pipeline.ledger.rows import DecisionRow
    from pipeline.station.cells import stands

    def before(verdict: str, reason: str, hazards: tuple[str, ...] = ()) -> DecisionRow:
        at = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
        return DecisionRow(1, "C", "L", verdict, reason, hazards, None, "record", (), at, None)

    def now(verdict: str, *reasons: str, hazards: tuple[str, ...] = ()) -> CellDecision:
        return CellDecision(verdict, reasons, hazards, ())

    review = "dcir_mOhm 9.10 mOhm > 8.00 mOhm (review)"
    assert stands(before("hold", f"{review}; waiting for stage aging"), now("hold", review))
    assert not stands(before("hold", "waiting for stage aging"), now("hold", review))
    assert not stands(before("hold", review), now("hold", review, "outlier in lot: x"))
    assert stands(before("fail", "a; waiting for stage aging", ("internal_short",)),
                  now("fail", "a", "b", hazards=("internal_short",)))
    assert not stands(before("fail", "a", ("internal_short",)),
                      now("fail", "a", hazards=("internal_short", "over_temperature")))
    assert not stands(before("hold", review), now("fail", review))
