"""A lot closed: each cell's verdict over its stages, the K-value, the lot's screens and grades.

The aging readings come from the demo's aging tester (open-circuit fits of Chen et al.
2020, and a self-discharge current), with meter noise; the cycle-file results are
documents shaped as the judge writes them, one of them written by the real judge.
"""

from __future__ import annotations

import datetime
import random

import numpy as np
import pytest

from pipeline.acceptance.results import VerdictKind
from pipeline.demo.aging import aging_readings, demo_aging_lot
from pipeline.errors import FormgateError
from pipeline.judge.aging import judge_aging
from pipeline.judge.cellverdict import AGING, CYCLE_FILE, StageRecord, decide
from pipeline.judge.lotclose import close_lot
from pipeline.read.readings import ReadingFile, read_readings
from pipeline.rulebook.book import RuleBook, load_rule_set

START = datetime.datetime(2026, 11, 2, 8, 0, tzinfo=datetime.UTC)
RULES = """\
[rule_set]
name = "lot-test"
revision = "1"
chemistry = "NMC811/graphite"
family = "lithium-ion"

[cell_type.DEMO-NMC-5A]
nominal_capacity_Ah = 5.0

[stages]
needed = ["formation", "aging", "grading"]

[aging]
min_days = 3.0

[check.capacity]
metric = "grading_capacity_Ah"
low = 4.9
severity = "reject"

[check.k_value]
metric = "k_value_mV_per_day"
high = 3.0                 # test window: wide enough that a 5x leak stays inside it
severity = "reject"
hazard = "internal_short"

[screen.self_discharge]
metric = "k_value_mV_per_day"
k = 6.0
min_cells = 20
sides = "high"

[grade.A]
grading_capacity_Ah = { low = 5.10 }

[grade.B]
grading_capacity_Ah = { low = 4.9, high = 5.10 }
"""
RULE_SET = load_rule_set(RULES, "lot_test.toml")
BOOK = RuleBook((RULE_SET,))


def _document(cell_id: str, lot: str, capacity: float, *, day: int = 1) -> dict[str, object]:
    """A cycle-file result as the judge writes it (only the keys a lot close reads)."""
    verdict = "pass" if capacity >= 4.9 else "fail"
    return {
        "cell": {"cell_id": cell_id, "lot": lot, "cell_type": "DEMO-NMC-5A"},
        "cell_type": {"name": "DEMO-NMC-5A", "nominal_capacity_Ah": 5.0},
        "input": {"name": f"{cell_id}.csv", "sha256": f"{day:064x}"},
        "analysed_at": f"2026-11-{day:02d}T10:00:00+00:00",
        "verdict": verdict,
        "decision": "" if verdict == "pass" else f"grading_capacity_Ah {capacity:.3f} Ah < 4.9 Ah (reject)",
        "reasons": [],
        "hazards": [],
        "metrics": {"grading_capacity_Ah": capacity, "dcir_mOhm": 20.0},
    }


def _lot(count: int = 40, slow: tuple[int, ...] = (7,), seed: int = 3) -> tuple[list[dict[str, object]], ReadingFile]:
    rng = np.random.default_rng(seed)
    cells = demo_aging_lot("LOT-K", count, slow=slow, seed=seed)
    docs = [_document(c.cell_id, "LOT-K", float(rng.normal(5.12, 0.04))) for c in cells]
    data = aging_readings(cells, start=START, days=7.0, seed=seed)
    return docs, read_readings(data, "aging-LOT-K.csv")


# ---------------------------------------------------------------- a cell over its stages


def test_a_failure_is_final_while_a_stage_is_missing_and_a_pass_waits_for_it() -> None:
    failed = decide(["formation", "aging", "grading"], [StageRecord(CYCLE_FILE, "fail", "capacity low")])
    assert (failed.verdict, failed.reasons) == ("fail", ("capacity low", "waiting for stage aging"))
    waiting = decide(["formation", "aging", "grading"], [StageRecord(CYCLE_FILE, "pass")])
    assert (waiting.verdict, waiting.reason, waiting.missing) == (
        "hold", "waiting for stage aging", ("aging",)
    )
    done = decide(
        ["formation", "aging", "grading"],
        [StageRecord(CYCLE_FILE, "pass"), StageRecord(AGING, "pass")],
    )
    assert (done.verdict, done.reasons, done.missing) == ("pass", (), ())


def test_stages_in_any_order_give_the_same_decision() -> None:
    records = [StageRecord(AGING, "hold", "k_value_mV_per_day not measured"),
               StageRecord(CYCLE_FILE, "fail", "capacity low", ("abnormal_capacity",))]
    one = decide(["formation", "aging", "grading"], records)
    two = decide(["formation", "aging", "grading"], records[::-1])
    assert one == two
    assert one.verdict == "fail" and one.reasons[0] == "capacity low"


# ---------------------------------------------------------------- the aging stage


def test_the_k_value_check_is_judged_on_the_readings_and_never_on_a_cycle_file() -> None:
    # K = -(OCV_last - OCV_first) / days: 3.6512 V then 3.6470 V 7 days later is
    # 4.2 mV / 7 d = 0.6 mV/day (the K-value's definition, common practice), in window
    text = (
        "# lot: L\ncell_id,time,ocv_V\n"
        "C1,2026-11-02T08:00:00Z,3.6512\nC1,2026-11-09T08:00:00Z,3.6470\n"
    )
    readings = read_readings(text.encode(), "r.csv").readings
    ct = RULE_SET.cell_types[0]
    aging = judge_aging(readings, RULE_SET, ct)
    assert aging.values["k_value_mV_per_day"] == pytest.approx(0.6, abs=1e-9)
    assert [c.metric for c in aging.verdict.checks] == ["k_value_mV_per_day"]
    assert aging.verdict.kind is VerdictKind.PASS


def test_readings_too_close_together_hold_the_cell_and_never_count_as_in_window() -> None:
    text = "# lot: L\ncell_id,time,ocv_V\nC1,2026-11-02T08:00:00Z,3.6512\nC1,2026-11-03T08:00:00Z,3.6510\n"
    aging = judge_aging(read_readings(text.encode(), "r.csv").readings, RULE_SET, RULE_SET.cell_types[0])
    assert aging.verdict.kind is VerdictKind.HOLD
    assert "the K-value needs at least 3 days" in aging.verdict.reasons[0]


# ---------------------------------------------------------------- the lot


def test_a_slow_self_discharger_inside_its_window_is_caught_by_the_lot_screen() -> None:
    docs, readings = _lot()
    closed = close_lot("LOT-K", docs, [readings], BOOK)
    by_id = {c.cell_id: c for c in closed.cells}
    slow = by_id["LOT-K-007"]
    k = slow.values["k_value_mV_per_day"]
    assert k is not None and k < 3.0  # inside the K-value window...
    assert slow.before_screens.verdict == "pass"  # ...so it passed every check
    assert slow.decision.verdict == "hold" and slow.changed  # the lot's screen holds it
    assert slow.decision.reason.startswith("outlier in lot: k_value_mV_per_day")
    assert slow.grade is None  # a held cell gets no grade
    others = [c for c in closed.cells if c.cell_id != "LOT-K-007"]
    assert not any(c.changed for c in others)
    assert all(c.grade in ("A", "B") for c in others if c.decision.verdict == "pass")


def test_cells_without_readings_wait_for_the_aging_stage() -> None:
    docs, readings = _lot(count=30)
    kept = ReadingFile(readings.source, readings.metadata,
                       tuple(r for r in readings.readings if r.cell_id != "LOT-K-003"))
    closed = close_lot("LOT-K", docs, [kept], BOOK)
    third = next(c for c in closed.cells if c.cell_id == "LOT-K-003")
    assert (third.decision.verdict, third.decision.reason) == ("hold", "waiting for stage aging")


def test_a_lot_filled_in_any_order_gets_the_same_decisions() -> None:
    docs, readings = _lot(count=30)
    first = close_lot("LOT-K", docs, [readings], BOOK)
    rng = random.Random(5)
    for _ in range(3):
        shuffled = docs[:]
        rng.shuffle(shuffled)
        rows = list(readings.readings)
        rng.shuffle(rows)
        again = close_lot(
            "LOT-K", shuffled, [ReadingFile(readings.source, readings.metadata, tuple(rows))], BOOK
        )
        assert [(c.cell_id, c.decision, c.grade) for c in again.cells] == [
            (c.cell_id, c.decision, c.grade) for c in first.cells
        ]


def test_a_retest_counts_by_its_latest_record() -> None:
    docs, readings = _lot(count=25)
    retest = _document("LOT-K-002", "LOT-K", 4.5, day=9)  # judged again later: failed
    closed = close_lot("LOT-K", [*docs, retest], [readings], BOOK)
    second = next(c for c in closed.cells if c.cell_id == "LOT-K-002")
    assert second.decision.verdict == "fail"
    assert second.records[0][2] == f"{9:064x}"


def test_a_lot_with_nothing_in_it_is_refused_by_name() -> None:
    with pytest.raises(FormgateError, match="lot NOPE has no judged cell"):
        close_lot("NOPE", [], [], BOOK)


def test_a_real_result_document_closes_as_a_lot() -> None:
    """The judge's own JSON has every key a lot close reads."""
    import json

    from pipeline.demo.lots import ALL_DEMO_CELLS, demo_file_bytes
    from pipeline.report.result import to_document
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    spec = ALL_DEMO_CELLS[0]
    data = demo_file_bytes(spec)
    result = judge(data, "one.csv", load_rules_dir(RULES_DIR),
                   analysed_at=datetime.datetime(2026, 11, 1, tzinfo=datetime.UTC))
    doc = json.loads(json.dumps(to_document(result)))
    closed = close_lot(result.lot, [doc], [], load_rules_dir(RULES_DIR))
    (cell,) = closed.cells
    assert cell.decision.verdict == result.verdict.kind.value
    assert cell.records[0][1:] == ("one.csv", result.input_sha256)


def test_a_cell_of_a_formation_and_a_grading_file_is_one_cell_of_both_stages() -> None:
    """The demo's staged cell judged as its two files: each stage's record counts once."""
    import json

    from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_stage_files
    from pipeline.judge.lotclose import cell_stages
    from pipeline.report.result import to_document
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    book = load_rules_dir(RULES_DIR)
    cell = DEMO_STAGED_CELLS[0]
    docs = []
    for day, (stage, data) in enumerate(demo_stage_files(cell).items(), start=1):
        result = judge(data, f"{stage}.csv", book,
                       analysed_at=datetime.datetime(2026, 11, day, tzinfo=datetime.UTC))
        docs.append(json.loads(json.dumps(to_document(result))))
    rule_set, cell_type = book.for_cell_type(cell.cell_type)
    stages = cell_stages(docs, [], rule_set, cell_type)
    assert [r.stages for r in stages.records] == [("formation",), ("grading",)]
    assert stages.values["cycle_count"] == 2.0  # one formation cycle and the grading cycle
    assert stages.values["first_cycle_efficiency"] is not None
    assert stages.values["grading_capacity_Ah"] is not None
    decision = decide(cell_type.stages or rule_set.stages, stages.records)
    assert (decision.verdict, decision.reason) == ("hold", "waiting for stage aging")
    # a later grading record (a retest) supersedes the grading one only
    retest = {**docs[1], "analysed_at": "2026-11-09T00:00:00+00:00",
              "input": {"name": "retest.csv", "sha256": "f" * 64}}
    again = cell_stages([*docs, retest], [], rule_set, cell_type)
    assert [f[1] for f in again.files] == ["formation.csv", "retest.csv"]


def _records_rule_set(extra: str) -> tuple[object, object]:
    rule_set = load_rule_set(RULES + extra, "lot_test.toml")
    return rule_set, rule_set.cell_types[0]


def test_which_record_of_a_stage_counts_follows_the_rule_set() -> None:
    from pipeline.judge.lotclose import cell_stages

    good = _document("C1", "L", 5.1, day=1)
    failed = _document("C1", "L", 4.5, day=2)
    cut = {**_document("C1", "L", 4.6, day=3), "verdict": "hold",
           "notes": [{"code": "program_incomplete", "text": "record ends in cycle 2"}]}
    latest, ct = _records_rule_set("")
    # the latest complete record counts; a record cut short never hides a complete one
    chosen = cell_stages([good, failed, cut], [], latest, ct)  # type: ignore[arg-type]
    assert [r.verdict for r in chosen.records] == ["fail"]
    retest = _document("C1", "L", 5.1, day=4)
    chosen = cell_stages([good, failed, cut, retest], [], latest, ct)  # type: ignore[arg-type]
    assert [r.verdict for r in chosen.records] == ["pass"]
    # worst: a failure stands whatever passes after it
    worst, ct = _records_rule_set('\n[records]\ncounts = "worst"\n')
    chosen = cell_stages([good, failed, retest], [], worst, ct)  # type: ignore[arg-type]
    assert [r.verdict for r in chosen.records] == ["fail"]
    # one retest allowed: a third record of a stage holds the cell
    limited, ct = _records_rule_set("\n[records]\nretests = 1\n")
    chosen = cell_stages([good, failed, retest], [], limited, ct)  # type: ignore[arg-type]
    decision = decide(["formation", "grading"], chosen.records)
    assert decision.verdict == "hold"
    assert "3 records of stage formation, more than the first and 1 retest" in decision.reason
